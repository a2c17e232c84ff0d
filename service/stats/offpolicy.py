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
from dataclasses import dataclass
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
#: Relative tolerance under which a logging propensity "equals" the candidate's.
EQUAL_RTOL = 1e-9


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
        if values is None:
            continue
        bad = ~np.isfinite(values)
        if bad.any():
            problems.append(LogProblem(name, int(bad.sum()), _first(bad), "missing or non-finite"))
            continue
        if name == "logging_propensity":
            bad = (values <= 0.0) | (values > 1.0)
            if bad.any():
                problems.append(LogProblem(name, int(bad.sum()), _first(bad), "outside (0, 1]"))
            elif values.size and bool(np.all(values == 1.0)):
                problems.append(
                    LogProblem(
                        name,
                        int(values.size),
                        0,
                        "the logging policy never explores (every propensity is 1)",
                    )
                )
        elif name in ("candidate_propensity", "baseline_propensity"):
            bad = (values < 0.0) | (values > 1.0)
            if bad.any():
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
    s2 = float(np.dot(w, w))
    return float(w.sum()) ** 2 / s2 if s2 > 0 else 0.0


def _weights(
    target: np.ndarray, inverse_logging: np.ndarray, max_weight: float | None
) -> tuple[np.ndarray, WeightSummary]:
    n = target.size
    w = target * inverse_logging
    total = float(w.sum())
    mean = total / n
    sq = float(np.dot(w, w))
    top = float(w.max())
    var = max(sq / n - mean * mean, 0.0) * n / max(n - 1, 1)
    clipped_rows, clipped_mass = 0, 0.0
    if max_weight is not None and top > max_weight:
        over = w > max_weight
        clipped_rows = int(np.count_nonzero(over))
        clipped_mass = float((w[over] - max_weight).sum()) / n
        w = np.minimum(w, max_weight)
        sq = float(np.dot(w, w))
        total_used = float(w.sum())
    else:
        total_used = total
    summary = WeightSummary(
        n=n,
        ess=total_used * total_used / sq if sq > 0 else 0.0,
        mean_weight=mean,
        mean_weight_se=math.sqrt(var / n),
        max_weight=top,
        max_weight_share=top / total if total > 0 else 0.0,
        zero_rows=n - int(np.count_nonzero(target)),
        clipped_rows=clipped_rows,
        clipped_mass=clipped_mass,
    )
    return w, summary


# ---- prepared log ------------------------------------------------------------------------


@dataclass(frozen=True)
class PreparedLog:
    """A validated log with both policies' (clipped) weights: the work every estimator shares."""

    reward: np.ndarray
    w_candidate: np.ndarray
    w_baseline: np.ndarray
    candidate_weights: WeightSummary
    baseline_weights: WeightSummary
    #: Rows whose logging propensity equals the candidate's own (relative tolerance 1e-9).
    equal_rows: int
    max_weight: float | None
    reward_prediction: np.ndarray | None = None
    candidate_expected: np.ndarray | None = None
    baseline_expected: np.ndarray | None = None

    @property
    def n(self) -> int:
        return int(self.reward.size)

    @property
    def has_model(self) -> bool:
        return self.reward_prediction is not None


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
    """Validate a log and compute both policies' weights and diagnostics once.

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
    check_log(columns)
    logging = columns["logging_propensity"]
    candidate = columns["candidate_propensity"]
    inverse = 1.0 / logging
    wc, sc = _weights(candidate, inverse, max_weight)
    wb, sb = _weights(columns["baseline_propensity"], inverse, max_weight)
    equal = int(np.count_nonzero(np.abs(logging - candidate) <= EQUAL_RTOL * logging))
    return PreparedLog(
        reward=r,
        w_candidate=wc,
        w_baseline=wb,
        candidate_weights=sc,
        baseline_weights=sb,
        equal_rows=equal,
        max_weight=max_weight,
        reward_prediction=columns.get("reward_prediction"),
        candidate_expected=columns.get("candidate_expected_reward"),
        baseline_expected=columns.get("baseline_expected_reward"),
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


def _mean_se(x: np.ndarray) -> tuple[float, float]:
    n = x.size
    mean = float(x.sum()) / n
    centred = x - mean
    var = float(np.dot(centred, centred)) / (n - 1)
    return mean, math.sqrt(var / n)


def _interval(estimate: float, se: float, z: float) -> tuple[float, float]:
    return (estimate - z * se, estimate + z * se)


def normal_quantile(confidence: float) -> float:
    """``z`` of a two-sided normal interval at *confidence* (1.96 at 0.95)."""
    return float(sps.norm.ppf(0.5 + check_confidence(confidence) / 2.0))


def _terms(log: PreparedLog, estimator: Estimator, side: Literal["c", "b"]) -> np.ndarray:
    """Per-row terms whose mean is the IPS or DR estimate (follows [1] and [3])."""
    w = log.w_candidate if side == "c" else log.w_baseline
    if estimator == "ips":
        terms: np.ndarray = w * log.reward
        return terms
    assert log.reward_prediction is not None
    expected = log.candidate_expected if side == "c" else log.baseline_expected
    assert expected is not None
    terms = expected + w * (log.reward - log.reward_prediction)
    return terms


def _snips(w: np.ndarray, r: np.ndarray) -> tuple[float, np.ndarray]:
    """The SNIPS estimate [2] and each row's influence ``w_i (r_i - V) / mean(w)`` [6]."""
    total = float(w.sum())
    if total <= 0:
        raise ValueError(
            "every weight is 0: the policy never takes a logged action, so SNIPS is undefined"
        )
    value = float(np.dot(w, r)) / total
    influence = w * (r - value) * (w.size / total)
    return value, influence


def _bias_bound(log: PreparedLog, estimator: Estimator, summary: WeightSummary) -> float | None:
    """``mean((w - M)_+) * max |g|`` with g = r (IPS) or r - r_hat (DR); module docstring."""
    if log.max_weight is None or estimator == "snips":
        return None
    if summary.clipped_rows == 0:
        return 0.0
    if estimator == "ips":
        g = float(np.abs(log.reward).max())
    else:
        assert log.reward_prediction is not None
        g = float(np.abs(log.reward - log.reward_prediction).max())
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
    if estimator == "snips":
        vc, ic = _snips(log.w_candidate, log.reward)
        vb, ib = _snips(log.w_baseline, log.reward)
        se_c = _mean_se(ic)[1]
        se_b = _mean_se(ib)[1]
        diff = ic - ib
        estimate = vc - vb
    else:
        tc = _terms(log, estimator, "c")
        tb = _terms(log, estimator, "b")
        vc, se_c = _mean_se(tc)
        vb, se_b = _mean_se(tb)
        diff = tc - tb
        estimate = float(diff.sum()) / n
    se = _mean_se(diff)[1]
    name = f"{estimator}-paired"
    if method == "bootstrap":
        stat = _bootstrap_statistic(log, estimator, diff)
        reps = boot.paired_replicates(
            stat, n, resamples=resamples, rng=rng or np.random.default_rng(0)
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


def _bootstrap_statistic(
    log: PreparedLog, estimator: Estimator, diff: np.ndarray
) -> boot.Statistic:
    if estimator != "snips":
        return boot.weighted_mean(diff)  # the mean of per-row differences, resampled
    r = log.reward
    return boot.difference(
        boot.weighted_ratio(log.w_candidate * r, log.w_candidate),
        boot.weighted_ratio(log.w_baseline * r, log.w_baseline),
    )
