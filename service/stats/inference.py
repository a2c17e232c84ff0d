"""Confidence intervals and tests for a change in a quality metric, candidate minus baseline.

Functions
---------
paired_mean_change
    Mean of per-row (or per-group) differences on the same rows: paired t interval [1].
welch_mean_change
    Difference of two independent means: Welch's t with Satterthwaite's degrees of freedom [2].
normal_change
    An estimate with a known standard error (DeLong's AUC change): normal interval.
bootstrap_change
    Percentile interval from bootstrap replicates of the change [3] (see :mod:`.bootstrap`).
against_boundary
    One-sided p-values of the change against a boundary (a margin) in either direction [4].
minimum_detectable_effect
    The smallest true change a test of this precision detects with the stated power [5].

All intervals are two-sided at ``confidence``; "the lower bound above -margin" is then a
one-sided test at level ``(1 - confidence) / 2``, the usual convention for non-inferiority [4].
For the sample sizes a gate sees (thousands of rows) the t intervals are the normal
approximation; the t form is kept so small samples are not over-confident.

References
----------
1. Student (1908). The probable error of a mean. Biometrika 6(1), 1–25.
2. Welch, B. L. (1947). The generalization of "Student's" problem when several different
   population variances are involved. Biometrika 34(1–2), 28–35; Satterthwaite, F. E. (1946).
   An approximate distribution of estimates of variance components. Biometrics Bulletin 2(6).
3. Efron, B. & Tibshirani, R. J. (1993). An Introduction to the Bootstrap. Chapman & Hall,
   chapters 13 (percentile interval) and 16 (bootstrap tests).
4. Wellek, S. (2010). Testing Statistical Hypotheses of Equivalence and Noninferiority, 2nd ed.
   CRC Press, chapter 2; Piaggio, G. et al. (2012). Reporting of noninferiority and equivalence
   randomized trials. JAMA 308(24), 2594–2604.
5. Cohen, J. (1988). Statistical Power Analysis for the Behavioral Sciences, 2nd ed.
   (``MDE = (z_{1-alpha/2} + z_{power}) * SE``.)
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import stats as sps

from service.stats.validation import finite_1d


@dataclass(frozen=True)
class ChangeTest:
    """A change (candidate minus baseline, in the metric's units) with its uncertainty.

    ``df`` is the t distribution's degrees of freedom (None: normal; bootstrap: None and the
    ``replicates`` hold the bootstrap distribution of the change).
    """

    estimate: float
    se: float
    interval: tuple[float, float]
    confidence: float
    #: Two-sided p-value of "no change".
    pvalue: float
    method: str
    n_candidate: int
    n_baseline: int
    df: float | None = None
    replicates: np.ndarray | None = field(default=None, repr=False, compare=False)


def check_confidence(confidence: float) -> float:
    if not 0.5 <= confidence < 1.0:
        raise ValueError(f"confidence must be in [0.5, 1), got {confidence!r}")
    return float(confidence)


def _quantile(confidence: float, df: float | None) -> float:
    level = 0.5 + confidence / 2.0
    return float(sps.norm.ppf(level) if df is None else sps.t.ppf(level, df))


def _sf(x: float, df: float | None) -> float:
    return float(sps.norm.sf(x) if df is None else sps.t.sf(x, df))


def _from_se(
    estimate: float,
    se: float,
    confidence: float,
    df: float | None,
    method: str,
    n_candidate: int,
    n_baseline: int,
) -> ChangeTest:
    q = _quantile(confidence, df)
    if se > 0:
        pvalue = min(1.0, 2.0 * _sf(abs(estimate) / se, df))
    else:
        pvalue = 1.0 if estimate == 0 else 0.0
    return ChangeTest(
        estimate=float(estimate),
        se=float(se),
        interval=(float(estimate - q * se), float(estimate + q * se)),
        confidence=confidence,
        pvalue=pvalue,
        method=method,
        n_candidate=n_candidate,
        n_baseline=n_baseline,
        df=df,
    )


def paired_mean_change(differences: object, *, confidence: float = 0.95) -> ChangeTest:
    """Mean of paired differences ``d_i = candidate_i - baseline_i`` with a t interval [1].

    Parameters
    ----------
    differences : array_like
        Finite per-row (or per-group) differences; at least 2.
    confidence : float, default 0.95
        Two-sided confidence of the interval.

    Returns
    -------
    ChangeTest
        ``se = sd(d) / sqrt(n)``, ``df = n - 1``; the p-value equals
        ``scipy.stats.ttest_rel(candidate, baseline).pvalue``.
    """
    confidence = check_confidence(confidence)
    d = finite_1d(differences, "differences", min_size=2)
    n = d.size
    se = float(np.std(d, ddof=1)) / math.sqrt(n)
    return _from_se(float(d.mean()), se, confidence, float(n - 1), "paired-t", n, n)


def welch_mean_change(
    candidate: object, baseline: object, *, confidence: float = 0.95
) -> ChangeTest:
    """Difference of independent means, candidate minus baseline, by Welch's t [2].

    ``se = sqrt(s_c²/n_c + s_b²/n_b)``; degrees of freedom by Satterthwaite's formula. The
    p-value equals ``scipy.stats.ttest_ind(candidate, baseline, equal_var=False).pvalue``.
    """
    confidence = check_confidence(confidence)
    c = finite_1d(candidate, "candidate", min_size=2)
    b = finite_1d(baseline, "baseline", min_size=2)
    vc = float(np.var(c, ddof=1)) / c.size
    vb = float(np.var(b, ddof=1)) / b.size
    se = math.sqrt(vc + vb)
    if vc + vb > 0:
        df = (vc + vb) ** 2 / (vc**2 / (c.size - 1) + vb**2 / (b.size - 1))
    else:
        df = float(c.size + b.size - 2)
    estimate = float(c.mean() - b.mean())
    return _from_se(estimate, se, confidence, float(df), "welch-t", c.size, b.size)


def normal_change(
    estimate: float,
    se: float,
    *,
    confidence: float = 0.95,
    method: str,
    n_candidate: int,
    n_baseline: int,
) -> ChangeTest:
    """An estimate with a standard error from elsewhere (e.g. DeLong), normal interval."""
    confidence = check_confidence(confidence)
    if not (math.isfinite(estimate) and math.isfinite(se) and se >= 0):
        raise ValueError(f"estimate and se must be finite with se >= 0, got {estimate}, {se}")
    return _from_se(estimate, se, confidence, None, method, n_candidate, n_baseline)


def bootstrap_change(
    estimate: float,
    replicates: object,
    *,
    confidence: float = 0.95,
    method: str,
    n_candidate: int,
    n_baseline: int,
) -> ChangeTest:
    """Percentile interval of a change from its bootstrap replicates [3], ch. 13.

    ``se`` is the replicates' standard deviation; the p-value of "no change" is twice the
    smaller share of replicates on either side of 0 (with the ``+1`` correction of [3], ch. 16).
    Non-finite replicates (a resample without positives has no AUC) are dropped; more than 10%
    of them raises ValueError.
    """
    confidence = check_confidence(confidence)
    reps = np.asarray(replicates, dtype=np.float64).ravel()
    usable = np.isfinite(reps)
    # A resample can lack a class (no positives: no AUC); drop those, but not too many.
    if usable.sum() < max(2, 0.9 * reps.size):
        raise ValueError(
            f"only {int(usable.sum())} of {reps.size} bootstrap resamples gave a finite value; "
            "the sample is too small for this statistic"
        )
    reps = reps[usable]
    alpha = 1.0 - confidence
    low, high = np.quantile(reps, [alpha / 2.0, 1.0 - alpha / 2.0])
    b = reps.size
    below = (1 + int(np.count_nonzero(reps <= 0.0))) / (b + 1)
    above = (1 + int(np.count_nonzero(reps >= 0.0))) / (b + 1)
    return ChangeTest(
        estimate=float(estimate),
        se=float(np.std(reps, ddof=1)),
        interval=(float(low), float(high)),
        confidence=confidence,
        pvalue=min(1.0, 2.0 * min(below, above)),
        method=method,
        n_candidate=n_candidate,
        n_baseline=n_baseline,
        df=None,
        replicates=reps,
    )


@dataclass(frozen=True)
class BoundaryTest:
    """One-sided p-values of ``gain`` against a boundary, where ``gain = sign * change``.

    ``p_above`` tests H0 "gain <= boundary" (small: the gain is shown above the boundary);
    ``p_below`` tests H0 "gain >= boundary" (small: the gain is shown below it).
    """

    boundary: float
    p_above: float
    p_below: float


def against_boundary(test: ChangeTest, boundary: float, *, sign: float = 1.0) -> BoundaryTest:
    """One-sided tests of the oriented change ``sign * estimate`` against *boundary* [4].

    ``sign`` is +1 when a higher metric is better (AUC, NDCG) and -1 when lower is better (log
    loss), so a positive gain is always an improvement. Bootstrap changes use the share of
    replicates on the wrong side of the boundary ([3], ch. 16, with the ``+1`` correction).
    """
    if sign not in (1.0, -1.0):
        raise ValueError(f"sign must be 1 or -1, got {sign!r}")
    gain = sign * test.estimate
    if test.replicates is not None:
        reps = sign * test.replicates
        b = reps.size
        p_above = (1 + int(np.count_nonzero(reps <= boundary))) / (b + 1)
        p_below = (1 + int(np.count_nonzero(reps >= boundary))) / (b + 1)
    elif test.se > 0:
        t = (gain - boundary) / test.se
        p_above = _sf(t, test.df)
        p_below = _sf(-t, test.df)
    else:
        p_above = 0.0 if gain > boundary else 1.0
        p_below = 0.0 if gain < boundary else 1.0
    return BoundaryTest(boundary=float(boundary), p_above=float(p_above), p_below=float(p_below))


def oriented_interval(test: ChangeTest, sign: float) -> tuple[float, float]:
    """The interval of ``sign * change`` (swapped when sign is -1)."""
    low, high = test.interval
    return (low, high) if sign > 0 else (-high, -low)


def minimum_detectable_effect(se: float, *, confidence: float = 0.95, power: float = 0.8) -> float:
    """Smallest true change a two-sided test at ``1 - confidence`` detects with *power* [5].

    ``MDE = (z_{(1+confidence)/2} + z_{power}) * se``. With the standard error of this sample,
    it says how large a regression must be before this check can see it.

    Examples
    --------
    >>> round(minimum_detectable_effect(0.001, confidence=0.95, power=0.8), 5)
    0.0028
    """
    confidence = check_confidence(confidence)
    if not 0.0 < power < 1.0:
        raise ValueError(f"power must be in (0, 1), got {power!r}")
    if not (math.isfinite(se) and se >= 0):
        raise ValueError(f"se must be finite and >= 0, got {se!r}")
    return float((sps.norm.ppf(0.5 + confidence / 2.0) + sps.norm.ppf(power)) * se)
