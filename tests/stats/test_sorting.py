"""The sort order from one sort of 64-bit keys (service.stats.sorting) against numpy's own
``argsort`` and ``sort``: the same sorted values, exactly, on every kind of column."""

from __future__ import annotations

import numpy as np
import pytest

from service.stats.sorting import MIN_ROWS, order_and_sorted


def columns() -> dict[str, np.ndarray]:
    rng = np.random.default_rng(20261202)
    n = 3 * MIN_ROWS
    near = np.full(n, 0.5)
    # Neighbours one unit in the last place apart: closer than the keys' kept precision, so
    # the runs are put in order by value after the key sort.
    near += np.arange(n) % 7 * np.finfo(np.float64).eps * (rng.random(n) < 0.5)
    with_nan = rng.random(n)
    with_nan[::1000] = np.nan
    return {
        "uniform": rng.random(n),
        "normal with negatives": rng.normal(size=n),
        "rounded (many ties)": np.round(rng.random(n), 3),
        "signed zeros": rng.choice([-0.0, 0.0, 1.0, -1.0], size=n),
        "near-equal": rng.permutation(near),
        "large and tiny": rng.choice([1e300, -1e300, 5e-324, -5e-324, 0.0], size=n),
        "with NaN": with_nan,
        "short": rng.random(100),
    }


@pytest.mark.parametrize("name", list(columns()))
def test_same_sorted_values_as_numpy(name: str) -> None:
    values = columns()[name]
    order, ordered = order_and_sorted(values)
    # numpy.sort is the reference (NaN last, as numpy.argsort puts it).
    assert np.array_equal(ordered, np.sort(values), equal_nan=True)
    assert np.array_equal(values[order], ordered, equal_nan=True)
    assert np.array_equal(np.sort(order), np.arange(values.size))  # a permutation


def test_orders_a_signed_column_like_argsort() -> None:
    values = columns()["normal with negatives"]  # no ties: the order is unique
    order, _ = order_and_sorted(values)
    assert np.array_equal(order, np.argsort(values))
