"""Adjusted p-values for a family of tests (segments of one check).

Functions
---------
holm
    Holm's step-down adjustment; controls the family-wise error rate [1].
benjamini_hochberg
    Benjamini–Hochberg step-up adjustment; controls the false discovery rate [2].
adjust
    Either of the two by name.

Both return adjusted p-values in the input order, each capped at 1, so a test is rejected at
level alpha exactly when its adjusted p-value is at most alpha.

References
----------
1. Holm, S. (1979). A simple sequentially rejective multiple test procedure. Scandinavian
   Journal of Statistics 6(2), 65–70.
2. Benjamini, Y. & Hochberg, Y. (1995). Controlling the false discovery rate: a practical and
   powerful approach to multiple testing. Journal of the Royal Statistical Society B 57(1),
   289–300.
"""

from __future__ import annotations

from typing import Literal

import numpy as np

Correction = Literal["holm", "bh"]
CORRECTIONS: tuple[Correction, ...] = ("holm", "bh")


def _pvalues(pvalues: object) -> np.ndarray:
    p = np.asarray(pvalues, dtype=np.float64)
    if p.ndim != 1:
        raise ValueError(f"pvalues must be one-dimensional, got shape {p.shape}")
    if p.size and (not np.all(np.isfinite(p)) or p.min() < 0 or p.max() > 1):
        raise ValueError("pvalues must be finite and within [0, 1]")
    return p


def holm(pvalues: object) -> np.ndarray:
    """Holm-adjusted p-values [1].

    Sorted ascending, ``p_(i)`` becomes ``max_{j <= i} min(1, (m - j + 1) p_(j))``.

    Examples
    --------
    >>> holm([0.01, 0.04, 0.03]).round(3).tolist()
    [0.03, 0.06, 0.06]
    """
    p = _pvalues(pvalues)
    m = p.size
    if m == 0:
        return p.copy()
    order = np.argsort(p, kind="stable")
    scaled = (m - np.arange(m)) * p[order]
    adjusted = np.minimum(1.0, np.maximum.accumulate(scaled))
    out = np.empty(m)
    out[order] = adjusted
    return out


def benjamini_hochberg(pvalues: object) -> np.ndarray:
    """Benjamini–Hochberg-adjusted p-values [2].

    Sorted ascending, ``p_(i)`` becomes ``min_{j >= i} min(1, m p_(j) / j)``.

    Examples
    --------
    >>> benjamini_hochberg([0.01, 0.04, 0.03]).round(3).tolist()
    [0.03, 0.04, 0.04]
    """
    p = _pvalues(pvalues)
    m = p.size
    if m == 0:
        return p.copy()
    order = np.argsort(p, kind="stable")
    scaled = m * p[order] / np.arange(1, m + 1)
    adjusted = np.minimum(1.0, np.minimum.accumulate(scaled[::-1])[::-1])
    out = np.empty(m)
    out[order] = adjusted
    return out


def adjust(pvalues: object, method: Correction) -> np.ndarray:
    """Adjusted p-values by ``"holm"`` or ``"bh"`` (Benjamini–Hochberg)."""
    if method == "holm":
        return holm(pvalues)
    if method == "bh":
        return benjamini_hochberg(pvalues)
    raise ValueError(f"method must be one of {', '.join(CORRECTIONS)}, got {method!r}")
