"""Input validation shared by the statistics modules."""

from __future__ import annotations

import numpy as np


def finite_1d(values: object, name: str, *, min_size: int = 1) -> np.ndarray:
    """*values* as a 1-D float64 array of finite numbers, or ValueError naming *name*."""
    array = np.asarray(values, dtype=np.float64)
    if array.ndim != 1:
        raise ValueError(f"{name} must be one-dimensional, got shape {array.shape}")
    if array.size < min_size:
        raise ValueError(f"{name} needs at least {min_size} value(s), got {array.size}")
    if not np.all(np.isfinite(array)):
        raise ValueError(f"{name} contains NaN or infinite values")
    return array
