"""Turn a sample (a dict of arrays, a pandas or polars DataFrame, an Arrow table) into the two
encodings the service reads: JSON (one array per column) and an Arrow IPC stream.

Columns keep the names of the JSON post: ``score``, ``label``, ``baseline_score``,
``served_score``, ``row_id``, ``group``, ``item``, ``rank`` and ``segment.<name>``. pandas, polars
and pyarrow are optional: they are imported only when a sample of theirs is given or the binary
upload is used.
"""

from __future__ import annotations

import io
import json
from collections.abc import Mapping
from typing import Any

import numpy as np

__all__ = ["SampleLike", "arrow_available", "row_count", "to_arrow_ipc", "to_json_columns"]

#: A dict of column name to array-like, a pandas DataFrame, a polars DataFrame, or a pyarrow
#: Table / RecordBatch.
SampleLike = Any


def _module(obj: Any) -> str:
    return type(obj).__module__.split(".")[0]


def arrow_available() -> bool:
    """Whether pyarrow can be imported (the binary upload needs it)."""
    try:
        import pyarrow  # noqa: F401
    except ImportError:
        return False
    return True


def _columns(sample: SampleLike) -> dict[str, Any]:
    """Column name -> a 1-d array (numpy array, or a list for what numpy cannot hold)."""
    kind = _module(sample)
    if kind == "pyarrow":
        return {
            str(name): sample.column(i).to_numpy(zero_copy_only=False)
            if hasattr(sample.column(i), "to_numpy")
            else np.asarray(sample.column(i))
            for i, name in enumerate(sample.schema.names)
        }
    if kind == "pandas":
        return {str(name): sample[name].to_numpy() for name in sample.columns}
    if kind == "polars":
        return {str(name): sample.get_column(name).to_numpy() for name in sample.columns}
    if isinstance(sample, Mapping):
        return {str(name): _array(values, str(name)) for name, values in sample.items()}
    raise TypeError(
        "sample must be a dict of arrays, a pandas or polars DataFrame, or a pyarrow Table; "
        f"got {type(sample).__name__}"
    )


def _array(values: Any, name: str) -> Any:
    if isinstance(values, (str, bytes)) or np.ndim(values) != 1:
        raise ValueError(f"sample column {name!r} must be one-dimensional")
    return values if isinstance(values, np.ndarray) else np.asarray(values)


def row_count(sample: SampleLike) -> int:
    """The number of rows of *sample* (of its ``score`` column, else its first column)."""
    kind = _module(sample)
    if kind in {"pyarrow", "pandas", "polars"}:
        return int(len(sample))
    if isinstance(sample, Mapping):
        values = sample.get("score", next(iter(sample.values()), []))
        return int(len(values))
    return len(_columns(sample).get("score", []))


def _plain(value: Any) -> Any:
    """A Python value JSON can carry: numbers stay numbers (NaN and infinities too: the service
    keeps and judges non-finite scores), missing values become null."""
    if value is None:
        return None
    if isinstance(value, (bool, np.bool_)):
        return int(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value)
    if isinstance(value, str):
        return value
    try:  # pandas NA / NaT and other missing markers are not equal to themselves
        if value != value:
            return None
    except (TypeError, ValueError):
        return None
    return str(value)


def _json_list(array: Any) -> list[Any]:
    if isinstance(array, np.ndarray):
        if array.dtype.kind == "b":
            return array.astype(np.int64).tolist()  # type: ignore[no-any-return]
        if array.dtype.kind in "iuf":
            return array.tolist()  # type: ignore[no-any-return]
        return [_plain(v) for v in array.tolist()]
    return [_plain(v) for v in array]


def to_json_columns(sample: SampleLike) -> dict[str, list[Any]]:
    """The sample as the JSON post's ``sample`` object: column name -> list of values.

    Raises
    ------
    TypeError
        When *sample* is none of the accepted kinds.
    ValueError
        When a column is not one-dimensional.
    """
    return {name: _json_list(values) for name, values in _columns(sample).items()}


def json_dumps(body: Mapping[str, Any]) -> bytes:
    """The post as JSON bytes. NaN and infinities are written as ``NaN`` / ``Infinity`` (the
    service accepts them in score columns, where they are judged as a health breach)."""
    return json.dumps(body, separators=(",", ":"), allow_nan=True).encode("utf-8")


def _arrow_table(sample: SampleLike) -> Any:
    import pyarrow as pa

    kind = _module(sample)
    if kind == "pyarrow":
        return pa.Table.from_batches([sample]) if isinstance(sample, pa.RecordBatch) else sample
    if kind == "polars":
        return sample.to_arrow()
    if kind == "pandas":
        return pa.Table.from_pandas(sample, preserve_index=False)
    columns = {}
    for name, values in _columns(sample).items():
        if isinstance(values, np.ndarray) and values.dtype.kind == "b":
            values = values.astype(np.int8)
        if isinstance(values, np.ndarray) and values.dtype.kind == "O":
            values = [_plain(v) for v in values.tolist()]
        columns[name] = pa.array(values)
    return pa.table(columns)


def to_arrow_ipc(sample: SampleLike) -> bytes:
    """The sample as an Arrow IPC stream (``application/vnd.apache.arrow.stream``).

    Raises
    ------
    ImportError
        Without pyarrow (``pip install 'tidegate-client[arrow]'``).
    """
    import pyarrow as pa

    table = _arrow_table(sample)
    sink = io.BytesIO()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue()
