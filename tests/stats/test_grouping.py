"""Codes of text columns: both routes equal numpy.unique; a hash collision is caught."""

from __future__ import annotations

import numpy as np
import pytest

from service.stats import grouping
from service.stats.grouping import factorize


@pytest.mark.parametrize("distinct", [2, 15, 400])
def test_factorize_matches_numpy_unique(distinct: int) -> None:
    rng = np.random.default_rng(distinct)
    column = np.array([f"v{i}" for i in rng.integers(0, distinct, 5000)], dtype=object)
    codes = factorize(column)
    values, inverse = np.unique(column, return_inverse=True)  # numpy.unique (sorted)
    assert list(codes.values) == list(values)
    np.testing.assert_array_equal(codes.codes, inverse.ravel())


def test_unsorted_values_still_code_exactly() -> None:
    column = np.array(["b", "a", "c", "a"] * 10 + [f"x{i}" for i in range(30)], dtype=object)
    codes = factorize(column, sort_values=False)
    assert np.all(np.array(codes.values, dtype=object)[codes.codes] == column)


def test_hash_collision_falls_back_to_exact_codes(monkeypatch: pytest.MonkeyPatch) -> None:
    column = np.array([f"id{i % 50}" for i in range(400)], dtype=object)
    monkeypatch.setattr(grouping, "hash", lambda _: 7, raising=False)  # every value collides
    codes = factorize(column)
    assert codes.n_values == 50
    assert np.all(np.array(codes.values, dtype=object)[codes.codes] == column)
