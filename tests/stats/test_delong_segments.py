"""DeLong per segment value from one sort equals DeLong on each value's rows alone."""

from __future__ import annotations

import numpy as np
import pytest

from service.stats.auc import delong_paired
from service.stats.delong_segments import delong_paired_by_value


@pytest.mark.parametrize("decimals", [None, 1])
def test_equals_delong_on_each_value(decimals: int | None) -> None:
    rng = np.random.default_rng(3)
    n, values = 5000, 4
    codes = rng.integers(0, values, n)
    y = rng.random(n) < 0.3
    a = rng.normal(size=n) + y + 0.2 * codes
    b = a + rng.normal(0, 0.6, n)
    if decimals is not None:
        a, b = np.round(a, decimals), np.round(b, decimals)
    ties = (decimals is not None, decimals is not None)
    results = delong_paired_by_value(
        y, a, b, (np.argsort(a), np.argsort(b)), codes, values, ties=ties
    )
    for v, result in enumerate(results):
        rows = codes == v
        ref = delong_paired(y[rows], a[rows], b[rows])  # the direct test on the value's rows
        assert not isinstance(result, str)
        assert result.candidate == pytest.approx(ref.candidate, abs=1e-12)
        assert result.difference == pytest.approx(ref.difference, abs=1e-12)
        assert result.se == pytest.approx(ref.se, rel=1e-9)
        assert result.pvalue == pytest.approx(ref.pvalue, rel=1e-8, abs=1e-300)
        assert (result.n_positive, result.n_negative) == (ref.n_positive, ref.n_negative)


def test_a_value_without_both_classes_is_reported() -> None:
    codes = np.array([0, 0, 0, 1, 1, 1])
    y = np.array([True, False, True, False, False, False])
    s = np.array([0.9, 0.1, 0.8, 0.3, 0.2, 0.4])
    out = delong_paired_by_value(
        y, s, s[::-1].copy(), (np.argsort(s), np.argsort(s[::-1])), codes, 2
    )
    assert not isinstance(out[0], str)
    assert isinstance(out[1], str) and "needs both classes" in out[1]
