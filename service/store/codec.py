"""The sample codec: columns stored as compressed typed arrays, not JSON rows.

Codecs
------
``f8-zlib``
    float64 little-endian, zlib level 6. NaN and infinities are kept (the model produced them).
``dict-zlib``
    text columns, dictionary-encoded: the distinct values as a JSON list, then one uint32 code
    per row, zlib. Segment, group and item columns repeat a few values many times, so this is
    small.
"""

from __future__ import annotations

import json
import struct
import zlib
from collections.abc import Mapping

import numpy as np

from service.gate.types import NUMERIC_COLUMNS, Sample, SampleSummary

FLOAT = "f8-zlib"
TEXT = "dict-zlib"
QUANTILE_LEVELS = np.linspace(0.0, 1.0, 101)
HIST_BINS = 40


def is_numeric(name: str) -> bool:
    return name in NUMERIC_COLUMNS


def encode_column(name: str, values: np.ndarray) -> tuple[str, int, bytes]:
    """(codec, length, data) for one column."""
    if is_numeric(name):
        array = np.ascontiguousarray(values, dtype="<f8")
        return FLOAT, int(array.size), zlib.compress(array.tobytes(), 6)
    uniques, codes = np.unique(np.asarray(values, dtype=object).astype(str), return_inverse=True)
    header = json.dumps(uniques.tolist(), ensure_ascii=False).encode("utf-8")
    body = np.ascontiguousarray(codes, dtype="<u4").tobytes()
    raw = struct.pack("<I", len(header)) + header + body
    return TEXT, int(codes.size), zlib.compress(raw, 6)


def decode_column(codec: str, length: int, data: bytes) -> np.ndarray:
    raw = zlib.decompress(data)
    if codec == FLOAT:
        array = np.frombuffer(raw, dtype="<f8").astype(np.float64)
    elif codec == TEXT:
        (size,) = struct.unpack_from("<I", raw, 0)
        uniques = np.array(json.loads(raw[4 : 4 + size].decode("utf-8")), dtype=object)
        codes = np.frombuffer(raw[4 + size :], dtype="<u4")
        array = uniques[codes] if codes.size else np.array([], dtype=object)
    else:
        raise ValueError(f"unknown sample codec {codec!r}")
    if array.size != length:
        raise ValueError(f"sample column decodes to {array.size} values, expected {length}")
    return array


def encode_sample(sample: Sample) -> list[tuple[str, str, int, bytes]]:
    return [(name, *encode_column(name, values)) for name, values in sample.columns.items()]


def decode_sample(rows: Mapping[str, tuple[str, int, bytes]]) -> Sample:
    return Sample({name: decode_column(*row) for name, row in rows.items()})


def summarise(score: np.ndarray) -> SampleSummary:
    """Count, moments, 101 quantiles and a 40-bin histogram of the finite scores."""
    finite = score[np.isfinite(score)]
    if finite.size == 0:
        return SampleSummary(
            count=int(score.size), finite=0, mean=None, std=None, minimum=None, maximum=None
        )
    lo, hi = float(finite.min()), float(finite.max())
    with np.errstate(over="ignore", invalid="ignore"):
        mean, std = float(finite.mean()), float(finite.std())
        quantiles = np.quantile(finite, QUANTILE_LEVELS)
    edges_counts = _histogram(finite, lo, hi)
    return SampleSummary(
        count=int(score.size),
        finite=int(finite.size),
        # finite scores near the float limits can overflow the mean; never store inf or NaN
        mean=mean if np.isfinite(mean) else None,
        std=std if np.isfinite(std) else None,
        minimum=lo,
        maximum=hi,
        quantiles=tuple(float(q) for q in quantiles) if np.all(np.isfinite(quantiles)) else (),
        hist_edges=edges_counts[0],
        hist_counts=edges_counts[1],
    )


def _histogram(
    finite: np.ndarray, lo: float, hi: float
) -> tuple[tuple[float, ...], tuple[int, ...]]:
    """40 equal bins from the lowest to the highest finite score; none when the range cannot be
    cut into finite bins (scores near the float limits)."""
    top = hi if hi > lo else lo + max(abs(lo) * 1e-9, 1e-9)
    try:
        with np.errstate(over="ignore", invalid="ignore"):
            counts, edges = np.histogram(finite, bins=HIST_BINS, range=(lo, top))
    except ValueError:
        return (), ()
    if not np.all(np.isfinite(edges)):
        return (), ()
    return tuple(float(e) for e in edges), tuple(int(c) for c in counts)
