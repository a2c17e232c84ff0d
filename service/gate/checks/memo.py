"""Results the checks of one evaluation share, remembered while their input array lives.

Several checks look at the same sample columns: the AUC check and the Spearman check need the
score's sort order, PSI, KS, Anderson–Darling, Wasserstein, Jensen–Shannon and the health
check's saturation need its sorted values; every segmented check codes the same segment
columns. Sorting a million scores or coding a million strings costs tens of milliseconds each,
so the first check to need one stores it here and the others reuse it: one sort per column per
evaluation (:func:`order_of` and :func:`sorted_of` share it), whatever the policy holds.

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
from service.stats.sorting import order_and_sorted

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


def known(array: np.ndarray, what: str) -> bool:
    """Whether a result for this *array* and *what* is remembered."""
    hit = _MEMO.get((id(array), what))
    return hit is not None and hit[0]() is array


def _sort(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    return remembered(values, "sort", lambda: order_and_sorted(values))


def order_of(values: np.ndarray) -> np.ndarray:
    """The ascending sort order of *values* (any order among ties); see
    :func:`service.stats.sorting.order_and_sorted`. Its sorted values come with it."""
    return _sort(values)[0]


def sorted_with_order(values: np.ndarray) -> np.ndarray:
    """``np.sort(values)``, computing and remembering the sort order with it (for a column
    whose order later checks are likely to need: the score)."""
    return _sort(values)[1]


def sorted_of(values: np.ndarray) -> np.ndarray:
    """``np.sort(values)``: from the remembered sort order when a check asked for it, else
    sorted once (and remembered) without it."""
    if known(values, "sort"):
        return _sort(values)[1]
    return remembered(values, "sorted", lambda: np.sort(values))


def finite_rows(columns: list[np.ndarray]) -> np.ndarray | None:
    """Indices of the rows finite in every column, or None when every row is."""
    ok = np.isfinite(columns[0])
    for column in columns[1:]:
        ok &= np.isfinite(column)
    return None if bool(ok.all()) else np.flatnonzero(ok)


def take(values: np.ndarray, rows: np.ndarray | None) -> np.ndarray:
    """``values[rows]``; the array itself (so memo entries apply) when *rows* is None."""
    return values if rows is None else values[rows]
