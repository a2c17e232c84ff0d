"""Quality from labels: compute a metric from the labelled sample and test its change.

Kind ``quality``. The candidate's sample must carry ``label``. Two ways to compare:

- **paired** (recommended): the sample also carries ``baseline_score``, the serving baseline's
  scores of the same rows. The change is measured on identical rows and labels, so the noise of
  the rows cancels and small changes are detectable.
- **unpaired**: the baseline snapshot's own stored sample (its scores and labels) is the
  comparison; only for ``against = "reference"`` or when ``baseline_score`` is absent.

Decision rules, on the *gain* (the change oriented so that positive is better; see
:data:`~service.gate.checks.comparisons.DIRECTION`) and a two-sided interval at ``confidence``:

- ``non-inferiority``: ok when the interval's lower end is above ``-margin``; breach when its
  upper end is below ``-margin`` (shown worse by more than the margin); otherwise inconclusive.
- ``superiority``: ok when the lower end is above ``+margin``; breach when the upper end is
  below it; otherwise inconclusive.
- ``limit``: breach when the point estimate of the gain is below ``-margin``; no inconclusive.

With segments, a unit is a breach when its p-value of "worse than the boundary", adjusted over
the family of units (see :mod:`service.gate.checks.segments`), is below ``(1 - confidence) / 2``;
it is ok when its own lower bound clears the boundary (every unit must: an intersection-union
test, which needs no adjustment; Berger 1982); otherwise inconclusive.

``max_gain`` (leak guard): a point gain above it is a breach. ``floor``/``ceiling`` bound the
candidate's own value on all rows.
"""

from __future__ import annotations

import dataclasses
import zlib
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from pydantic import Field

from service.gate.checks.base import CheckContext, register, skipped
from service.gate.checks.comparisons import (
    DIRECTION,
    Comparison,
    Options,
    QualityMetric,
    Side,
    compare_paired,
    compare_unpaired,
    is_ranking,
    label_of,
)
from service.gate.checks.margins import (
    GAIN_KEY,
    UnitMargin,
    leak_limit,
    too_few_classes,
    unit_margin,
)
from service.gate.checks.memo import codes_of, finite_rows, take
from service.gate.checks.quality_units import bound_problems, floor_only, paired_auc_units
from service.gate.checks.segments import (
    ALL,
    CorrectedSegmentKeys,
    Unit,
    matching_rows,
    split,
    where,
)
from service.gate.types import Finding, Sample
from service.stats.inference import (
    BoundaryTest,
    ChangeTest,
    against_boundary,
    minimum_detectable_effect,
    oriented_interval,
)
from service.stats.multiple import adjust


class QualityConfig(CorrectedSegmentKeys):
    kind: Literal["quality"]
    metric: QualityMetric = Field(
        description="auc, logloss, brier, calibration_ratio, ece, ndcg, recall, mrr or hit_rate."
    )
    k: int = Field(10, ge=1, le=10_000, description="Cut-off for ndcg, recall, mrr, hit_rate.")
    gain: Literal["linear", "exponential"] = Field(
        "linear", description="NDCG gain of a label: linear (rel) or exponential (2^rel - 1)."
    )
    bins: int = Field(10, ge=2, le=1000, description="Equal-mass bins for ece.")
    rule: Literal["non-inferiority", "superiority", "limit"] = Field(
        "non-inferiority", description="Decision rule on the change against the baseline."
    )
    margin: float | None = Field(
        None,
        ge=0,
        description="Allowed worsening (non-inferiority, limit) or required gain (superiority).",
    )
    confidence: float = Field(
        0.95, ge=0.5, lt=1, description="Two-sided confidence of the interval."
    )
    power: float = Field(0.8, gt=0, lt=1, description="Power for the minimum detectable effect.")
    max_gain: float | None = Field(
        None, gt=0, description="Leak guard: a gain above this is a breach."
    )
    floor: float | None = Field(None, description="Lowest acceptable candidate value (all rows).")
    ceiling: float | None = Field(
        None, description="Highest acceptable candidate value (all rows)."
    )
    pairing: Literal["auto", "paired", "unpaired"] = Field(
        "auto", description="paired uses baseline_score on the same rows; auto prefers it."
    )
    method: Literal["auto", "bootstrap"] = Field(
        "auto", description="auto: closed-form tests where they exist; bootstrap: always resample."
    )
    resamples: int = Field(1000, ge=10, le=100_000, description="Bootstrap resamples.")
    warm_up_margin: float | None = Field(
        None,
        ge=0,
        description="The margin while the check is still learning (fewer healthy values than "
        "the budget's min_history); default: margin.",
    )
    min_positives: int = Field(
        50,
        ge=1,
        description="auc, calibration_ratio, ece: a unit with fewer positive rows is "
        "underpowered (DeLong's interval is overconfident with few positives).",
    )
    min_negatives: int = Field(
        50, ge=1, description="auc, calibration_ratio, ece: the same for negative rows."
    )

    def consistency(self) -> None:
        super().consistency()
        if self.rule in ("non-inferiority", "limit") and self.margin is None:
            raise ValueError(f"rule {self.rule!r} needs a margin")
        if self.pairing == "paired" and self.against != "baseline":
            raise ValueError("pairing = 'paired' compares with the baseline (against = 'baseline')")

    def learning(self) -> Literal["value", "own", "none"]:
        """Learns per unit inside its run (see :mod:`service.gate.checks.margins`)."""
        return "own"

    def bad_side(self) -> Literal["upper", "lower"]:
        """The learned quantity is the oriented gain: bad when low."""
        return "lower"


@dataclass(frozen=True)
class UnitResult:
    unit: Unit
    rows: int
    comparison: Comparison | None
    tests: BoundaryTest | None
    error: str | None = None
    #: Too few positives or negatives: reported as underpowered, not tested.
    short: bool = False


def _boundary(config: QualityConfig, margin: float | None = None) -> float:
    """The boundary of the gain: ``-margin`` (non-inferiority, limit) or ``+margin``."""
    margin = (config.margin or 0.0) if margin is None else margin
    return margin if config.rule == "superiority" else -margin


def _rng(ctx: CheckContext, config: QualityConfig, unit: Unit) -> np.random.Generator:
    return np.random.default_rng([ctx.seed, zlib.crc32(f"{config.name}|{unit.label}".encode())])


def _side(
    sample: Sample, rows: np.ndarray | None, score_column: str, config: QualityConfig
) -> Side:
    groups = None
    n_groups = 0
    if is_ranking(config.metric):
        column = sample.column("group")
        assert column is not None
        codes = codes_of(column, "group")
        groups, n_groups = take(codes.codes, rows), codes.n_values
    return Side(
        label=take(sample.columns["label"], rows),
        score=take(sample.columns[score_column], rows),
        groups=groups,
        n_groups=n_groups,
    )


def _finite(sample: Sample, columns: tuple[str, ...]) -> np.ndarray | None:
    return finite_rows([sample.columns[name] for name in columns])


def _subset(side: Side, rows: np.ndarray | None) -> Side:
    if rows is None:
        return side
    return Side(
        label=side.label[rows],
        score=side.score[rows],
        groups=None if side.groups is None else side.groups[rows],
        n_groups=side.n_groups,
    )


def _fmt(x: float) -> str:
    return f"{x:+.4g}"


@register("quality", QualityConfig, family="quality", needs_other=False)
def run_quality(config: QualityConfig, ctx: CheckContext) -> list[Finding]:
    name = label_of(config.metric, config.k)
    sample = ctx.candidate.sample
    if sample is None or sample.column("label") is None:
        return [
            skipped(
                config, f"{name}: the candidate's sample has no labels", statistic=config.metric
            )
        ]
    if is_ranking(config.metric) and sample.column("group") is None:
        return [
            skipped(config, f"{name}: the sample has no 'group' column", statistic=config.metric)
        ]
    opts = Options(
        metric=config.metric,
        k=config.k,
        gain=config.gain,
        bins=config.bins,
        confidence=config.confidence,
        method=config.method,
        resamples=config.resamples,
    )
    has_pairs = sample.column("baseline_score") is not None
    other = ctx.other.sample if ctx.other is not None else None
    paired = config.against == "baseline" and has_pairs and config.pairing != "unpaired"
    if config.pairing == "paired" and not paired:
        return [
            skipped(
                config,
                f"{name}: pairing = 'paired' but the sample has no baseline_score",
                statistic=config.metric,
            )
        ]
    usable_other = (
        other is not None
        and other.column("label") is not None
        and (not is_ranking(config.metric) or other.column("group") is not None)
    )
    columns = ("score", "label", "baseline_score") if paired else ("score", "label")
    keep = _finite(sample, columns)
    rows_used = len(sample) if keep is None else keep.size
    cand_all = _side(sample, keep, "score", config)
    if not paired and not usable_other:
        return floor_only(config, ctx, name, cand_all, opts)
    layout = split(sample, config.segments, config.min_segment_rows, keep=keep)
    if paired:
        base_all = Side(
            label=cand_all.label,
            score=take(sample.columns["baseline_score"], keep),
            groups=cand_all.groups,
            n_groups=cand_all.n_groups,
        )
        other_keep = None
    else:
        assert other is not None
        other_keep = _finite(other, ("score", "label"))
        base_all = _side(other, other_keep, "score", config)
    # Paired AUC: one sort per score serves all rows and every segment value.
    fast: dict[str, Comparison | str] = {}
    if paired and config.metric == "auc" and config.method == "auto":
        fast = paired_auc_units(sample, cand_all, base_all, layout.units, keep, opts, rows_used)
    results: list[UnitResult] = []
    for unit in layout.units:
        rows = rows_used if unit.rows is None else unit.rows.size
        labels = cand_all.label if unit.rows is None else cand_all.label[unit.rows]
        short = too_few_classes(
            config.metric,
            labels,
            min_positives=config.min_positives,
            min_negatives=config.min_negatives,
        )
        if short is not None:
            if unit.label == ALL:
                return [_underpowered_all(config, name, paired, short, rows_used)]
            results.append(UnitResult(unit, rows, None, None, error=short, short=True))
            continue
        try:
            if unit.label in fast:
                known = fast[unit.label]
                if isinstance(known, str):
                    raise ValueError(known)
                comparison = known
            elif paired:
                cand = _subset(cand_all, unit.rows)
                base = _subset(base_all, unit.rows)
                comparison = compare_paired(cand, base, opts, _rng(ctx, config, unit))
            else:
                assert other is not None
                cand = _subset(cand_all, unit.rows)
                rows_other = matching_rows(other, unit, keep=other_keep)
                base = _subset(base_all, rows_other)
                comparison = compare_unpaired(cand, base, opts, _rng(ctx, config, unit))
        except ValueError as exc:
            if unit.label == ALL:
                raise
            results.append(UnitResult(unit, rows, None, None, error=str(exc)))
            continue
        results.append(UnitResult(unit, rows, comparison, None))
    plan = ctx.policy.learn_plan(config)
    if plan is not None and config.against == "baseline":
        plan = dataclasses.replace(plan, steps=ctx.steps)
    ran = [r for r in results if r.comparison is not None]
    # The check's share of the budget is split over its units (and the leak guard): Bonferroni.
    guards = 1 if plan is not None or config.max_gain is not None else 0
    unit_plan = plan
    if plan is not None and plan.level is not None:  # method budget: split the share over units
        unit_plan = plan.at_level(plan.level / max(1, len(ran) + guards))
    margins = {
        r.unit.label: unit_margin(
            check=config.name,
            unit=r.unit.label,
            rule=config.rule,
            stated=config.margin or 0.0,
            plan=unit_plan,
            history=ctx.history,
            now=ctx.now,
            warm_up=config.warm_up_margin,
        )
        for r in ran
    }
    leak = leak_limit(
        check=config.name,
        stated=config.max_gain,
        plan=unit_plan,
        history=ctx.history,
        now=ctx.now,
    )
    sign = DIRECTION[config.metric]
    tested = [
        dataclasses.replace(
            r,
            tests=against_boundary(
                r.comparison.test,
                _boundary(config, margins[r.unit.label].margin),
                sign=sign,
            ),
        )
        if r.comparison is not None
        else r
        for r in results
    ]
    return [
        _finding(
            config,
            name,
            paired,
            tested,
            layout.too_small,
            layout.missing_columns,
            rows_used,
            len(sample),
            margins,
            leak,
        )
    ]


def _underpowered_all(
    config: QualityConfig, name: str, paired: bool, why: str, rows: int
) -> Finding:
    """All rows have too few positives or negatives: underpowered, with the counts."""
    return Finding(
        check=config.name,
        kind=config.kind,
        outcome="underpowered",
        statistic=f"{config.metric} change",
        message=f"{name} on all {rows} rows ({'paired' if paired else 'unpaired'}): {why}",
        blocking=config.blocking,
        against=config.against,
        details={"rule": config.rule, "margin": config.margin, "rows_used": rows},
    )


def _outcome(
    config: QualityConfig,
    test: ChangeTest,
    gain: float,
    p_above: float,
    p_below: float,
    margin: float,
    leak: float | None,
) -> str:
    """One unit's verdict: leak, breach, ok, inconclusive or underpowered (module docstring
    of :mod:`service.gate.checks.margins`)."""
    alpha = (1.0 - config.confidence) / 2.0
    if leak is not None and gain > leak:
        return "leak"
    if config.rule == "limit":
        return "breach" if gain < _boundary(config, margin) else "ok"
    if test.se == 0:
        # No change on any resample or component (the candidate scores the rows as the
        # baseline does) is known exactly; any other change without a measured uncertainty
        # is not certainty.
        return _outcome_of_zero(config, gain, margin)
    if p_above < alpha:
        return "ok"
    if p_below < alpha:
        return "breach"
    mde = minimum_detectable_effect(test.se, confidence=config.confidence, power=config.power)
    if config.rule == "non-inferiority" and mde > margin:
        return "underpowered"
    return "inconclusive"


def _finding(
    config: QualityConfig,
    name: str,
    paired: bool,
    results: list[UnitResult],
    too_small: list[dict[str, object]],
    missing: list[str],
    rows_used: int,
    rows_total: int,
    margins: dict[str, UnitMargin],
    leak: tuple[float | None, str, dict[str, Any]],
) -> Finding:
    sign = DIRECTION[config.metric]
    ran = [r for r in results if r.comparison is not None and r.tests is not None]
    # Claims of a regression are adjusted over the family (they hold the push); "ok" needs every
    # unit shown within the margin, an intersection-union test that needs no adjustment
    # (Berger 1982), so the raw p-values decide it.
    p_above = [r.tests.p_above for r in ran]  # type: ignore[union-attr]
    p_below = adjust([r.tests.p_below for r in ran], config.correction)  # type: ignore[union-attr]
    leak_at, leak_why, leak_evidence = leak
    table: list[dict[str, Any]] = []
    verdicts: dict[str, str] = {}
    learn: dict[str, float] = {}
    for r, pa, pb in zip(ran, p_above, p_below, strict=True):
        assert r.comparison is not None and r.tests is not None
        c = r.comparison
        low, high = oriented_interval(c.test, sign)
        gain = sign * c.test.estimate
        margin = margins[r.unit.label]
        guard = leak_at if r.unit.label == ALL else None
        verdict = _outcome(config, c.test, gain, float(pa), float(pb), margin.margin, guard)
        verdicts[r.unit.label] = verdict
        learn[r.unit.label] = low if config.rule == "non-inferiority" else gain
        if r.unit.label == ALL:
            learn[GAIN_KEY] = gain
        table.append(
            {
                "segment": r.unit.label,
                "rows": r.rows,
                "n": c.test.n_candidate,
                "counts": c.units,
                "candidate": c.candidate_value,
                "baseline": c.baseline_value,
                "change": c.test.estimate,
                "interval": list(c.test.interval),
                "pvalue": r.tests.p_above if config.rule != "limit" else c.test.pvalue,
                "p_worse": r.tests.p_below,
                "p_worse_adjusted": float(pb),
                "gain_interval": [low, high],
                "mde": minimum_detectable_effect(
                    c.test.se, confidence=config.confidence, power=config.power
                ),
                "margin": margin.margin,
                "margin_source": margin.source,
                "outcome": _shown(verdict),
            }
        )
    for r in results:
        if r.comparison is None:
            table.append(
                {
                    "segment": r.unit.label,
                    "rows": r.rows,
                    "outcome": "underpowered" if r.short else "skipped",
                    "error": r.error,
                }
            )
            if r.short:
                verdicts[r.unit.label] = "underpowered"
    whole = ran[0]
    assert whole.unit.label == ALL and whole.comparison is not None and whole.tests is not None
    test = whole.comparison.test
    gain = sign * test.estimate
    mde = minimum_detectable_effect(test.se, confidence=config.confidence, power=config.power)
    used = margins[ALL]
    limit = sign * _boundary(config, used.margin)  # the boundary in the metric's own units
    problems = bound_problems(config, name, whole.comparison.candidate_value)
    by = {kind: [lab for lab, v in verdicts.items() if v == kind] for kind in _VERDICTS}
    conf = f"{config.confidence:.0%}"
    low, high = test.interval
    what = "change" if config.metric != "calibration_ratio" else "change in distance from 1"
    head = (
        f"{name} {whole.comparison.candidate_value:.4g} vs {config.against} "
        f"{whole.comparison.baseline_value:.4g} ({'paired' if paired else 'unpaired'}, "
        f"{test.n_candidate} {whole.comparison.units}): {what} {_fmt(test.estimate)}, "
        f"{conf} CI [{_fmt(low)}, {_fmt(high)}]"
    )
    margin_text = _margin_text(used)
    if by["leak"]:
        outcome = "breach"
        tail = f"gain above the leak limit {leak_at:.4g} ({leak_why}): a label may have leaked"
    elif problems or by["breach"]:
        outcome = "breach"
        parts = list(problems)
        if by["breach"]:
            parts.append(_breach_text(config, by["breach"], margin_text))
        tail = "; ".join(parts)
    elif by["zero-se"] or by["inconclusive"]:
        outcome = "inconclusive"
        parts = []
        if by["zero-se"]:
            parts.append(
                f"standard error 0{where(by['zero-se'])}: the data cannot measure its "
                "uncertainty, which is not certainty"
            )
        if by["inconclusive"]:
            parts.append(
                f"cannot tell against the {margin_text}{where(by['inconclusive'])}: the "
                f"interval straddles it (detectable change at this size: {mde:.3g})"
            )
        tail = "; ".join(parts)
    elif by["underpowered"]:
        outcome = "underpowered"
        tail = (
            f"underpowered{where(by['underpowered'])}: too small to decide against the "
            f"{margin_text} (detectable change on all rows: {mde:.3g}); see details.segments"
        )
    else:
        outcome = "ok"
        tail = _ok_text(config, margin_text)
    details: dict[str, Any] = {
        "rule": config.rule,
        "margin": config.margin,
        "margin_used": used.margin,
        "margin_source": used.source,
        "margin_why": used.description,
        "learned_change": used.learned,
        "learning": used.evidence,
        "confidence": config.confidence,
        "method": test.method,
        "mode": "paired" if paired else "unpaired",
        "mde": mde,
        "power": config.power,
        "null": _null_text(config),
        "p_worse": whole.tests.p_below,
        "gain": gain,
        "rows_used": rows_used,
        "rows_dropped": rows_total - rows_used,
        "correction": config.correction if len(ran) > 1 else None,
        "segments": table if len(results) > 1 or too_small else [],
        "too_small": too_small,
        "missing_segment_columns": missing,
        "learn": learn,
    }
    if leak_at is not None:
        details.update({"max_gain": leak_at, "leak_why": leak_why, "leak_learning": leak_evidence})
    return Finding(
        check=config.name,
        kind=config.kind,
        outcome=outcome,  # type: ignore[arg-type]
        statistic=f"{config.metric} change",
        value=test.estimate,
        limit=limit,
        pvalue=whole.tests.p_above if config.rule != "limit" else test.pvalue,
        baseline_value=whole.comparison.baseline_value,
        candidate_value=whole.comparison.candidate_value,
        interval=test.interval,
        message=f"{head}; {tail}",
        blocking=config.blocking,
        against=config.against,
        details=details,
    )


def _outcome_of_zero(config: QualityConfig, gain: float, margin: float) -> str:
    if gain == 0.0:
        return "ok" if config.rule != "superiority" or margin == 0.0 else "breach"
    return "zero-se"


_VERDICTS = ("leak", "breach", "zero-se", "inconclusive", "underpowered", "ok")


def _shown(verdict: str) -> str:
    return {"leak": "breach", "zero-se": "inconclusive"}.get(verdict, verdict)


def _margin_text(margin: UnitMargin) -> str:
    if margin.source == "learned":
        return f"learned margin {margin.margin:.4g} (stated {margin.stated:g})"
    if margin.source == "warm-up":
        return f"warm-up margin {margin.margin:g} (still learning)"
    return f"margin {margin.margin:g}"


def _breach_text(config: QualityConfig, units: list[str], margin: str) -> str:
    place = where(units)
    if config.rule == "non-inferiority":
        return f"worse than the {config.against} by more than the {margin}{place}"
    if config.rule == "superiority":
        return f"shown not better than the {config.against} by {config.margin or 0:g}{place}"
    return f"point estimate worse than the {config.against} by more than the {margin}{place}"


def _ok_text(config: QualityConfig, margin: str) -> str:
    if config.rule == "non-inferiority":
        return f"non-inferior within the {margin}"
    if config.rule == "superiority":
        return f"better than the {config.against} by more than {config.margin or 0:g}"
    return f"within the limit: {margin}"


def _null_text(config: QualityConfig) -> str:
    if config.rule == "non-inferiority":
        return "pvalue tests H0: the candidate is worse by at least the margin"
    if config.rule == "superiority":
        return "pvalue tests H0: the candidate is not better by more than the margin"
    return "pvalue tests H0: no change (two-sided)"
