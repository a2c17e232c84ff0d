"""From a posted sample (JSON arrays, or Arrow / Parquet columns) to the gate's columnar
:class:`~service.gate.types.Sample`, with the same rules and the same errors for every encoding.

For JSON, pydantic checks each known column's element types; this module checks what spans
columns: names, equal lengths, segment values, unique row ids, the size limits. Arrow and
Parquet columns get the same checks here, vectorised (see :mod:`service.api.columnar`). Every
error names the field path with the column and the row (``sample.segment.device[12]``).

Text columns are factorised once (distinct values in order of first appearance, and one code
per row); the digest and the store reuse that.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from service.api.schemas import SampleIn
from service.errors import InvalidInput
from service.gate.types import LOG_COLUMNS, MODEL_COLUMNS, NUMERIC_COLUMNS, TEXT_COLUMNS, Sample
from service.settings import Settings
from service.text import has_control, shown

SEGMENT_NAME = re.compile(r"^segment\.[A-Za-z0-9_][A-Za-z0-9_.-]{0,63}$")
HUGE_INT = 10**100


@dataclass(frozen=True)
class Decoded:
    """A validated sample and, for each text column, its (codes, distinct values)."""

    sample: Sample
    factorized: Mapping[str, tuple[np.ndarray, list[str]]] = field(default_factory=dict)


def check_name(name: str) -> None:
    if name in NUMERIC_COLUMNS or name in TEXT_COLUMNS:
        return
    if not SEGMENT_NAME.match(name):
        raise InvalidInput(
            "unknown sample column; extra columns must be named segment.<name> "
            "(letters, digits, _ . -; at most 64 characters)",
            field=f"sample.{shown(name, quote=False)}",
        )


def check_shape(lengths: Mapping[str, int], settings: Settings) -> int:
    """Column count, row count and equal lengths; returns the row count."""
    if "score" not in lengths:
        raise InvalidInput("the sample needs a score column", field="sample.score")
    if len(lengths) > settings.max_columns:
        raise InvalidInput(
            f"sample has {len(lengths)} columns, more than the {settings.max_columns} allowed",
            field="sample",
            code="too_many_columns",
        )
    n = lengths["score"]
    if n > settings.max_rows:
        raise InvalidInput(
            f"sample has {n} rows, more than the {settings.max_rows} allowed",
            field="sample.score",
            code="too_many_rows",
        )
    for name, length in lengths.items():
        if length != n:
            raise InvalidInput(
                f"column {name} has {length} values but score has {n}; all sample columns "
                "must have the same length",
                field=f"sample.{name}",
            )
    _log_columns_together(lengths)
    return n


def _is_unicode(text: str) -> bool:
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        return False
    return True


def bad_text(name: str, row: int) -> InvalidInput:
    return InvalidInput(f"{name} values must be text or integers", field=f"sample.{name}[{row}]")


def text_from_codes(
    name: str, codes: np.ndarray, uniques: list[Any], limit: int
) -> tuple[np.ndarray, tuple[np.ndarray, list[str]]]:
    """Check the distinct values of a text column (text or integers, valid Unicode, at most
    *limit* characters) and build the column: an object array of ``str``, plus (codes,
    distinct texts in order of first appearance). *codes* index *uniques*, which are in order
    of first appearance; an error names the first row holding a bad value."""
    texts: list[str] = []
    for k, value in enumerate(uniques):
        if (
            isinstance(value, bool)
            or not isinstance(value, (str, int))
            or (isinstance(value, int) and abs(value) > HUGE_INT)
        ):
            raise bad_text(name, int(np.argmax(codes == k)))
        text = str(value)
        if not _is_unicode(text):
            raise InvalidInput(
                f"{name} values must be valid Unicode text (no lone surrogates)",
                field=f"sample.{name}[{int(np.argmax(codes == k))}]",
            )
        if len(text) > limit:
            raise InvalidInput(
                f"{name} value longer than {limit} characters",
                field=f"sample.{name}[{int(np.argmax(codes == k))}]",
            )
        if has_control(text):
            raise InvalidInput(
                f"{name} values may not hold control characters (C0, DEL, C1, NUL)",
                field=f"sample.{name}[{int(np.argmax(codes == k))}]",
            )
        texts.append(text)
    codes = np.ascontiguousarray(codes, dtype="<u4")
    if len(set(texts)) != len(texts):  # 7 and "7" are one text: merge their codes
        merged, distinct = pd.factorize(np.array(texts, dtype=object), sort=False)
        codes = merged.astype("<u4")[codes]
        texts = [str(t) for t in distinct]
    table = np.empty(len(texts), dtype=object)
    table[:] = texts
    return table[codes], (codes, texts)


def _json_text(name: str, values: list[Any], limit: int) -> tuple[np.ndarray, Any]:
    kinds = set(map(type, values))
    if not kinds <= {str, int}:
        for i, value in enumerate(values):
            if type(value) not in (str, int):
                raise bad_text(name, i)
    array = np.empty(len(values), dtype=object)
    array[:] = values
    codes, uniques = pd.factorize(array, sort=False)
    return text_from_codes(name, codes, list(uniques), limit)


def check_rows(columns: Mapping[str, np.ndarray]) -> None:
    """Rules across rows: rank starts at 1, row ids are unique."""
    rank = columns.get("rank")
    if rank is not None and rank.size and np.any(rank < 1):
        bad = int(np.argmax(rank < 1))
        raise InvalidInput("rank starts at 1", field=f"sample.rank[{bad}]")


def check_row_ids(codes: np.ndarray, texts: list[str]) -> None:
    if len(texts) == codes.size:
        return
    # the first row whose value was seen before: a vectorised form of a running "seen" set
    order = np.argsort(codes, kind="stable")
    sorted_codes = codes[order]
    repeat = np.zeros(codes.size, dtype=bool)
    repeat[order[1:]] = sorted_codes[1:] == sorted_codes[:-1]
    first_dup = int(np.argmax(repeat))
    value = texts[int(codes[first_dup])]
    count = int(np.count_nonzero(codes == codes[first_dup]))
    raise InvalidInput(
        f"row_id {shown(value)} appears {count} times; row ids must be unique",
        field=f"sample.row_id[{first_dup}]",
        code="duplicate_row_id",
    )


def finish(columns: dict[str, np.ndarray], factorized: dict[str, Any]) -> Decoded:
    check_rows(columns)
    if "row_id" in factorized:
        check_row_ids(*factorized["row_id"])
    return Decoded(Sample(columns), factorized)


def from_json(payload: SampleIn, settings: Settings) -> Decoded:
    """Validate a JSON sample across columns and convert it; raises InvalidInput."""
    raw: dict[str, list[Any]] = {}
    for name in NUMERIC_COLUMNS + TEXT_COLUMNS:
        values = getattr(payload, name)
        if values is not None:
            raw[name] = values
    for name, values in (payload.model_extra or {}).items():
        check_name(name)
        if not isinstance(values, list):
            raise InvalidInput("a segment column must be an array", field=f"sample.{name}")
        raw[name] = values
    check_shape({name: len(values) for name, values in raw.items()}, settings)
    columns: dict[str, np.ndarray] = {}
    factorized: dict[str, Any] = {}
    for name, values in raw.items():
        if name in NUMERIC_COLUMNS:
            # pydantic checked the element types; None (null) becomes NaN
            columns[name] = np.array(values, dtype=np.float64)
        else:
            columns[name], factorized[name] = _json_text(name, values, settings.max_string_length)
    return finish(columns, factorized)


def to_sample(payload: SampleIn, settings: Settings) -> Sample:
    """Validate *payload* and convert it (see :func:`from_json`)."""
    return from_json(payload, settings).sample


def _log_columns_together(raw: Mapping[str, object]) -> None:
    """The logged-exploration columns come as a set: the four of LOG_COLUMNS together, and
    the reward model's three (for the doubly robust estimator) only with them, all three."""
    for group, needs in ((LOG_COLUMNS, ()), (MODEL_COLUMNS, LOG_COLUMNS)):
        given = [name for name in group if name in raw]
        if not given:
            continue
        missing = [name for name in group + needs if name not in raw]
        if missing:
            raise InvalidInput(
                f"column {given[0]} needs the column {missing[0]}: the logged-exploration "
                f"columns come together ({', '.join(LOG_COLUMNS)}; and for a reward model "
                f"{', '.join(MODEL_COLUMNS)})",
                field=f"sample.{missing[0]}",
                code="missing_column",
            )
