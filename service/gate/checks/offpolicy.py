"""Off-policy: the candidate's and the baseline's reward estimated on logged exploration traffic.

Kind ``off-policy``. Every other check judges the candidate on labels that the serving model's
own choices produced: readers only click what they were shown. A log of exploration traffic
(actions taken with known probabilities, ``logging_propensity``) lets the gate estimate what
readers would do under the candidate and under the baseline, on the same logged rows, without
that bias (see :mod:`service.stats.offpolicy` for the estimators and their sources).

The sample carries ``reward``, ``logging_propensity``, ``candidate_propensity`` and
``baseline_propensity`` (and for ``estimator = "dr"`` the reward model's three columns). A row
whose log columns are all null is not a logged row (the sample may mix logged and other rows).

Decision rules, on the change candidate minus baseline in reward units (higher is better), are
those of ``quality`` (:mod:`service.gate.checks.quality`): ``non-inferiority``, ``superiority``
or ``limit`` against ``margin`` at ``confidence``; ``max_gain`` as a leak guard; segments with
Holm or Benjamini–Hochberg over the family of units. Before any of them, a unit is
inconclusive (never a confident number) when:

- the Kish effective sample size of either policy's weights is below ``min_ess``
  (underpowered: a few large weights decide the estimate);
- either policy's mean weight is shown below ``min_support`` (the upper end of its interval is
  below it): the policy chooses actions the logging policy never takes, about which the log
  knows nothing;
- more than ``max_equal_share`` of the rows have a logging propensity equal to the
  candidate's own: the log came from the candidate, not from exploration.

Segments whose effective sample size is below ``min_ess`` are reported with the too-small
segments and not tested.

Health of the log (:func:`log_health_findings`, run by the evaluation whenever a policy has an
``off-policy`` check): non-finite values, propensities out of range, a logging policy that
never explores. Any of them is a blocking ``health.log`` breach naming column and row (the
snapshot is stored and held: fail closed), and the check itself is inconclusive.
"""

from __future__ import annotations

import math
import zlib
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from pydantic import Field

from service.gate.checks.base import CheckContext, register, skipped
from service.gate.checks.segments import ALL, CorrectedSegmentKeys, Unit, split, where
from service.gate.types import LOG_COLUMNS, MODEL_COLUMNS, Finding, Sample, Snapshot
from service.stats.inference import (
    BoundaryTest,
    against_boundary,
    minimum_detectable_effect,
)
from service.stats.multiple import adjust
from service.stats.offpolicy import (
    LABELS,
    OffPolicyComparison,
    PolicyValue,
    compare,
    log_problems,
    normal_quantile,
    prepare,
)

KIND = "off-policy"


class OffPolicyConfig(CorrectedSegmentKeys):
    kind: Literal["off-policy"]
    estimator: Literal["ips", "snips", "dr"] = Field(
        "snips",
        description="ips (Horvitz & Thompson), snips (self-normalised) or dr (doubly robust; "
        "needs the reward model's columns).",
    )
    max_weight: float | None = Field(
        None,
        ge=1,
        description="Clip importance weights at this value (less variance, a bias that the "
        "finding bounds); omit for none.",
    )
    rule: Literal["non-inferiority", "superiority", "limit"] = Field(
        "non-inferiority", description="Decision rule on the reward change against the baseline."
    )
    margin: float | None = Field(
        None,
        ge=0,
        description="In reward units: allowed loss (non-inferiority, limit) or required gain "
        "(superiority).",
    )
    confidence: float = Field(
        0.95, ge=0.5, lt=1, description="Two-sided confidence of the interval."
    )
    power: float = Field(0.8, gt=0, lt=1, description="Power for the minimum detectable effect.")
    max_gain: float | None = Field(
        None, gt=0, description="Leak guard: a reward gain above this is a breach."
    )
    method: Literal["normal", "bootstrap"] = Field(
        "normal",
        description="Interval of the change: normal (per-row differences, delta method for "
        "snips) or a paired bootstrap of the rows.",
    )
    resamples: int = Field(1000, ge=10, le=100_000, description="Bootstrap resamples.")
    min_ess: float = Field(
        500.0,
        ge=2,
        description="Smallest Kish effective sample size of either policy's weights; below: "
        "inconclusive (underpowered).",
    )
    min_support: float = Field(
        0.9,
        ge=0,
        le=1,
        description="A policy whose mean weight is shown below this chooses actions the log "
        "never takes: inconclusive.",
    )
    max_equal_share: float = Field(
        0.5,
        ge=0,
        le=1,
        description="Largest share of rows whose logging propensity equals the candidate's "
        "own (a log that is not exploration).",
    )

    def consistency(self) -> None:
        super().consistency()
        if self.rule in ("non-inferiority", "limit") and self.margin is None:
            raise ValueError(f"rule {self.rule!r} needs a margin")
        if self.against != "baseline":
            raise ValueError(
                "off-policy compares the candidate with the serving baseline on the same log "
                "(baseline_propensity); against must be 'baseline'"
            )

    def bad_side(self) -> Literal["upper", "lower"]:
        return "lower"  # the value is a reward change: low is bad


# ---- the log -----------------------------------------------------------------------------


def logged_rows(sample: Sample) -> np.ndarray | None:
    """Indices of the logged rows (some log column not null); None without log columns."""
    columns = [sample.column(name) for name in LOG_COLUMNS]
    if any(c is None for c in columns):
        return None
    null = np.ones(len(sample), dtype=bool)
    for column in columns:
        assert column is not None
        null &= np.isnan(column)
    return np.flatnonzero(~null)


def _log_columns(sample: Sample, rows: np.ndarray) -> dict[str, np.ndarray]:
    out: dict[str, np.ndarray] = {}
    for name in LOG_COLUMNS + MODEL_COLUMNS:
        column = sample.column(name)
        if column is not None:
            out[name] = column[rows]
    return out


def log_health_findings(candidate: Snapshot) -> list[Finding]:
    """``health.log``: whether the candidate's logged rows can be used at all (always
    blocking). Empty when the sample carries no logged-exploration columns."""
    sample = candidate.sample
    if sample is None:
        return []
    rows = logged_rows(sample)
    if rows is None:
        return []
    problems = log_problems(_log_columns(sample, rows))
    texts = [
        f"{p.column}: {p.message} in {p.rows} of {rows.size} logged row(s), first at "
        f"sample.{p.column}[{int(rows[p.first_row])}]"
        for p in problems
    ]
    message = (
        "the exploration log cannot be used: " + "; ".join(texts)
        if problems
        else f"exploration log: {rows.size} logged rows, propensities in range, rewards finite"
    )
    return [
        Finding(
            check="health.log",
            kind="health",
            outcome="breach" if problems else "ok",
            statistic="log",
            message=message,
            blocking=True,
            details={
                "logged_rows": int(rows.size),
                "problems": [
                    {
                        "column": p.column,
                        "rows": p.rows,
                        "first_row": int(rows[p.first_row]),
                        "field": f"sample.{p.column}[{int(rows[p.first_row])}]",
                        "message": p.message,
                    }
                    for p in problems
                ],
            },
        )
    ]


# ---- one unit ----------------------------------------------------------------------------


@dataclass(frozen=True)
class UnitResult:
    unit: Unit
    rows: int
    comparison: OffPolicyComparison | None
    tests: BoundaryTest | None
    #: Why the unit cannot be judged (underpowered, no support, not exploration), if so.
    unusable: list[str]
    error: str | None = None


def _boundary(config: OffPolicyConfig) -> float:
    margin = config.margin or 0.0
    return margin if config.rule == "superiority" else -margin


def _rng(ctx: CheckContext, config: OffPolicyConfig, unit: Unit) -> np.random.Generator:
    return np.random.default_rng([ctx.seed, zlib.crc32(f"{config.name}|{unit.label}".encode())])


def _unusable(config: OffPolicyConfig, c: OffPolicyComparison) -> list[str]:
    """Reasons a unit's estimate must not decide (module docstring)."""
    reasons = []
    z = normal_quantile(config.confidence)
    for who, side in (("candidate", c.candidate), ("baseline", c.baseline)):
        w = side.weights
        if not math.isfinite(w.ess):
            reasons.append(
                f"underpowered: the {who}'s weights overflow (largest {w.max_weight:.3g}), so "
                "its effective sample size cannot be computed"
            )
            continue
        if w.ess < config.min_ess:
            reasons.append(
                f"underpowered: the {who}'s effective sample size is {w.ess:.0f} of {w.n} rows, "
                f"below min_ess {config.min_ess:g} (largest weight {w.max_weight:.3g} carries "
                f"{w.max_weight_share:.1%} of the total)"
            )
        upper = w.mean_weight + z * w.mean_weight_se
        if upper < config.min_support:
            reasons.append(
                f"the {who} chooses actions the logging policy never takes: its mean weight "
                f"{w.mean_weight:.3f} (upper bound {upper:.3f}) is below min_support "
                f"{config.min_support:g}, so about {1 - w.mean_weight:.0%} of its choices are "
                "outside the log"
            )
    share = c.equal_rows / c.n
    if share > config.max_equal_share:
        reasons.append(
            f"not exploration: {share:.0%} of logged rows have logging_propensity equal to "
            f"candidate_propensity (max_equal_share {config.max_equal_share:g}); the log looks "
            "like the candidate's own choices"
        )
    return reasons


def _run_unit(
    config: OffPolicyConfig,
    ctx: CheckContext,
    sample: Sample,
    rows: np.ndarray,
    unit: Unit,
) -> UnitResult:
    columns = _log_columns(sample, rows)
    model = config.estimator == "dr"
    log = prepare(
        columns["reward"],
        columns["logging_propensity"],
        columns["candidate_propensity"],
        columns["baseline_propensity"],
        reward_prediction=columns.get("reward_prediction") if model else None,
        candidate_expected_reward=columns.get("candidate_expected_reward") if model else None,
        baseline_expected_reward=columns.get("baseline_expected_reward") if model else None,
        max_weight=config.max_weight,
    )
    comparison = compare(
        log,
        config.estimator,
        confidence=config.confidence,
        method=config.method,
        resamples=config.resamples,
        rng=_rng(ctx, config, unit),
    )
    tests = against_boundary(comparison.change, _boundary(config))
    return UnitResult(unit, int(rows.size), comparison, tests, _unusable(config, comparison))


# ---- the check ---------------------------------------------------------------------------


@register(KIND, OffPolicyConfig, family="off-policy", needs_other=False)
def run_offpolicy(config: OffPolicyConfig, ctx: CheckContext) -> list[Finding]:
    label = LABELS[config.estimator]
    statistic = f"{config.estimator} reward change"
    sample = ctx.candidate.sample
    rows = None if sample is None else logged_rows(sample)
    if sample is None or rows is None:
        return [
            skipped(
                config,
                f"{label}: the sample carries no logged-exploration columns "
                f"({', '.join(LOG_COLUMNS)})",
                statistic=statistic,
            )
        ]
    if config.estimator == "dr" and sample.column("reward_prediction") is None:
        return [
            skipped(
                config,
                f"{label}: the sample has no reward model columns ({', '.join(MODEL_COLUMNS)})",
                statistic=statistic,
            )
        ]
    if rows.size == 0:
        return [skipped(config, f"{label}: no logged rows in the sample", statistic=statistic)]
    problems = log_problems(_log_columns(sample, rows))
    if problems:
        return [
            _inconclusive(
                config,
                statistic,
                f"{label}: not estimated, the exploration log cannot be used (see health.log): "
                + "; ".join(p.column + ": " + p.message for p in problems),
                rows.size,
            )
        ]
    if rows.size < 2:
        return [
            _inconclusive(
                config, statistic, f"{label}: underpowered: only {rows.size} logged row", 1
            )
        ]
    layout = split(sample, config.segments, config.min_segment_rows, keep=rows)
    results: list[UnitResult] = []
    too_small = list(layout.too_small)
    for unit in layout.units:
        unit_rows = rows if unit.rows is None else rows[unit.rows]
        try:
            result = _run_unit(config, ctx, sample, unit_rows, unit)
        except ValueError as exc:
            if unit.label == ALL:
                raise
            results.append(UnitResult(unit, int(unit_rows.size), None, None, [], str(exc)))
            continue
        if unit.label != ALL and result.unusable:
            too_small.append(
                {"segment": unit.label, "rows": result.rows, "reason": "; ".join(result.unusable)}
            )
            continue
        results.append(result)
    return [
        _finding(config, label, statistic, results, too_small, layout.missing_columns, len(sample))
    ]


def _inconclusive(config: OffPolicyConfig, statistic: str, message: str, rows: int) -> Finding:
    return Finding(
        check=config.name,
        kind=config.kind,
        outcome="inconclusive",
        statistic=statistic,
        message=message,
        blocking=config.blocking,
        against=config.against,
        details={"estimator": config.estimator, "rows_logged": rows, "underpowered": True},
    )


def _outcome(config: OffPolicyConfig, gain: float, p_above: float, p_below: float) -> str:
    """The decision rules of ``quality`` (see its module docstring), on the reward change."""
    alpha = (1.0 - config.confidence) / 2.0
    if config.max_gain is not None and gain > config.max_gain:
        return "leak"
    if config.rule == "limit":
        return "breach" if gain < _boundary(config) else "ok"
    if p_above < alpha:
        return "ok"
    if p_below < alpha:
        return "breach"
    return "inconclusive"


def _policy(value: PolicyValue) -> dict[str, Any]:
    out: dict[str, Any] = {
        "estimate": value.estimate,
        "se": value.se,
        "interval": list(value.interval),
        **value.weights.as_dict(),
    }
    if value.bias_bound is not None:
        out["clipping_bias_bound"] = value.bias_bound
    return out


def _fmt(x: float) -> str:
    return f"{x:+.4g}"


def _finding(
    config: OffPolicyConfig,
    label: str,
    statistic: str,
    results: list[UnitResult],
    too_small: list[dict[str, object]],
    missing: list[str],
    rows_total: int,
) -> Finding:
    ran = [r for r in results if r.comparison is not None and r.tests is not None]
    usable = [r for r in ran if not r.unusable]
    # As in quality: claims of a regression are adjusted over the units that were tested;
    # "ok" needs every unit shown within the margin (intersection-union, no adjustment).
    p_below = dict(
        zip(
            [r.unit.label for r in usable],
            adjust([r.tests.p_below for r in usable], config.correction),  # type: ignore[union-attr]
            strict=True,
        )
    )
    verdicts: dict[str, str] = {}
    table: list[dict[str, Any]] = []
    for r in ran:
        assert r.comparison is not None and r.tests is not None
        c = r.comparison
        if r.unusable:
            verdict = "unusable"
        else:
            verdict = _outcome(config, c.change.estimate, r.tests.p_above, p_below[r.unit.label])
        verdicts[r.unit.label] = verdict
        table.append(
            {
                "segment": r.unit.label,
                "rows": r.rows,
                "candidate": c.candidate.estimate,
                "baseline": c.baseline.estimate,
                "change": c.change.estimate,
                "interval": list(c.change.interval),
                "ess_candidate": c.candidate.weights.ess,
                "ess_baseline": c.baseline.weights.ess,
                "p_worse": r.tests.p_below,
                "p_worse_adjusted": p_below.get(r.unit.label),
                "outcome": {"leak": "breach", "unusable": "inconclusive"}.get(verdict, verdict),
            }
        )
    for r in results:
        if r.comparison is None:
            table.append(
                {"segment": r.unit.label, "rows": r.rows, "outcome": "skipped", "error": r.error}
            )
    whole = ran[0]
    assert whole.unit.label == ALL and whole.comparison is not None and whole.tests is not None
    c = whole.comparison
    test = c.change
    mde = minimum_detectable_effect(test.se, confidence=config.confidence, power=config.power)
    conf = f"{config.confidence:.0%}"
    low, high = test.interval
    head = (
        f"{label} reward {c.candidate.estimate:.4g} vs baseline {c.baseline.estimate:.4g} on "
        f"{c.n} logged rows: change {_fmt(test.estimate)}, {conf} CI [{_fmt(low)}, {_fmt(high)}]"
        f" (effective sample size {c.candidate.weights.ess:.0f} candidate, "
        f"{c.baseline.weights.ess:.0f} baseline)"
    )
    leaks = [u for u, v in verdicts.items() if v == "leak"]
    breaches = [u for u, v in verdicts.items() if v == "breach"]
    unsure = [u for u, v in verdicts.items() if v == "inconclusive"]
    if whole.unusable:
        outcome, tail = "inconclusive", "; ".join(whole.unusable)
    elif leaks:
        outcome = "breach"
        tail = (
            f"gain above max_gain {config.max_gain:g}{where(leaks)}: check the log and the "
            "propensities (a leak or a bug)"
        )
    elif breaches:
        outcome, tail = "breach", _breach_text(config, breaches)
    elif unsure:
        outcome = "inconclusive"
        tail = (
            f"cannot tell against the margin {config.margin or 0:g}{where(unsure)}: the "
            f"interval straddles it (detectable change at this size: {mde:.3g})"
        )
    else:
        outcome, tail = "ok", _ok_text(config)
    clipped = [
        f"{who}'s clipping bias at most {v.bias_bound:.3g}"
        for who, v in (("candidate", c.candidate), ("baseline", c.baseline))
        if v.bias_bound
    ]
    if clipped:
        tail += f" ({', '.join(clipped)}; max_weight {config.max_weight:g})"
    details: dict[str, Any] = {
        "estimator": config.estimator,
        "rule": config.rule,
        "margin": config.margin,
        "confidence": config.confidence,
        "method": test.method,
        "mde": mde,
        "power": config.power,
        "p_worse": whole.tests.p_below,
        "gain": test.estimate,
        "underpowered": any(t.startswith("underpowered") for t in whole.unusable),
        "unusable": whole.unusable,
        "candidate": _policy(c.candidate),
        "baseline": _policy(c.baseline),
        "equal_propensity_rows": c.equal_rows,
        "equal_propensity_share": c.equal_rows / c.n,
        "max_weight": config.max_weight,
        "rows_logged": c.n,
        "rows_total": rows_total,
        "correction": config.correction if len(usable) > 1 else None,
        "segments": table if len(results) > 1 or too_small else [],
        "too_small": too_small,
        "missing_segment_columns": missing,
        "learn": {
            "ess_candidate": c.candidate.weights.ess,
            "ess_baseline": c.baseline.weights.ess,
            "mean_weight_candidate": c.candidate.weights.mean_weight,
            "max_weight_share_candidate": c.candidate.weights.max_weight_share,
        },
    }
    if config.max_gain is not None:
        details["max_gain"] = config.max_gain
    return Finding(
        check=config.name,
        kind=config.kind,
        outcome=outcome,  # type: ignore[arg-type]
        statistic=statistic,
        value=test.estimate,
        limit=_boundary(config),
        pvalue=whole.tests.p_above if config.rule != "limit" else test.pvalue,
        baseline_value=c.baseline.estimate,
        candidate_value=c.candidate.estimate,
        interval=test.interval,
        message=f"{head}; {tail}",
        blocking=config.blocking,
        against=config.against,
        details=details,
    )


def _breach_text(config: OffPolicyConfig, units: list[str]) -> str:
    place = where(units)
    if config.rule == "non-inferiority":
        return f"reward worse than the baseline by more than the margin {config.margin:g}{place}"
    if config.rule == "superiority":
        return f"reward shown not better than the baseline by {config.margin or 0:g}{place}"
    return f"point estimate worse than the baseline by more than {config.margin:g}{place}"


def _ok_text(config: OffPolicyConfig) -> str:
    if config.rule == "non-inferiority":
        return f"non-inferior within the margin {config.margin:g}"
    if config.rule == "superiority":
        return f"better than the baseline by more than {config.margin or 0:g}"
    return f"within the limit {config.margin:g}"
