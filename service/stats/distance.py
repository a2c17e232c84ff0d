"""More distances between a baseline sample and a candidate sample.

Functions
---------
jensen_shannon
    Jensen–Shannon distance on the baseline's quantile bins [1], with a G-test p-value [2].
wasserstein
    Wasserstein-1 (earth mover's) distance divided by the baseline's spread [3].
anderson_ksamp
    Anderson–Darling k-sample test, midrank version for ties [4], [5].
mean_shift, quantile_shift
    Standardised mean difference (Welch p-value) and the largest quantile difference.

References
----------
1. Lin, J. (1991). Divergence measures based on the Shannon entropy. IEEE Transactions on
   Information Theory 37(1), 145–151.
2. Sokal, R. R. & Rohlf, F. J. (1995). Biometry, 3rd ed. Freeman, §17.6 (G-test of
   independence for an R x C table).
3. Vallender, S. S. (1974). Calculation of the Wasserstein distance between probability
   distributions on the line. Theory of Probability and its Applications 18(4), 784–786.
4. Scholz, F. W. & Stephens, M. A. (1987). K-sample Anderson–Darling tests. Journal of the
   American Statistical Association 82(399), 918–924.
5. Marsaglia, G. & Marsaglia, J. (2004). Evaluating the Anderson–Darling distribution.
   Journal of Statistical Software 9(2).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np
from scipy import stats as sps

from service.stats.drift import binned_counts, quantile_edges
from service.stats.validation import finite_1d

Spread = Literal["std", "iqr"]


@dataclass(frozen=True)
class DistanceResult:
    statistic: float
    pvalue: float | None


@dataclass(frozen=True)
class BinnedDistance:
    """A binned distance with the shares it was computed from."""

    statistic: float
    pvalue: float
    edges: tuple[float, ...]
    baseline_share: tuple[float, ...]
    candidate_share: tuple[float, ...]


def _shared_bins(
    base: np.ndarray, cand: np.ndarray, bins: int, presorted: bool = False
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    if not presorted:
        base = np.sort(base)
    edges = quantile_edges(base, bins)
    base_counts = binned_counts(base, edges, presorted=True)
    cand_counts = binned_counts(cand, edges, presorted=presorted)
    return edges, base_counts.astype(np.float64), cand_counts.astype(np.float64)


def jensen_shannon(
    baseline: object, candidate: object, *, bins: int = 10, presorted: bool = False
) -> BinnedDistance:
    """Jensen–Shannon distance between the binned distributions, base-2 logarithms [1].

    Parameters
    ----------
    baseline, candidate : array_like
        Finite values; each needs at least ``bins`` values.
    bins : int, default 10
        Equal-mass bins cut at the baseline's quantiles (the same bins as PSI), shared by both.
    presorted : bool, default False
        Both are already in ascending order (skips the sorts; same result).

    Returns
    -------
    BinnedDistance
        ``statistic = sqrt(JSD)`` with ``JSD = (KL(P||M) + KL(Q||M)) / 2``, ``M = (P + Q) / 2``,
        between 0 (same shares) and 1 (no bin in common); equal to
        ``scipy.spatial.distance.jensenshannon(P, Q, base=2)``. ``pvalue`` is the G-test of
        homogeneity of the 2 x B table of counts, ``G ~ chi2(B - 1)`` under no change [2].
    """
    if not isinstance(bins, int) or not 2 <= bins <= 1000:
        raise ValueError(f"bins must be an integer from 2 to 1000, got {bins!r}")
    base = finite_1d(baseline, "baseline", min_size=bins)
    cand = finite_1d(candidate, "candidate", min_size=bins)
    edges, bc, cc = _shared_bins(base, cand, bins, presorted)
    p = bc / bc.sum()
    q = cc / cc.sum()
    m = 0.5 * (p + q)

    def kl(a: np.ndarray) -> float:
        nz = a > 0
        return float(np.sum(a[nz] * np.log2(a[nz] / m[nz])))

    jsd = 0.5 * kl(p) + 0.5 * kl(q)
    # G-test on the bins that hold any value (an all-empty column carries no information).
    used = (bc + cc) > 0
    table = np.vstack([bc[used], cc[used]])
    expected = table.sum(axis=1, keepdims=True) * table.sum(axis=0, keepdims=True) / table.sum()
    nz = table > 0
    g = 2.0 * float(np.sum(table[nz] * np.log(table[nz] / expected[nz])))
    dof = max(int(used.sum()) - 1, 1)
    return BinnedDistance(
        statistic=math.sqrt(max(jsd, 0.0)),
        pvalue=float(sps.chi2.sf(g, dof)),
        edges=tuple(float(e) for e in edges),
        baseline_share=tuple(float(x) for x in p),
        candidate_share=tuple(float(x) for x in q),
    )


def spread_of(values: np.ndarray, spread: Spread) -> float:
    """The baseline's spread: standard deviation (ddof=1) or interquartile range."""
    if spread == "std":
        value = float(np.std(values, ddof=1)) if values.size > 1 else 0.0
    elif spread == "iqr":
        q1, q3 = np.quantile(values, [0.25, 0.75])
        value = float(q3 - q1)
    else:
        raise ValueError(f"spread must be 'std' or 'iqr', got {spread!r}")
    if not value > 0:
        raise ValueError(f"the baseline's {spread} is 0: a normalised distance is undefined")
    return value


def wasserstein(
    baseline: object, candidate: object, *, spread: Spread = "std", presorted: bool = False
) -> DistanceResult:
    """Wasserstein-1 distance divided by the baseline's spread [3].

    ``W1 = integral |F(x) - G(x)| dx`` between the two empirical distribution functions, the
    same value as ``scipy.stats.wasserstein_distance``; divided by the baseline's standard
    deviation (``spread="std"``, ddof=1) or interquartile range (``"iqr"``), so 0.1 means "the
    mass moved a tenth of the baseline's spread on average", whatever the score's scale.
    No p-value (None). ``presorted=True`` says both are already in ascending order (skips
    the sorts; same result).
    """
    base = finite_1d(baseline, "baseline", min_size=2)
    cand = finite_1d(candidate, "candidate")
    if not presorted:
        base, cand = np.sort(base), np.sort(cand)
    scale = spread_of(base, spread)
    # Two sorted runs: a stable sort (timsort) merges them in linear time.
    grid = np.sort(np.concatenate([base, cand]), kind="stable")
    deltas = np.diff(grid)
    # Both ECDFs on each interval [grid_i, grid_i+1); the queries are sorted, so the binary
    # searches run in near-linear time.
    f = np.searchsorted(base, grid[:-1], side="right") / base.size
    g = np.searchsorted(cand, grid[:-1], side="right") / cand.size
    return DistanceResult(statistic=float(np.dot(np.abs(f - g), deltas)) / scale, pvalue=None)


# Scholz & Stephens [4], Table 2: t_m(alpha) = b0 + b1 / sqrt(m) + b2 / m, m = k - 1.
_AD_SIG = np.array([0.25, 0.1, 0.05, 0.025, 0.01, 0.005, 0.001])
_AD_B0 = np.array([0.675, 1.281, 1.645, 1.96, 2.326, 2.573, 3.085])
_AD_B1 = np.array([-0.245, 0.25, 0.678, 1.149, 1.822, 2.364, 3.615])
_AD_B2 = np.array([-0.105, -0.305, -0.362, -0.391, -0.396, -0.345, -0.154])


@dataclass(frozen=True)
class ADResult:
    """``statistic`` is the standardised ``T = (A2akN - (k - 1)) / sigma_N`` of [4]."""

    statistic: float
    pvalue: float
    a2: float
    #: How the p-value was found: "interpolated" ([4], Table 2), "asymptotic" ([5], k = 2
    #: outside the table) or "bounded" (k > 2 outside the table: the table's end value).
    pvalue_method: str


def _ad_inf_cdf(z: float) -> float:
    """CDF of the limiting Anderson–Darling distribution, Marsaglia & Marsaglia [5], ADinf."""
    if z <= 0:
        return 0.0
    if z < 2.0:
        return (
            math.exp(-1.2337141 / z)
            / math.sqrt(z)
            * (
                2.00012
                + (0.247105 - (0.0649821 - (0.0347962 - (0.011672 - 0.00168691 * z) * z) * z) * z)
                * z
            )
        )
    return math.exp(
        -math.exp(
            1.0776 - (2.30695 - (0.43424 - (0.082433 - (0.008056 - 0.0003146 * z) * z) * z) * z) * z
        )
    )


def anderson_ksamp(*samples: object, presorted: bool = False) -> ADResult:
    """Anderson–Darling k-sample test, midrank form ``A2akN`` for ties (eq. 7 of [4]).

    Parameters
    ----------
    *samples : array_like
        Two or more samples of finite values; more than one distinct value overall.
    presorted : bool, default False
        Every sample is already in ascending order (skips their sorts; same result).

    Returns
    -------
    ADResult
        ``statistic`` and ``a2`` equal ``scipy.stats.anderson_ksamp(samples,
        variant="midrank")``'s statistic and ``A2akN``. The p-value interpolates log
        significance on the critical values of [4] (as scipy does) inside their range,
        0.001 to 0.25. Outside it, for two samples the limiting distribution of ``A2akN`` is
        the one-sample Anderson–Darling limit, evaluated as in [5]; for more samples the
        p-value is the table's end value (0.001 or 0.25) and ``pvalue_method`` says "bounded".

    Notes
    -----
    O(N log N) for N pooled values: one sort, then binary searches with sorted queries. The
    statistic is a test statistic, not an effect size: it grows with n for any fixed shift.
    """
    if len(samples) < 2:
        raise ValueError("anderson_ksamp needs at least two samples")
    arrays = [finite_1d(s, f"sample {i + 1}") for i, s in enumerate(samples)]
    if not presorted:
        arrays = [np.sort(a) for a in arrays]
    k = len(arrays)
    n = np.array([a.size for a in arrays], dtype=np.float64)
    # Sorted runs: a stable sort (timsort) merges them in linear time.
    z = np.sort(np.concatenate(arrays), kind="stable")
    total = z.size
    big_n = float(total)
    new = np.empty(total, dtype=bool)
    new[0] = True
    np.not_equal(z[1:], z[:-1], out=new[1:])
    starts = np.flatnonzero(new)
    if starts.size < 2:
        raise ValueError("anderson_ksamp needs more than one distinct value")
    zstar = z[starts]
    lj = np.diff(np.append(starts, total)).astype(np.float64)
    bj = starts + lj / 2.0
    a2 = 0.0
    denominator = bj * (big_n - bj) - big_n * lj / 4.0
    for i, s in enumerate(arrays):
        right = np.searchsorted(s, zstar, side="right")
        left = np.searchsorted(s, zstar, side="left")
        mij = right - (right - left) / 2.0
        inner = lj / big_n * (big_n * mij - bj * n[i]) ** 2 / denominator
        a2 += float(inner.sum()) / n[i]
    a2 *= (big_n - 1.0) / big_n
    # Variance of A2akN under the null, [4] eq. 4-5.
    h_big = float((1.0 / n).sum())
    hs_cs = np.cumsum(1.0 / np.arange(total - 1, 1, -1, dtype=np.float64))
    h = float(hs_cs[-1]) + 1.0 if hs_cs.size else 1.0
    g = float((hs_cs / np.arange(2, total, dtype=np.float64)).sum())
    a = (4 * g - 6) * (k - 1) + (10 - 6 * g) * h_big
    b = (2 * g - 4) * k**2 + 8 * h * k + (2 * g - 14 * h - 4) * h_big - 8 * h + 4 * g - 6
    c = (6 * h + 2 * g - 2) * k**2 + (4 * h - 4 * g + 6) * k + (2 * h - 6) * h_big + 4 * h
    d = (2 * h + 6) * k**2 - 4 * h * k
    sigmasq = (a * big_n**3 + b * big_n**2 + c * big_n + d) / (
        (big_n - 1.0) * (big_n - 2.0) * (big_n - 3.0)
    )
    m = k - 1
    t = (a2 - m) / math.sqrt(sigmasq)
    critical = _AD_B0 + _AD_B1 / math.sqrt(m) + _AD_B2 / m
    if critical.min() <= t <= critical.max():
        fit = np.polyfit(critical, np.log(_AD_SIG), 2)
        pvalue, how = math.exp(float(np.polyval(fit, t))), "interpolated"
    elif k == 2:
        pvalue, how = 1.0 - _ad_inf_cdf(a2), "asymptotic"
    else:
        pvalue, how = (0.25 if t < critical.min() else 0.001), "bounded"
    return ADResult(
        statistic=float(t), pvalue=float(min(max(pvalue, 0.0), 1.0)), a2=a2, pvalue_method=how
    )


def mean_shift(baseline: object, candidate: object, *, spread: Spread = "std") -> DistanceResult:
    """``|mean(candidate) - mean(baseline)|`` over the baseline's spread; Welch t p-value [2]."""
    base = finite_1d(baseline, "baseline", min_size=2)
    cand = finite_1d(candidate, "candidate", min_size=2)
    scale = spread_of(base, spread)
    diff = float(cand.mean() - base.mean())
    se = math.sqrt(
        float(np.var(cand, ddof=1)) / cand.size + float(np.var(base, ddof=1)) / base.size
    )
    if se > 0:
        vc = float(np.var(cand, ddof=1)) / cand.size
        vb = float(np.var(base, ddof=1)) / base.size
        df = (vc + vb) ** 2 / (vc**2 / (cand.size - 1) + vb**2 / (base.size - 1))
        pvalue = float(2.0 * sps.t.sf(abs(diff) / se, df))
    else:
        pvalue = 1.0 if diff == 0 else 0.0
    return DistanceResult(statistic=abs(diff) / scale, pvalue=pvalue)


#: Quantile levels compared by :func:`quantile_shift`.
SHIFT_LEVELS = (0.01, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.99)


def quantile_shift(
    baseline: object, candidate: object, *, spread: Spread = "std"
) -> tuple[DistanceResult, dict[str, float]]:
    """Largest ``|Q_c(q) - Q_b(q)|`` over :data:`SHIFT_LEVELS`, over the baseline's spread.

    Returns the result (no p-value) and the per-level shifts (signed, same scale).
    """
    base = finite_1d(baseline, "baseline", min_size=2)
    cand = finite_1d(candidate, "candidate")
    scale = spread_of(base, spread)
    levels = np.array(SHIFT_LEVELS)
    shifts = (np.quantile(cand, levels) - np.quantile(base, levels)) / scale
    per_level = {f"q{level:g}": float(s) for level, s in zip(SHIFT_LEVELS, shifts, strict=True)}
    return DistanceResult(statistic=float(np.max(np.abs(shifts))), pvalue=None), per_level
