"""Robust location and scale (service.stats.robust) against reference libraries and sources."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats as sps
from scipy.stats import mstats

from service.stats import robust


@pytest.mark.parametrize("seed", [1, 2, 3])
@pytest.mark.parametrize("scale", [1.0, "normal", 2.5])
def test_mad_matches_scipy(seed: int, scale: object) -> None:
    # Reference: scipy.stats.median_abs_deviation (same ``scale`` convention).
    x = np.random.default_rng(seed).standard_t(3, size=501)
    expected = sps.median_abs_deviation(x, scale=scale)
    assert robust.median_abs_deviation(x, scale=scale) == pytest.approx(expected, rel=1e-12)


def test_normal_consistency_constant() -> None:
    # Rousseeuw & Croux (1993): 1 / Phi^-1(3/4) = 1.4826; scipy's "normal" scale is the same.
    assert robust.MAD_TO_SIGMA == pytest.approx(1.482602218505602, rel=1e-12)
    assert robust.MAD_TO_SIGMA == pytest.approx(1.0 / sps.norm.ppf(0.75), rel=1e-12)
    # Geary (1935): E|X - mu| = sigma sqrt(2/pi) for a normal X, so sqrt(pi/2) = 1.2533.
    assert robust.MEANAD_TO_SIGMA == pytest.approx(1.2533141373155, rel=1e-12)


@pytest.mark.parametrize("seed", [4, 5])
def test_robust_z_is_the_modified_z_score(seed: int) -> None:
    # Iglewicz & Hoaglin (1993): M = 0.6745 (x - median) / MAD; computed here with scipy's MAD.
    history = np.random.default_rng(seed).lognormal(size=60)
    value = 9.0
    mad = sps.median_abs_deviation(history)  # raw MAD
    expected = sps.norm.ppf(0.75) * (value - np.median(history)) / mad
    result = robust.robust_z(value, history)
    assert result.source == "mad"
    assert result.z == pytest.approx(expected, rel=1e-12)
    assert result.scale == pytest.approx(sps.median_abs_deviation(history, scale="normal"))


def test_robust_z_ignores_outliers_in_history() -> None:
    # The median and MAD have a 50 % breakdown point (Hampel 1974): two wild values in the
    # history leave the z-score of a value as it was.
    clean = np.arange(1.0, 21.0)
    dirty = np.concatenate([clean[:-2], [1e6, 1e7]])
    z_clean = robust.robust_z(25.0, clean).z
    z_dirty = robust.robust_z(25.0, dirty).z
    assert z_dirty == pytest.approx(z_clean, rel=0.15)
    # ... whereas a classical z-score is ruined by them.
    classical = (25.0 - dirty.mean()) / dirty.std()
    assert classical < 0


def test_mean_absolute_deviation_fallback_when_mad_is_zero() -> None:
    # More than half the values equal: MAD = 0, so Iglewicz & Hoaglin's fallback
    # (x - median) / (1.253314 * MeanAD) applies.
    history = [5.0] * 7 + [6.0, 9.0]
    mean_ad = np.mean(np.abs(np.array(history) - 5.0))  # = 5 / 9
    result = robust.robust_z(7.0, history)
    assert result.source == "meanad"
    assert result.z == pytest.approx(2.0 / (1.2533141373155 * mean_ad), rel=1e-9)


def test_constant_history_gives_infinite_z_for_any_other_value() -> None:
    assert robust.robust_z(3.0, [3.0, 3.0, 3.0]).z == 0.0
    assert robust.robust_z(3.1, [3.0, 3.0, 3.0]).z == math.inf
    assert robust.robust_z(2.9, [3.0, 3.0, 3.0]).z == -math.inf


def test_hampel_limit_both_sides() -> None:
    history = np.random.default_rng(6).normal(10.0, 2.0, size=40)
    sigma = sps.median_abs_deviation(history, scale="normal")
    median = np.median(history)
    assert robust.hampel_limit(history, k=3.0) == pytest.approx(median + 3.0 * sigma)
    assert robust.hampel_limit(history, k=3.0, side="lower") == pytest.approx(median - 3.0 * sigma)


@pytest.mark.parametrize("q", [0.5, 0.9, 0.99, 1.0])
def test_quantile_limit_is_hyndman_fan_definition_7(q: float) -> None:
    # Hyndman & Fan (1996) definition 7 is mquantiles with alphap = betap = 1.
    history = np.random.default_rng(8).exponential(size=37)
    expected = float(mstats.mquantiles(history, prob=[q], alphap=1, betap=1)[0])
    assert robust.quantile_limit(history, q=q) == pytest.approx(expected, rel=1e-12)
    lower = float(mstats.mquantiles(history, prob=[1 - q], alphap=1, betap=1)[0])
    assert robust.quantile_limit(history, q=q, side="lower") == pytest.approx(lower, rel=1e-12)


@pytest.mark.parametrize(
    ("call", "match"),
    [
        (lambda: robust.robust_scale([1.0, 2.0]), "at least 3"),
        (lambda: robust.robust_scale([1.0, 2.0, float("nan")]), "NaN or infinite"),
        (lambda: robust.robust_z(float("inf"), [1.0, 2.0, 3.0]), "value must be finite"),
        (lambda: robust.hampel_limit([1.0, 2.0, 3.0], k=0), "k must be a positive"),
        (lambda: robust.hampel_limit([1.0, 2.0, 3.0], k=3, side="both"), "side must be"),  # type: ignore[arg-type]
        (lambda: robust.quantile_limit([1.0], q=0.2), r"q must be a number in \[0.5, 1\]"),
        (lambda: robust.median_abs_deviation([1.0], scale=0), "scale must be"),
    ],
)
def test_bad_input_is_named(call: object, match: str) -> None:
    with pytest.raises(ValueError, match=match):
        call()  # type: ignore[operator]


def _qn_small_sample_factor(n: int) -> float:
    # Croux & Rousseeuw (1992), Computational Statistics 1:411, the d_n of Qn: a table for
    # n <= 9, n / (n + 1.4) for odd and n / (n + 3.8) for even n above 9.
    table = {2: 0.399, 3: 0.994, 4: 0.512, 5: 0.844, 6: 0.611, 7: 0.857, 8: 0.669, 9: 0.872}
    if n in table:
        return table[n]
    return n / (n + 1.4) if n % 2 else n / (n + 3.8)


@pytest.mark.parametrize("n", [2, 3, 5, 9, 10, 11, 20, 51, 200])
def test_qn_matches_statsmodels_times_the_small_sample_factor(n: int) -> None:
    # Reference: statsmodels.robust.scale.qn_scale (Rousseeuw & Croux 1993's Qn with the
    # consistency constant 2.2219 and no small-sample factor).
    from statsmodels.robust.scale import qn_scale as reference

    x = np.random.default_rng(n).standard_t(3, size=n)
    expected = float(reference(x)) * _qn_small_sample_factor(n)
    assert robust.qn_scale(x) == pytest.approx(expected, rel=1e-12)


def test_qn_consistency_constant() -> None:
    # Rousseeuw & Croux (1993): c = 1 / (sqrt(2) Phi^-1(5/8)) = 2.2219.
    assert robust.QN_TO_SIGMA == pytest.approx(2.21914, abs=1e-5)


def test_tail_limit_formula_against_scipy_and_statsmodels() -> None:
    # The prediction bound of Hahn & Meeker (1991), section 4.7, with the median and Qn in place
    # of the mean and standard deviation: median + t_{1-a, e(n-1)} * Qn * sqrt(1 + (pi/2)/n).
    from statsmodels.robust.scale import qn_scale as reference

    x = np.random.default_rng(11).normal(3.0, 0.5, size=40)
    level = 1e-3
    scale = float(reference(x)) * _qn_small_sample_factor(40)
    df = 0.8227 * 39  # Rousseeuw & Croux (1993), Table 1: Gaussian efficiency of Qn 82.27 %
    expected = np.median(x) + sps.t.ppf(1 - level, df) * scale * math.sqrt(1 + math.pi / 80)
    fit = robust.tail_limit(x, level=level)
    assert fit.source == "qn"
    assert fit.limit == pytest.approx(expected, rel=1e-12)
    low = robust.tail_limit(x, level=level, side="lower")
    assert low.limit == pytest.approx(2 * np.median(x) - expected, rel=1e-12)


@pytest.mark.parametrize("n", [20, 60])
def test_tail_limit_exceedance_matches_its_level_by_simulation(n: int) -> None:
    # Simulated: a new value from the history's own normal distribution exceeds the limit with
    # probability close to the level (the point of a prediction bound; Hahn & Meeker 1991).
    # 6,000 trials at level 0.02: binomial SE 0.18 %, so +-0.6 % is over 3 SE.
    rng = np.random.default_rng(20261202 + n)
    trials, level = 6000, 0.02
    histories = rng.normal(size=(trials, n))
    new = rng.normal(size=trials)
    exceed = sum(
        new[i] > robust.tail_limit(histories[i], level=level).limit  # type: ignore[operator]
        for i in range(trials)
    )
    assert abs(exceed / trials - level) < 0.006
    # The plain z bound with the same robust fit (no allowance for the fit's own noise) exceeds
    # its level clearly at n = 20: why the t quantile is there.
    if n == 20:
        naive = sum(
            new[i]
            > np.median(histories[i]) + sps.norm.ppf(1 - level) * robust.qn_scale(histories[i])
            for i in range(trials)
        )
        assert naive / trials > 1.3 * level


def test_tail_limit_of_a_history_without_spread_is_none() -> None:
    fit = robust.tail_limit([2.0] * 10, level=0.01)
    assert fit.limit is None and fit.source == "none"
    with pytest.raises(ValueError, match="level"):
        robust.tail_limit([1.0, 2.0, 3.0], level=0.7)
