"""From the posted JSON sample to the gate's columnar :class:`~service.gate.types.Sample`.

Pydantic checks each known column's element types; this module checks what spans columns:
equal lengths, segment column names and values, unique row ids, and the size limits. Every
error names the field path (``sample.segment.device[12]``).
"""

from __future__ import annotations

import re
from typing import Any

import numpy as np

from service.api.schemas import SampleIn
from service.errors import InvalidInput
from service.gate.types import NUMERIC_COLUMNS, TEXT_COLUMNS, Sample
from service.settings import Settings
from service.text import first_control, shown

SEGMENT_NAME = re.compile(r"^segment\.[A-Za-z0-9_][A-Za-z0-9_.-]{0,63}$")


def _floats(values: list[float | None]) -> np.ndarray:
    return np.array([np.nan if v is None else v for v in values], dtype=np.float64)


def _is_unicode(text: str) -> bool:
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        return False
    return True


def _texts(name: str, values: list[Any], limit: int) -> np.ndarray:
    out = np.empty(len(values), dtype=object)
    for i, value in enumerate(values):
        if (
            isinstance(value, bool)
            or not isinstance(value, (str, int))
            or (isinstance(value, int) and abs(value) > 10**100)
        ):
            raise InvalidInput(
                f"{name} values must be text or integers", field=f"sample.{name}[{i}]"
            )
        text = str(value)
        if not _is_unicode(text):
            raise InvalidInput(
                f"{name} values must be valid Unicode text (no lone surrogates)",
                field=f"sample.{name}[{i}]",
            )
        if len(text) > limit:
            raise InvalidInput(
                f"{name} value longer than {limit} characters", field=f"sample.{name}[{i}]"
            )
        out[i] = text
    bad = first_control(list(out))
    if bad is not None:
        raise InvalidInput(
            f"{name} values may not hold control characters (C0, DEL, C1, NUL)",
            field=f"sample.{name}[{bad}]",
        )
    return out


def to_sample(payload: SampleIn, settings: Settings) -> Sample:
    """Validate *payload* across columns and convert it; raises InvalidInput."""
    raw: dict[str, list[Any]] = {}
    for name in NUMERIC_COLUMNS + TEXT_COLUMNS:
        values = getattr(payload, name)
        if values is not None:
            raw[name] = values
    extras = payload.model_extra or {}
    for name, values in extras.items():
        if not SEGMENT_NAME.match(name):
            raise InvalidInput(
                "unknown sample column; extra columns must be named segment.<name> "
                "(letters, digits, _ . -; at most 64 characters)",
                field=f"sample.{shown(name, quote=False)}",
            )
        if not isinstance(values, list):
            raise InvalidInput("a segment column must be an array", field=f"sample.{name}")
        raw[name] = values
    if len(raw) > settings.max_columns:
        raise InvalidInput(
            f"sample has {len(raw)} columns, more than the {settings.max_columns} allowed",
            field="sample",
            code="too_many_columns",
        )
    n = len(raw["score"])
    if n > settings.max_rows:
        raise InvalidInput(
            f"sample has {n} rows, more than the {settings.max_rows} allowed",
            field="sample.score",
            code="too_many_rows",
        )
    for name, values in raw.items():
        if len(values) != n:
            raise InvalidInput(
                f"column {name} has {len(values)} values but score has {n}; all sample columns "
                "must have the same length",
                field=f"sample.{name}",
            )
    columns: dict[str, np.ndarray] = {}
    for name, values in raw.items():
        if name in NUMERIC_COLUMNS:
            columns[name] = _floats(values)
        else:
            columns[name] = _texts(name, values, settings.max_string_length)
    if "rank" in columns and n and np.any(columns["rank"] < 1):
        bad = int(np.argmax(columns["rank"] < 1))
        raise InvalidInput("rank starts at 1", field=f"sample.rank[{bad}]")
    if "row_id" in columns and n:
        uniques, counts = np.unique(columns["row_id"].astype(str), return_counts=True)
        if np.any(counts > 1):
            dup = uniques[np.argmax(counts > 1)]
            positions = np.nonzero(columns["row_id"].astype(str) == dup)[0]
            raise InvalidInput(
                f"row_id {shown(dup)} appears {int(counts[counts > 1][0])} times; row ids must "
                "be unique",
                field=f"sample.row_id[{int(positions[1])}]",
                code="duplicate_row_id",
            )
    return Sample(columns)
