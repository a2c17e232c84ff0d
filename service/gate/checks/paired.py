"""Paired change: the candidate and the serving baseline scored the same rows.

Kind ``paired``; needs ``baseline_score`` in the candidate's sample (no labels needed). It asks
how much the model's output moved on identical inputs, which drift on two different samples
cannot separate from a change in traffic:

- ``mean_abs_change``: mean of ``|score - baseline_score|``; breach above ``max``.
- ``spearman``: Spearman rank correlation of the two scores; breach below ``min``.
- ``churn``: share of rows whose decision ``score >= threshold`` flips (with ``threshold``), or
  share of each group's top ``top_k`` places that go to rows outside the baseline's top k (with
  ``top_k``; needs ``group``); breach above ``max``.

Limits are on the point estimate (an effect size); the interval is reported beside it. With
``segments`` the statistic is also computed per segment value and any unit over its limit is a
breach (these are limits on estimates, not tests, so no p-values are adjusted).
"""

from __future__ import annotations

from typing import Any, Literal

import numpy as np
from pydantic import Field

from service.gate.adaptive import Transform
from service.gate.checks.base import CheckContext, register, skipped
from service.gate.checks.memo import codes_of, finite_rows, order_of, take
from service.gate.checks.segments import SegmentKeys, split, where
from service.gate.types import Finding
from service.stats import agreement

LABELS = {
    "mean_abs_change": "mean absolute score change",
    "spearman": "Spearman rank correlation",
    "churn": "churn",
}


class PairedConfig(SegmentKeys):
    kind: Literal["paired"]
    statistic: Literal["mean_abs_change", "spearman", "churn"] = Field(
        description="mean_abs_change, spearman or churn."
    )
    max: float | None = Field(
        None, ge=0, description="Largest allowed value (mean_abs_change, churn)."
    )
    min: float | None = Field(None, ge=-1, le=1, description="Smallest allowed value (spearman).")
    threshold: float | None = Field(None, description="Churn: the decision is score >= threshold.")
    top_k: int | None = Field(None, ge=1, description="Churn: compare each group's top k rows.")
    confidence: float = Field(
        0.95, ge=0.5, lt=1, description="Two-sided confidence of the interval."
    )

    def consistency(self) -> None:
        super().consistency()
        if self.against != "baseline":
            raise ValueError("paired checks compare with the baseline (against = 'baseline')")
        if self.statistic == "spearman":
            if self.min is None or self.max is not None:
                raise ValueError("spearman takes 'min' (the lowest allowed correlation), not 'max'")
        elif self.max is None or self.min is not None:
            raise ValueError(f"{self.statistic} takes 'max', not 'min'")
        if self.statistic == "churn":
            if (self.threshold is None) == (self.top_k is None):
                raise ValueError("churn needs exactly one of 'threshold' or 'top_k'")
        elif self.threshold is not None or self.top_k is not None:
            raise ValueError("'threshold' and 'top_k' go with statistic = 'churn'")

    def bad_side(self) -> Literal["upper", "lower"]:
        """A low rank correlation is bad; a high change or churn is bad (learned limits)."""
        return "lower" if self.statistic == "spearman" else "upper"

    def natural_transform(self) -> Transform:
        """A correlation near 1 on log(1 - rho); a change or churn (non-negative) on the log."""
        return "log1m" if self.statistic == "spearman" else "log"


def _compute(
    config: PairedConfig,
    cand: np.ndarray,
    base: np.ndarray,
    groups: np.ndarray | None,
    whole: bool,
) -> agreement.AgreementResult:
    if config.statistic == "mean_abs_change":
        return agreement.mean_abs_change(cand, base, confidence=config.confidence)
    if config.statistic == "spearman":
        # On all rows the sort orders are shared with other checks (see memo).
        orders = (order_of(cand), order_of(base)) if whole else None
        return agreement.spearman(cand, base, confidence=config.confidence, orders=orders)
    if config.threshold is not None:
        return agreement.threshold_churn(
            cand, base, threshold=config.threshold, confidence=config.confidence
        )
    assert groups is not None and config.top_k is not None
    return agreement.top_k_churn(groups, cand, base, k=config.top_k, confidence=config.confidence)


def _over(config: PairedConfig, value: float) -> bool:
    if config.statistic == "spearman":
        return value < config.min  # type: ignore[operator]
    return value > config.max  # type: ignore[operator]


@register("paired", PairedConfig, family="paired change", needs_other=False)
def run_paired(config: PairedConfig, ctx: CheckContext) -> list[Finding]:
    label = LABELS[config.statistic]
    if config.top_k is not None:
        label = f"top-{config.top_k} churn"
    elif config.threshold is not None:
        label = f"churn at {config.threshold:g}"
    sample = ctx.candidate.sample
    if sample is None or sample.column("baseline_score") is None:
        return [
            skipped(
                config, f"{label}: the sample has no baseline_score", statistic=config.statistic
            )
        ]
    if config.top_k is not None and sample.column("group") is None:
        return [
            skipped(
                config, f"{label}: the sample has no 'group' column", statistic=config.statistic
            )
        ]
    keep = finite_rows([sample.score, sample.columns["baseline_score"]])
    rows_used = len(sample) if keep is None else keep.size
    cand_all = take(sample.score, keep)
    base_all = take(sample.columns["baseline_score"], keep)
    groups_all = None
    if config.top_k is not None:
        groups_all = take(codes_of(sample.columns["group"], "group").codes, keep)
    layout = split(sample, config.segments, config.min_segment_rows, keep=keep)
    rows: list[dict[str, Any]] = []
    over: list[str] = []
    whole: agreement.AgreementResult | None = None
    for unit in layout.units:
        idx = unit.rows
        cand = cand_all if idx is None else cand_all[idx]
        base = base_all if idx is None else base_all[idx]
        groups = groups_all if idx is None or groups_all is None else groups_all[idx]
        try:
            result = _compute(config, cand, base, groups, idx is None)
        except ValueError as exc:
            if idx is None:
                raise
            rows.append(
                {
                    "segment": unit.label,
                    "rows": int(cand.size),
                    "outcome": "skipped",
                    "error": str(exc),
                }
            )
            continue
        if whole is None:
            whole = result
        breach = _over(config, result.statistic)
        if breach:
            over.append(unit.label)
        rows.append(
            {
                "segment": unit.label,
                "rows": int(cand.size),
                "value": result.statistic,
                "interval": list(result.interval),
                "outcome": "breach" if breach else "ok",
            }
        )
    assert whole is not None
    limit = config.min if config.statistic == "spearman" else config.max
    assert limit is not None
    word = "below" if config.statistic == "spearman" else "above"
    low, high = whole.interval
    counted = "places" if config.top_k else "rows"
    head = (
        f"{label} {whole.statistic:.4g} vs baseline on {whole.n} {counted} "
        f"({config.confidence:.0%} CI [{low:.4g}, {high:.4g}])"
    )
    if over:
        message = f"{head}; {word} the limit {limit:g}{where(over)}"
    else:
        message = f"{head}; within the limit {limit:g}"
    return [
        Finding(
            check=config.name,
            kind=config.kind,
            outcome="breach" if over else "ok",
            statistic=config.statistic,
            value=whole.statistic,
            limit=limit,
            interval=whole.interval,
            message=message,
            blocking=config.blocking,
            against=config.against,
            details={
                "rows_used": rows_used,
                "rows_dropped": len(sample) - rows_used,
                "segments": rows if len(rows) > 1 or layout.too_small else [],
                "too_small": layout.too_small,
                "missing_segment_columns": layout.missing_columns,
                "threshold": config.threshold,
                "top_k": config.top_k,
            },
        )
    ]
