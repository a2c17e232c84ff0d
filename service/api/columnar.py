"""A sample sent as an Apache Arrow IPC stream or a Parquet file, decoded with pyarrow into the
gate's numpy columns without a Python loop over rows.

Columns are named as in JSON (``score``, ``label``, ``segment.device``, ...) and follow the same
rules, with the same error fields (``sample.<column>[<row>]``):

* ``score``, ``baseline_score``, ``served_score``: floating point or integer; nulls, NaN and
  infinities are kept (the model produced them) and judged.
* ``label``: floating point or integer, every value finite (no null).
* ``rank``: integer, every value from 1 to 10^9 (no null).
* ``row_id``, ``group``, ``item``, ``segment.<name>``: text (also dictionary-encoded) or
  integer, no null, at most ``max_string_length`` characters.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.ipc as ipc
import pyarrow.parquet as pq

from service.api.sample import Decoded, check_name, check_shape, finish, text_from_codes
from service.errors import InvalidInput
from service.gate.types import NUMERIC_COLUMNS
from service.settings import Settings

ARROW_STREAM = "application/vnd.apache.arrow.stream"
PARQUET = "application/vnd.apache.parquet"
MEDIA_TYPES = (ARROW_STREAM, PARQUET)
NULLABLE = ("score", "baseline_score", "served_score")
MAX_RANK = 1_000_000_000


def read_table(data: bytes | memoryview, media_type: str) -> pa.Table:
    """The table in *data* (zero copy where the format allows); 422 when it is unreadable."""
    buffer = pa.py_buffer(data)
    try:
        if media_type == ARROW_STREAM:
            with ipc.open_stream(buffer) as reader:
                return reader.read_all()
        return pq.read_table(pa.BufferReader(buffer))
    except (pa.ArrowException, OSError, ValueError) as exc:
        what = "Arrow IPC stream" if media_type == ARROW_STREAM else "Parquet file"
        raise InvalidInput(
            f"the sample part is not a readable {what}: {exc}"[:500],
            field="sample",
            code="invalid_sample",
        ) from exc


def _first(mask: Any) -> int:
    """Row of the first true value of a boolean Arrow array (nulls count as false)."""
    return int(np.argmax(np.asarray(pc.fill_null(mask, False))))


def _numeric(name: str, column: Any) -> np.ndarray:
    """A float64 numpy array of a numeric column (nulls as NaN where the column allows them)."""
    kind = column.type
    if pa.types.is_dictionary(kind):
        column = column.cast(kind.value_type)
        kind = column.type
    if not (pa.types.is_floating(kind) or pa.types.is_integer(kind)):
        raise InvalidInput(
            f"{name} must be a floating point or integer column, not {kind}",
            field=f"sample.{name}",
        )
    if name == "rank" and not pa.types.is_integer(kind):
        raise InvalidInput(f"rank must be an integer column, not {kind}", field="sample.rank")
    if name not in NULLABLE and column.null_count:
        row = _first(column.is_null())
        raise InvalidInput(f"{name} has a null value", field=f"sample.{name}[{row}]")
    if name == "rank":
        ranks = np.asarray(column.to_numpy())
        bad = (ranks < 1) | (ranks > MAX_RANK)
        if bad.any():
            raise InvalidInput(
                f"rank values are integers from 1 to {MAX_RANK}",
                field=f"sample.rank[{int(np.argmax(bad))}]",
            )
        return ranks.astype(np.float64)
    values = column if kind == pa.float64() else column.cast(pa.float64())
    if values.num_chunks == 1 and not values.null_count:
        # zero copy: the array is a view of the request's buffer
        array = np.asarray(values.chunk(0).to_numpy(zero_copy_only=False), dtype=np.float64)
    else:
        # one contiguous array; nulls become NaN (as JSON null does)
        array = np.asarray(values.to_numpy(), dtype=np.float64)
    if name == "label" and array.size and not np.isfinite(array).all():
        bad_row = int(np.argmax(~np.isfinite(array)))
        raise InvalidInput("label values must be finite numbers", field=f"sample.label[{bad_row}]")
    return array


def _dictionary_text(name: str, column: Any, limit: int) -> tuple[np.ndarray, Any] | None:
    """A dictionary-encoded text column without decoding it: its codes renumbered in order of
    first appearance (None when the dictionary is not text or a value is null)."""
    kind = column.type
    if not (pa.types.is_string(kind.value_type) or pa.types.is_large_string(kind.value_type)):
        return None
    if column.null_count:
        return None
    chunk = column.combine_chunks() if column.num_chunks != 1 else column.chunk(0)
    if chunk.dictionary.null_count:
        return None
    indices = np.asarray(chunk.indices.to_numpy(zero_copy_only=False))
    codes, used = pd.factorize(indices, sort=False)
    dictionary = chunk.dictionary.to_pylist()
    return text_from_codes(name, codes, [dictionary[int(i)] for i in used], limit)


def _text(name: str, column: Any, limit: int) -> tuple[np.ndarray, Any]:
    kind = column.type
    if pa.types.is_dictionary(kind):
        found = _dictionary_text(name, column, limit)
        if found is not None:
            return found
        column = column.cast(kind.value_type)
        kind = column.type
    if pa.types.is_integer(kind):
        column = column.cast(pa.string())
    elif not (pa.types.is_string(kind) or pa.types.is_large_string(kind)):
        raise InvalidInput(
            f"{name} must be a text or integer column, not {kind}", field=f"sample.{name}"
        )
    if column.null_count:
        raise InvalidInput(
            f"{name} values must be text or integers (null at this row)",
            field=f"sample.{name}[{_first(column.is_null())}]",
        )
    # distinct values in order of first appearance, one int32 code per row
    encoded: Any = pc.dictionary_encode(column.combine_chunks())
    codes = np.asarray(encoded.indices.to_numpy(zero_copy_only=False))
    uniques = encoded.dictionary.to_pylist()
    return text_from_codes(name, codes, uniques, limit)


def from_table(table: pa.Table, settings: Settings) -> Decoded:
    """Validate the columns of *table* and convert them; raises InvalidInput."""
    names = table.column_names
    seen: set[str] = set()
    for name in names:
        if name in seen:
            raise InvalidInput(f"column {name} appears twice", field=f"sample.{name}"[:300])
        seen.add(name)
        check_name(name)
    check_shape(dict.fromkeys(names, table.num_rows) if "score" in seen else {}, settings)
    columns: dict[str, np.ndarray] = {}
    factorized: dict[str, Any] = {}
    for name in names:
        column = table.column(name)
        if name in NUMERIC_COLUMNS:
            columns[name] = _numeric(name, column)
        else:
            columns[name], factorized[name] = _text(name, column, settings.max_string_length)
    return finish(columns, factorized)
