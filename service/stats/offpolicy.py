"""Off-policy estimates of a policy's reward from logged exploration traffic.

A log holds one row per logged action: the observed ``reward``, the probability ``mu`` with
which the logging policy took that action in that context (``logging_propensity``, in (0, 1]),
and for each policy to evaluate the probability ``pi`` with which it would take the same action
(``candidate_propensity``, ``baseline_propensity``, in [0, 1]). The importance weight of a row
is ``w = pi / mu``. Estimators of the policy value ``V(pi) = E_x E_{a ~ pi}[r]``:

``ips``
    Inverse propensity scoring, ``mean(w r)`` [1]. Unbiased when ``mu > 0`` wherever
    ``pi > 0``.
``snips``
    Self-normalised IPS, ``sum(w r) / sum(w)`` [2]. Biased by O(1/n) (a ratio estimator [7]),
    usually far less variable than IPS; invariant to adding a constant to the reward.
``dr``
    Doubly robust, ``mean(g_pi + w (r - r_hat))`` with a reward model's prediction ``r_hat``
    for the logged action and its expectation ``g_pi = sum_a pi(a|x) r_hat(x, a)`` under the
    policy [3]. Unbiased when the propensities are right, whatever the reward model; less
    variable than IPS when the model is good.

Clipping (``max_weight = M``) replaces ``w`` by ``min(w, M)`` [4], [5]. It lowers the
variance and introduces a bias: for IPS, ``E[clipped] - V = -E_mu[(w - M)_+ r]``, so with
``|r| <= R`` the bias is at most ``R * E_mu[(w - M)_+]`` in size, and for rewards >= 0 the
clipped estimator is a lower bound in expectation ([5], section 4.5: the missing mass
``1 - E_mu[min(w, M)]``). For DR the same holds with ``r - r_hat`` in place of ``r``. The
estimated bound (``mean((w - M)_+) * max |r|``) is reported with every clipped estimate. For
SNIPS the clipped estimator targets the reward of the policy reweighted by ``min(w, M) / w``;
no bound of this form holds and none is reported.

Paired comparison: candidate and baseline are evaluated on the same logged rows. For IPS and DR
the change is the mean of per-row differences ``t_c - t_b`` and its standard error comes from
those differences (the pairing removes the shared noise of the rewards). For SNIPS the change
of the two ratios gets its standard error by the delta method: the influence of row i on a
ratio ``V = sum(w r) / sum(w)`` is ``w_i (r_i - V) / mean(w)`` [6], and the difference of the
two influences gives the standard error of the change. Intervals are normal
(:func:`service.stats.inference.normal_change`); the bootstrap (:mod:`.bootstrap`, one weight
row for both policies) is offered as an alternative.

Diagnostics: the Kish effective sample size of each policy's weights,
``(sum w)^2 / sum w^2`` [8]; the largest weight and the share of the total weight it carries;
the mean weight (it estimates the share of the policy's choices that the logging policy can
take at all: below 1, the policy chooses actions the log never shows); rows whose logged
action the policy cannot take (``pi = 0``); rows whose logging propensity equals the
candidate's own (a log that came from the candidate is not exploration).

References
----------
1. Horvitz, D. G. & Thompson, D. J. (1952). A generalization of sampling without replacement
   from a finite universe. Journal of the American Statistical Association 47(260), 663–685.
2. Swaminathan, A. & Joachims, T. (2015). The self-normalized estimator for counterfactual
   learning. Advances in Neural Information Processing Systems 28.
3. Dudík, M., Langford, J. & Li, L. (2011). Doubly robust policy evaluation and learning.
   Proceedings of the 28th International Conference on Machine Learning, 1097–1104.
4. Ionides, E. L. (2008). Truncated importance sampling. Journal of Computational and
   Graphical Statistics 17(2), 295–311.
5. Bottou, L. et al. (2013). Counterfactual reasoning and learning systems: the example of
   computational advertising. Journal of Machine Learning Research 14, 3207–3260.
6. Hesterberg, T. (1995). Weighted average importance sampling and defensive mixture
   distributions. Technometrics 37(2), 185–194 (variance of the ratio estimate).
7. Cochran, W. G. (1977). Sampling Techniques, 3rd ed. Wiley, section 6.8 (bias of the ratio
   estimate).
8. Kish, L. (1965). Survey Sampling. Wiley, section 11.7 (effective sample size of weights).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Literal

import numpy as np
from scipy import stats as sps

from service.stats import bootstrap as boot
from service.stats.inference import ChangeTest, bootstrap_change, check_confidence, normal_change

Estimator = Literal["ips", "snips", "dr"]
ESTIMATORS: tuple[Estimator, ...] = ("ips", "snips", "dr")
LABELS: dict[str, str] = {"ips": "IPS", "snips": "SNIPS", "dr": "doubly robust"}

#: The columns of a logged-exploration sample, with the range each must lie in.
LOG_COLUMNS = ("reward", "logging_propensity", "candidate_propensity", "baseline_propensity")
MODEL_COLUMNS = ("reward_prediction", "candidate_expected_reward", "baseline_expected_reward")


# ---- health of a log ---------------------------------------------------------------------


@dataclass(frozen=True)
class LogProblem:
    """One way a log is unusable: the column, how many rows, the first such row, and why."""

    column: str
    rows: int
    first_row: int
    message: str

    def text(self) -> str:
        return f"{self.column}: {self.message} in {self.rows} row(s), first row {self.first_row}"


def _first(mask: np.ndarray) -> int:
    return int(np.argmax(mask))


def log_problems(columns: Mapping[str, np.ndarray]) -> list[LogProblem]:
    """What makes the logged rows of *columns* unusable (empty list: none).

    Every column of :data:`LOG_COLUMNS` (and of :data:`MODEL_COLUMNS` where given) must be
    finite; ``logging_propensity`` in (0, 1]; the two policies' propensities in [0, 1]; and
    the logging policy must explore (not every propensity 1). Rows are indices into the
    arrays given.
    """
    problems: list[LogProblem] = []
    for name in LOG_COLUMNS + MODEL_COLUMNS:
        values = columns.get(name)
        if values is None or values.size == 0:
            continue
        # min and max are NaN when any value is: two reductions decide the common case, the
        # row masks are built only for a column that fails
        lo, hi = float(values.min()), float(values.max())
        if not (math.isfinite(lo) and math.isfinite(hi)):
            bad = ~np.isfinite(values)
            problems.append(LogProblem(name, int(bad.sum()), _first(bad), "missing or non-finite"))
            continue
        if name == "logging_propensity":
            if lo <= 0.0 or hi > 1.0:
                bad = (values <= 0.0) | (values > 1.0)
                problems.append(LogProblem(name, int(bad.sum()), _first(bad), "outside (0, 1]"))
            elif lo == 1.0:
                problems.append(
                    LogProblem(
                        name,
                        int(values.size),
                        0,
                        "the logging policy never explores (every propensity is 1)",
                    )
                )
        elif name in ("candidate_propensity", "baseline_propensity") and (lo < 0.0 or hi > 1.0):
            bad = (values < 0.0) | (values > 1.0)
            problems.append(LogProblem(name, int(bad.sum()), _first(bad), "outside [0, 1]"))
    return problems


def check_log(columns: Mapping[str, np.ndarray]) -> None:
    """Raise ValueError naming the column and the first bad row when the log is unusable."""
    problems = log_problems(columns)
    if problems:
        raise ValueError("; ".join(p.text() for p in problems))


# ---- weights -----------------------------------------------------------------------------


@dataclass(frozen=True)
class WeightSummary:
    """Diagnostics of one policy's importance weights ``w = pi / mu`` on the logged rows."""

    n: int
    #: Kish effective sample size ``(sum w)^2 / sum w^2`` [8]; 0 when every weight is 0.
    ess: float
    #: Mean of the unclipped weights: estimates the share of the policy's choices the logging
    #: policy can take (1 with full support).
    mean_weight: float
    #: Standard error of ``mean_weight``.
    mean_weight_se: float
    #: Largest (unclipped) weight, and the share of the total weight it carries.
    max_weight: float
    max_weight_share: float
    #: Rows whose logged action the policy cannot take (``pi = 0``).
    zero_rows: int
    #: Rows whose weight was clipped, and ``mean((w - M)_+)`` (estimates ``E_mu[(w - M)_+]``).
    clipped_rows: int = 0
    clipped_mass: float = 0.0

    def as_dict(self) -> dict[str, float | int]:
        return {
            "n": self.n,
            "ess": self.ess,
            "mean_weight": self.mean_weight,
            "mean_weight_se": self.mean_weight_se,
            "max_weight": self.max_weight,
            "max_weight_share": self.max_weight_share,
            "zero_rows": self.zero_rows,
            "clipped_rows": self.clipped_rows,
            "clipped_mass": self.clipped_mass,
        }


def _dot(a: np.ndarray, b: np.ndarray) -> float:
    """``sum(a * b)`` of two 1-D arrays. ``np.einsum`` rather than ``np.dot``: a threaded BLAS
    can be a hundred times slower on a busy machine for a single vector product."""
    return float(np.einsum("i,i->", a, b))


def kish_ess(weights: object) -> float:
    """Kish's effective sample size ``(sum w)^2 / sum w^2`` of non-negative weights [8].

    Equal weights give n; one dominant weight gives about 1; all-zero weights give 0.

    Examples
    --------
    >>> kish_ess([1.0, 1.0, 1.0, 1.0])
    4.0
    >>> kish_ess([3.0, 1.0])
    1.6
    """
    w = np.asarray(weights, dtype=np.float64)
    s2 = float(_dot(w, w))
    return float(w.sum()) ** 2 / s2 if s2 > 0 else 0.0


#: Rows per block: the per-row work runs over blocks this long, so temporaries stay in the
#: processor's cache and no array of the log's length is built (one pass over the columns).
BLOCK = 32_768


@dataclass
class _Acc:
    """Running sums of one policy over the blocks (see :func:`_accumulate`)."""

    raw_w: float = 0.0  # unclipped weights: sum, sum of squares, largest
    raw_w2: float = 0.0
    raw_max: float = 0.0
    zero: int = 0
    clipped: int = 0
    clipped_mass: float = 0.0  # sum of (w - M)_+
    w: float = 0.0  # (clipped) weights
    w2: float = 0.0
    t: float = 0.0  # IPS terms t = w r
    t2: float = 0.0
    tw: float = 0.0  # sum t w (SNIPS)
    dr: float = 0.0  # doubly robust terms g + w (r - r_hat)
    dr2: float = 0.0


@dataclass
class _PairAcc:
    tt: float = 0.0  # sum t_c t_b
    tw: float = 0.0  # sum t_c w_b
    wt: float = 0.0  # sum w_c t_b
    ww: float = 0.0  # sum w_c w_b
    dd: float = 0.0  # doubly robust differences: sum, sum of squares
    dd2: float = 0.0
    equal: int = 0
    max_abs_reward: float = 0.0
    max_abs_residual: float = 0.0


def _policy_block(
    acc: _Acc, target: np.ndarray, logging: np.ndarray, max_weight: float | None
) -> np.ndarray:
    w: np.ndarray = target / logging
    total, squares = float(w.sum()), _dot(w, w)
    top = float(w.max())
    acc.raw_w += total
    acc.raw_w2 += squares
    acc.raw_max = max(acc.raw_max, top)
    acc.zero += int(w.size - np.count_nonzero(target))
    if max_weight is not None and top > max_weight:
        over = w > max_weight
        acc.clipped += int(np.count_nonzero(over))
        acc.clipped_mass += float((w[over] - max_weight).sum())
        np.minimum(w, max_weight, out=w)
        total, squares = float(w.sum()), _dot(w, w)
    acc.w += total
    acc.w2 += squares
    return w


def _accumulate(
    columns: Mapping[str, np.ndarray], max_weight: float | None
) -> tuple[_Acc, _Acc, _PairAcc, dict[str, tuple[float, float]]]:
    """Every sum the estimators and diagnostics need, in one blocked pass over the rows, with
    each column's smallest and largest value (NaN when any value is NaN)."""
    r_all = columns["reward"]
    model = "reward_prediction" in columns
    c, b, pair = _Acc(), _Acc(), _PairAcc()
    bounds = dict.fromkeys(columns, (math.inf, -math.inf))

    def seen(name: str, values: np.ndarray) -> None:
        lo, hi = bounds[name]
        # min/max propagate NaN, and so do these comparisons' fallbacks below
        block_lo, block_hi = float(values.min()), float(values.max())
        bounds[name] = (
            block_lo if block_lo < lo or math.isnan(block_lo) or math.isnan(lo) else lo,
            block_hi if block_hi > hi or math.isnan(block_hi) or math.isnan(hi) else hi,
        )

    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        for start in range(0, r_all.size, BLOCK):
            rows = slice(start, start + BLOCK)
            r = r_all[rows]
            logging = columns["logging_propensity"][rows]
            candidate = columns["candidate_propensity"][rows]
            baseline = columns["baseline_propensity"][rows]
            for name, values in (
                ("reward", r),
                ("logging_propensity", logging),
                ("candidate_propensity", candidate),
                ("baseline_propensity", baseline),
            ):
                seen(name, values)
            wc = _policy_block(c, candidate, logging, max_weight)
            wb = _policy_block(b, baseline, logging, max_weight)
            pair.equal += int(np.count_nonzero(logging == candidate))
            tc, tb = wc * r, wb * r
            for acc, w, t in ((c, wc, tc), (b, wb, tb)):
                acc.t += float(t.sum())
                acc.t2 += _dot(t, t)
                acc.tw += _dot(t, w)
            pair.tt += _dot(tc, tb)
            pair.tw += _dot(tc, wb)
            pair.wt += _dot(wc, tb)
            pair.ww += _dot(wc, wb)
            if model:
                prediction = columns["reward_prediction"][rows]
                g_c = columns["candidate_expected_reward"][rows]
                g_b = columns["baseline_expected_reward"][rows]
                seen("reward_prediction", prediction)
                seen("candidate_expected_reward", g_c)
                seen("baseline_expected_reward", g_b)
                residual = r - prediction
                pair.max_abs_residual = max(
                    pair.max_abs_residual, float(residual.max()), -float(residual.min())
                )
                dc = wc * residual
                dc += g_c
                db = np.multiply(wb, residual, out=residual)
                db += g_b
                for acc, d in ((c, dc), (b, db)):
                    acc.dr += float(d.sum())
                    acc.dr2 += _dot(d, d)
                dc -= db
                pair.dd += float(dc.sum())
                pair.dd2 += _dot(dc, dc)
    lo, hi = bounds["reward"]
    pair.max_abs_reward = max(abs(lo), abs(hi))
    return c, b, pair, bounds


def _in_range(bounds: dict[str, tuple[float, float]]) -> bool:
    """Whether the columns' bounds show a usable log (else :func:`log_problems` says why)."""
    for name, (lo, hi) in bounds.items():
        if not (math.isfinite(lo) and math.isfinite(hi)):
            return False
        if name == "logging_propensity" and (lo <= 0.0 or hi > 1.0 or lo == 1.0):
            return False
        if name in ("candidate_propensity", "baseline_propensity") and (lo < 0.0 or hi > 1.0):
            return False
    return True


def _summary(acc: _Acc, n: int) -> WeightSummary:
    mean = acc.raw_w / n
    var = max(acc.raw_w2 - acc.raw_w * mean, 0.0) / max(n - 1, 1)
    return WeightSummary(
        n=n,
        ess=acc.w * acc.w / acc.w2 if acc.w2 > 0 else 0.0,
        mean_weight=mean,
        mean_weight_se=math.sqrt(var / n),
        max_weight=acc.raw_max,
        max_weight_share=acc.raw_max / acc.raw_w if acc.raw_w > 0 else 0.0,
        zero_rows=acc.zero,
        clipped_rows=acc.clipped,
        clipped_mass=acc.clipped_mass / n,
    )


# ---- prepared log ------------------------------------------------------------------------


@dataclass(frozen=True)
class PreparedLog:
    """A validated log and the sums every estimator needs, from one pass over its rows."""

    #: The validated columns (the caller's arrays, not copies).
    columns: Mapping[str, np.ndarray]
    max_weight: float | None
    candidate_weights: WeightSummary
    baseline_weights: WeightSummary
    #: Rows whose logging propensity equals the candidate's own, exactly.
    equal_rows: int
    _candidate: _Acc = field(repr=False)
    _baseline: _Acc = field(repr=False)
    _pair: _PairAcc = field(repr=False)

    @property
    def n(self) -> int:
        return int(self.columns["reward"].size)

    @property
    def has_model(self) -> bool:
        return "reward_prediction" in self.columns

    def row_terms(self, estimator: Estimator) -> tuple[np.ndarray, np.ndarray]:
        """Per-row terms of each policy (for the bootstrap): ``(w_c, w_b)`` weights for
        SNIPS's ratio, ``w r`` for IPS, ``g + w (r - r_hat)`` for DR (clipped weights)."""
        cols = self.columns
        logging = cols["logging_propensity"]
        out = []
        for name, expected in (
            ("candidate_propensity", "candidate_expected_reward"),
            ("baseline_propensity", "baseline_expected_reward"),
        ):
            w = cols[name] / logging
            if self.max_weight is not None:
                np.minimum(w, self.max_weight, out=w)
            if estimator == "ips":
                w = w * cols["reward"]
            elif estimator == "dr":
                w = cols[expected] + w * (cols["reward"] - cols["reward_prediction"])
            out.append(w)
        return out[0], out[1]


def _array(values: object, name: str, n: int | None) -> np.ndarray:
    array = np.asarray(values, dtype=np.float64)
    if array.ndim != 1:
        raise ValueError(f"{name} must be one-dimensional, got shape {array.shape}")
    if n is not None and array.size != n:
        raise ValueError(f"{name} has {array.size} values, expected {n}")
    return array


def prepare(
    reward: object,
    logging_propensity: object,
    candidate_propensity: object,
    baseline_propensity: object,
    *,
    reward_prediction: object | None = None,
    candidate_expected_reward: object | None = None,
    baseline_expected_reward: object | None = None,
    max_weight: float | None = None,
) -> PreparedLog:
    """Validate a log and compute, in one pass, the sums every estimator and diagnostic needs.

    Parameters
    ----------
    reward, logging_propensity, candidate_propensity, baseline_propensity : array_like
        One value per logged row; see the module docstring for the ranges. At least 2 rows.
    reward_prediction, candidate_expected_reward, baseline_expected_reward : array_like, optional
        The reward model's columns, all three or none (needed by the ``dr`` estimator).
    max_weight : float, optional
        Clip each weight at this value (>= 1); None: no clipping.

    Returns
    -------
    PreparedLog

    Raises
    ------
    ValueError
        Naming the column and the first bad row when the log is unusable.
    """
    r = _array(reward, "reward", None)
    n = r.size
    if n < 2:
        raise ValueError(f"a log needs at least 2 rows, got {n}")
    columns = {
        "reward": r,
        "logging_propensity": _array(logging_propensity, "logging_propensity", n),
        "candidate_propensity": _array(candidate_propensity, "candidate_propensity", n),
        "baseline_propensity": _array(baseline_propensity, "baseline_propensity", n),
    }
    model = (reward_prediction, candidate_expected_reward, baseline_expected_reward)
    if any(m is not None for m in model) and any(m is None for m in model):
        raise ValueError(
            "reward_prediction, candidate_expected_reward and baseline_expected_reward come "
            "together (all three or none)"
        )
    if reward_prediction is not None:
        for name, values in zip(MODEL_COLUMNS, model, strict=True):
            columns[name] = _array(values, name, n)
    if max_weight is not None and not (math.isfinite(max_weight) and max_weight >= 1.0):
        raise ValueError(f"max_weight must be a finite number >= 1, got {max_weight!r}")
    c, b, pair, bounds = _accumulate(columns, max_weight)
    if not _in_range(bounds):
        check_log(columns)  # names the column and the first bad row
        raise ValueError(f"unusable log: column bounds {bounds}")  # pragma: no cover
    return PreparedLog(
        columns=columns,
        max_weight=max_weight,
        candidate_weights=_summary(c, n),
        baseline_weights=_summary(b, n),
        equal_rows=pair.equal,
        _candidate=c,
        _baseline=b,
        _pair=pair,
    )


# ---- estimates ---------------------------------------------------------------------------


@dataclass(frozen=True)
class PolicyValue:
    """One policy's estimated reward with its normal interval and weight diagnostics."""

    estimate: float
    se: float
    interval: tuple[float, float]
    weights: WeightSummary
    #: Estimated bound on the size of the clipping bias (None: no clipping, or SNIPS).
    bias_bound: float | None = None


@dataclass(frozen=True)
class OffPolicyComparison:
    """Candidate against baseline on the same logged rows."""

    estimator: Estimator
    candidate: PolicyValue
    baseline: PolicyValue
    #: The change candidate minus baseline, with its interval and p-value of "no change".
    change: ChangeTest
    n: int
    equal_rows: int


def _se_from_sums(total: float, squares: float, n: int) -> float:
    """``sd / sqrt(n)`` (n - 1 divisor) from ``sum x`` and ``sum x^2``."""
    var = max(squares - total * total / n, 0.0) / (n - 1)
    return math.sqrt(var / n)


def _interval(estimate: float, se: float, z: float) -> tuple[float, float]:
    return (estimate - z * se, estimate + z * se)


def normal_quantile(confidence: float) -> float:
    """``z`` of a two-sided normal interval at *confidence* (1.96 at 0.95)."""
    return float(sps.norm.ppf(0.5 + check_confidence(confidence) / 2.0))


def _means(log: PreparedLog, estimator: Estimator) -> tuple[float, float, float, float, float]:
    """Both values, their standard errors and that of the paired difference.

    IPS [1] and DR [3]: means of per-row terms, and of their per-row differences. SNIPS [2]:
    the influence of row i on ``V = sum(w r) / sum(w)`` is ``psi_i = a (t_i - V w_i)`` with
    ``t = w r`` and ``a = n / sum(w)`` [6]; its sum of squares and the cross-product of the two
    policies' influences expand into the accumulated sums of products of ``t`` and ``w``:
    ``sum psi^2 = a^2 (sum t^2 - 2 V sum t w + V^2 sum w^2)``.
    """
    n = log.n
    c, b, p = log._candidate, log._baseline, log._pair
    if estimator == "ips":
        se_d = _se_from_sums(c.t - b.t, c.t2 + b.t2 - 2 * p.tt, n)
        return c.t / n, b.t / n, _se_from_sums(c.t, c.t2, n), _se_from_sums(b.t, b.t2, n), se_d
    if estimator == "dr":
        return (
            c.dr / n,
            b.dr / n,
            _se_from_sums(c.dr, c.dr2, n),
            _se_from_sums(b.dr, b.dr2, n),
            _se_from_sums(p.dd, p.dd2, n),
        )
    for who, acc in (("candidate", c), ("baseline", b)):
        if acc.w <= 0:
            raise ValueError(
                f"every {who} weight is 0: the policy never takes a logged action, so SNIPS "
                "is undefined"
            )
    vc, vb = c.t / c.w, b.t / b.w
    ac, ab = n / c.w, n / b.w
    ss_c = ac * ac * (c.t2 - 2 * vc * c.tw + vc * vc * c.w2)
    ss_b = ab * ab * (b.t2 - 2 * vb * b.tw + vb * vb * b.w2)
    cross = ac * ab * (p.tt - vb * p.tw - vc * p.wt + vc * vb * p.ww)
    # the influences sum to 0 exactly, so the n - 1 variance is the sum of squares over n - 1
    scale = 1.0 / (n * (n - 1))
    return (
        vc,
        vb,
        math.sqrt(max(ss_c, 0.0) * scale),
        math.sqrt(max(ss_b, 0.0) * scale),
        math.sqrt(max(ss_c + ss_b - 2 * cross, 0.0) * scale),
    )


def _bias_bound(log: PreparedLog, estimator: Estimator, summary: WeightSummary) -> float | None:
    """``mean((w - M)_+) * max |g|`` with g = r (IPS) or r - r_hat (DR); module docstring."""
    if log.max_weight is None or estimator == "snips":
        return None
    if summary.clipped_rows == 0:
        return 0.0
    g = log._pair.max_abs_reward if estimator == "ips" else log._pair.max_abs_residual
    return summary.clipped_mass * g


def compare(
    log: PreparedLog,
    estimator: Estimator,
    *,
    confidence: float = 0.95,
    method: Literal["normal", "bootstrap"] = "normal",
    resamples: int = 1000,
    rng: np.random.Generator | None = None,
) -> OffPolicyComparison:
    """Each policy's reward by *estimator* and the paired change candidate minus baseline.

    Parameters
    ----------
    log : PreparedLog
        From :func:`prepare`.
    estimator : {"ips", "snips", "dr"}
        ``dr`` needs the reward model's columns.
    confidence : float, default 0.95
        Two-sided confidence of every interval.
    method : {"normal", "bootstrap"}, default "normal"
        Interval of the change: normal (per-row differences; delta method for SNIPS), or a
        percentile bootstrap of the rows (one resample for both policies). The two policies'
        own intervals are always normal.
    resamples : int, default 1000
        Bootstrap resamples.
    rng : numpy.random.Generator, optional
        For the bootstrap; a fixed seed when omitted.

    Returns
    -------
    OffPolicyComparison

    Examples
    --------
    >>> log = prepare([1.0, 0.0, 1.0, 0.0], [0.5, 0.5, 0.5, 0.5], [1.0, 0.0, 0.5, 0.5],
    ...               [0.5, 0.5, 0.5, 0.5])
    >>> round(compare(log, "ips").candidate.estimate, 4)
    0.75
    """
    confidence = check_confidence(confidence)
    if estimator not in ESTIMATORS:
        raise ValueError(f"estimator must be one of {ESTIMATORS}, got {estimator!r}")
    if estimator == "dr" and not log.has_model:
        raise ValueError(
            "the dr estimator needs reward_prediction, candidate_expected_reward and "
            "baseline_expected_reward"
        )
    z = normal_quantile(confidence)
    n = log.n
    vc, vb, se_c, se_b, se = _means(log, estimator)
    estimate = vc - vb
    name = f"{estimator}-paired"
    if method == "bootstrap":
        reps = boot.paired_replicates(
            _bootstrap_statistic(log, estimator),
            n,
            resamples=resamples,
            rng=rng or np.random.default_rng(0),
        )
        change = bootstrap_change(
            estimate,
            reps,
            confidence=confidence,
            method=f"{name}-bootstrap",
            n_candidate=n,
            n_baseline=n,
        )
    elif method == "normal":
        method_name = f"{name}-delta-normal" if estimator == "snips" else f"{name}-normal"
        change = normal_change(
            estimate,
            se,
            confidence=confidence,
            method=method_name,
            n_candidate=n,
            n_baseline=n,
        )
    else:
        raise ValueError(f"method must be 'normal' or 'bootstrap', got {method!r}")
    sc, sb = log.candidate_weights, log.baseline_weights
    return OffPolicyComparison(
        estimator=estimator,
        candidate=PolicyValue(
            vc, se_c, _interval(vc, se_c, z), sc, _bias_bound(log, estimator, sc)
        ),
        baseline=PolicyValue(vb, se_b, _interval(vb, se_b, z), sb, _bias_bound(log, estimator, sb)),
        change=change,
        n=n,
        equal_rows=log.equal_rows,
    )


def _bootstrap_statistic(log: PreparedLog, estimator: Estimator) -> boot.Statistic:
    tc, tb = log.row_terms(estimator)
    if estimator != "snips":
        return boot.weighted_mean(tc - tb)  # the mean of per-row differences, resampled
    r = log.columns["reward"]
    return boot.difference(  # SNIPS: the difference of the two resampled ratios
        boot.weighted_ratio(tc * r, tc),
        boot.weighted_ratio(tb * r, tb),
    )
