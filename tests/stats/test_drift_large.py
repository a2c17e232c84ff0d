"""KS at large sample sizes: the limiting distribution stays within 1% of scipy's p-value."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats as sps

from service.stats.drift import KS_LIMIT_ABOVE, ks_2samp


@pytest.mark.parametrize("shift", [0.002, 0.004, 0.006])
def test_ks_limit_pvalue_is_close_to_scipy(shift: float) -> None:
    rng = np.random.default_rng(13)
    n = 2 * KS_LIMIT_ABOVE + 2_000  # en = n / 2 is above the switch
    x, y = rng.normal(size=n), rng.normal(shift, 1.0, size=n)
    ours = ks_2samp(x, y)
    ref = sps.ks_2samp(x, y, method="asymp")  # scipy.stats.ks_2samp, exact-n asymptotic
    assert ours.statistic == pytest.approx(ref.statistic, abs=1e-12)
    # Kolmogorov limit vs kstwo at en ~ 1e5: relative difference below 1% (measured 0.2-0.7%).
    assert ours.pvalue == pytest.approx(ref.pvalue, rel=0.01)
