"""The content digest of a post: tells an identical retry (200) from a conflicting reuse of a
key (409), whatever the encoding (JSON, Arrow, Parquet; compressed or not).

It is computed over a canonical form of what was decoded, never by serialising the parsed body
again: the metadata as canonical JSON, then each sample column's name, kind and little-endian
buffer. A client can compute it (README, "Content digest")::

    sha256(
        b"tidegate-post-digest/1\\n"
        + canonical_json(metadata) + b"\\n"
        + for each sample column, in order of name (UTF-8 bytes):
              name + b"\\n" + kind + b"\\n" + str(rows) + b"\\n" + payload
    )

* ``metadata``: ``key``, ``parent``, ``trained_until`` (UTC, ``YYYY-MM-DDTHH:MM:SS.ffffffZ``),
  ``code_version``, ``rows_trained``, ``metrics``, ``tags`` (absent ones as null, or ``{}`` for
  the two maps); ``canonical_json`` is ``json.dumps(value, sort_keys=True, separators=(",",
  ":"), ensure_ascii=True)`` encoded as ASCII.
* numeric columns (``score``, ``label``, ``baseline_score``, ``served_score``, ``rank``):
  kind ``f8``; payload the float64 values, little-endian, with every NaN (and null) as the
  quiet NaN ``0x7FF8000000000000``.
* text columns (``row_id``, ``group``, ``item``, ``segment.*``): kind ``text``; payload the
  distinct values in order of first appearance as canonical JSON, ``b"\\n"``, then for each row
  the 0-based position of its value in that list as uint32 little-endian.

The answer is ``"sha256:" + hexdigest``.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Mapping
from datetime import UTC, datetime
from typing import Any

import numpy as np
import pandas as pd

PREFIX = b"tidegate-post-digest/1\n"
_QUIET_NAN = np.float64("nan")


def canonical_json(value: Any) -> bytes:
    return json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=True).encode(
        "ascii"
    )


def utc_text(value: datetime | None) -> str | None:
    if value is None:
        return None
    return value.astimezone(UTC).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def float_payload(values: np.ndarray) -> memoryview:
    """float64 little-endian bytes, every NaN as the quiet NaN (null and NaN post alike)."""
    array = np.ascontiguousarray(values, dtype="<f8")
    nan = np.isnan(array)
    if nan.any():
        array = array.copy()
        array[nan] = _QUIET_NAN
    return array.view(np.uint8).data


def first_appearance(values: np.ndarray) -> tuple[np.ndarray, list[str]]:
    """(codes, distinct values) of a text column, distinct values in order of first
    appearance; codes are uint32 positions in that list."""
    codes, uniques = pd.factorize(values, sort=False, use_na_sentinel=False)
    return codes.astype("<u4", copy=False), [str(u) for u in uniques]


def text_payload(
    values: np.ndarray, factorized: tuple[np.ndarray, list[str]] | None = None
) -> list[bytes | memoryview]:
    codes, uniques = factorized if factorized is not None else first_appearance(values)
    return [canonical_json(uniques), b"\n", np.ascontiguousarray(codes).view(np.uint8).data]


def post_digest(
    metadata: Mapping[str, Any],
    columns: Mapping[str, np.ndarray] | None,
    *,
    numeric: frozenset[str] | set[str] | tuple[str, ...],
    factorized: Mapping[str, tuple[np.ndarray, list[str]]] | None = None,
) -> str:
    """The digest described in the module docstring. *metadata* holds the JSON fields (dates
    as datetimes); *numeric* names the float columns; *factorized* may hold the text columns'
    (codes, distinct values) already computed."""
    meta = dict(metadata)
    meta["trained_until"] = utc_text(meta.get("trained_until"))
    h = hashlib.sha256(PREFIX)
    h.update(canonical_json(meta))
    h.update(b"\n")
    for name in sorted(columns or {}, key=lambda n: n.encode("utf-8")):
        values = (columns or {})[name]
        kind = "f8" if name in numeric else "text"
        h.update(f"{name}\n{kind}\n{len(values)}\n".encode())
        if kind == "f8":
            h.update(float_payload(values))
        else:
            for part in text_payload(values, (factorized or {}).get(name)):
                h.update(part)
    return "sha256:" + h.hexdigest()
