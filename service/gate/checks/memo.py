"""Results the checks of one evaluation share, remembered while their input array lives.

Several checks look at the same sample columns: the AUC check, the Spearman check and the KS
check all sort the score; every segmented check codes the same segment columns. Sorting a
million scores or coding a million strings costs tens of milliseconds each, so the first check
to need one stores it here and the others reuse it.

Entries are keyed by the array object (``id`` plus a weak reference that must still point to
the same array), so they vanish with the sample and can never be confused with a later array
that reuses the address. Sample arrays are never modified after the store builds them; the
memo relies on that. Results are deterministic functions of the array, so the gate stays pure.
"""

from __future__ import annotations

import weakref
from collections.abc import Callable
from typing import Any, TypeVar

import numpy as np

from service.stats.grouping import Codes, factorize

T = TypeVar("T")

_MEMO: dict[tuple[int, str], tuple[weakref.ref[np.ndarray], Any]] = {}


def remembered(array: np.ndarray, what: str, compute: Callable[[], T]) -> T:
    """``compute()``, or its stored result for this *array* and *what*."""
    key = (id(array), what)
    hit = _MEMO.get(key)
    if hit is not None and hit[0]() is array:
        return hit[1]  # type: ignore[no-any-return]
    value = compute()

    def forget(_: object, key: tuple[int, str] = key) -> None:
        _MEMO.pop(key, None)

    _MEMO[key] = (weakref.ref(array, forget), value)
    return value


def codes_of(column: np.ndarray, name: str) -> Codes:
    """Codes of a text column (see :func:`service.stats.grouping.factorize`)."""
    return remembered(column, "codes", lambda: factorize(column, name))


def order_of(values: np.ndarray) -> np.ndarray:
    """``np.argsort(values)`` (any order among ties)."""
    return remembered(values, "argsort", lambda: np.argsort(values))


def finite_rows(columns: list[np.ndarray]) -> np.ndarray | None:
    """Indices of the rows finite in every column, or None when every row is."""
    ok = np.isfinite(columns[0])
    for column in columns[1:]:
        ok &= np.isfinite(column)
    return None if bool(ok.all()) else np.flatnonzero(ok)


def take(values: np.ndarray, rows: np.ndarray | None) -> np.ndarray:
    """``values[rows]``; the array itself (so memo entries apply) when *rows* is None."""
    return values if rows is None else values[rows]
