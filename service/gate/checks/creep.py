"""Creep: the change accumulated along the promotion chain, measured on paired rows.

A slow creep moves the model by steps that each pass against the baseline. Comparing the
candidate's sample with a reference's sample from hours earlier sees the creep, but through the
noise of two different sets of rows and through every healthy change of the data over those
hours (a daily cycle moves the mean score and the base rate). This check instead adds up precise
paired steps:

- each push's **step** is measured on its own rows, scored by the candidate and by the serving
  baseline (``score`` and ``baseline_score``): ``mean_logit`` is the mean of
  ``logit(score) - logit(baseline_score)`` (a shift of calibration in the large), ``log_spread``
  the log of the ratio of the standard deviations of the two logits (a model growing more or
  less confident);
- the check's value is the candidate's step plus the steps of the healthy promotions trained in
  the last ``hours`` of watermark (default: the policy's ``[reference] lag_hours``). Each of
  those steps was measured against the baseline it replaced, so the sum telescopes: it estimates
  the candidate's change against the baseline of ``hours`` of training earlier, with the noise
  of paired means only. The chain is walked from the current baseline down through the
  baselines each one replaced (each finding keeps its baseline's watermark), so held snapshots
  and promotions that a rollback took off the chain are never summed;
- the limit is learned under the policy's ``[budget]`` from the same sums on the model's healthy
  history, two-sided, the check's share of the budget split between the two tails (a robust
  fit: median and Qn, :func:`service.stats.robust.tail_limit`); only sums trained before the
  window count, so a creep's own promoted sums cannot widen the limit while it goes on; before
  ``min_history`` such sums exist (warm-up), or without a budget, the static ``max`` on the
  absolute sum holds.

A healthy stream's sums stay within the spread its history shows; a creep's grow every push.
With a logit scale the scores must lie strictly between 0 and 1 (other rows are left out);
``scale = "raw"`` uses the scores as they are. The method is the paired difference of means
(common practice, no published source for the chain sum); the learned limit follows
:mod:`service.gate.adaptive`.
"""

from __future__ import annotations

import math
from datetime import datetime, timedelta
from typing import Literal

import numpy as np
from pydantic import Field

from service.gate.checks.base import CheckConfig, CheckContext, register, skipped
from service.gate.history import learn_key, select_history
from service.gate.types import Finding, HistoryEntry
from service.stats import robust

_LABEL = {
    "mean_logit": "mean logit change",
    "log_spread": "log spread ratio",
}


class CreepConfig(CheckConfig):
    kind: Literal["creep"]
    statistic: Literal["mean_logit", "log_spread"] = Field(
        description="mean_logit (shift of the mean logit) or log_spread (log ratio of spreads)."
    )
    scale: Literal["logit", "raw"] = Field(
        "logit", description="logit: scores are probabilities in (0, 1); raw: use them as is."
    )
    hours: float | None = Field(
        None,
        gt=0,
        description="Sum the steps of the last this many hours of training (watermark); "
        "default: the policy's [reference] lag_hours.",
    )
    max: float = Field(
        gt=0, description="Static limit on the absolute sum (warm-up, or without a budget)."
    )
    min_rows: int = Field(100, ge=2, description="Fewer usable paired rows: inconclusive.")

    def consistency(self) -> None:
        super().consistency()
        if self.against != "baseline":
            raise ValueError("creep sums paired steps against the baseline; drop 'against'")
        if self.adaptive is not None:
            raise ValueError("creep learns its limit from the [budget]; drop 'adaptive'")

    def learning(self) -> Literal["value", "own", "none"]:
        return "own"


def _step(config: CreepConfig, score: np.ndarray, base: np.ndarray) -> tuple[float, int]:
    """The candidate's paired step and the number of rows it used."""
    ok = np.isfinite(score) & np.isfinite(base)
    if config.scale == "logit":
        ok &= (score > 0) & (score < 1) & (base > 0) & (base < 1)
    s, b = score[ok], base[ok]
    if config.scale == "logit":
        s, b = np.log(s / (1 - s)), np.log(b / (1 - b))
    n = int(s.size)
    if n < 2:
        return math.nan, n
    if config.statistic == "mean_logit":
        return float(np.mean(s - b)), n
    sd_s, sd_b = float(np.std(s)), float(np.std(b))
    if sd_s <= 0 or sd_b <= 0:
        return math.nan, n
    return math.log(sd_s / sd_b), n


def _in_window(entry: HistoryEntry, ctx: CheckContext, hours: float) -> bool:
    """Whether *entry* was trained (or, without watermarks, posted) within the window."""
    mark = ctx.candidate.trained_until
    if mark is not None and entry.trained_until is not None:
        return mark - timedelta(hours=hours) < entry.trained_until < mark
    return ctx.now - timedelta(hours=hours) < entry.created_at <= ctx.now


def _chain(
    config: CreepConfig, ctx: CheckContext, hours: float, base_mark: datetime | None
) -> list[float]:
    """The steps of the baseline and its ancestors trained within the window, newest first.

    Each finding stores the watermark of the baseline it was judged against
    (``learn.baseline_until``), so the chain is walked from the current baseline down through
    the baselines each one replaced: a promotion that a rollback took off the chain is never
    an ancestor. Watermarks identify snapshots (lineage makes them strictly increasing).
    Without a watermark the candidate falls back to every healthy promotion in the window.
    """
    step_key = learn_key(config.name, "step")
    up_key = learn_key(config.name, "baseline_until")
    healthy = [e for e in ctx.history if e.healthy and step_key in e.values]
    mark = ctx.candidate.trained_until
    if mark is None or base_mark is None:
        return [e.values[step_key] for e in healthy if _in_window(e, ctx, hours)]
    by_mark = {e.trained_until.timestamp(): e for e in healthy if e.trained_until is not None}
    floor = (mark - timedelta(hours=hours)).timestamp()
    steps: list[float] = []
    at: float | None = base_mark.timestamp()
    while at is not None and at > floor:
        entry = by_mark.get(at)
        if entry is None:
            break
        steps.append(entry.values[step_key])
        below = entry.values.get(up_key)
        at = below if below is not None and below < at else None
    return steps


@register("creep", CreepConfig, family="history", needs_other=False)
def run_creep(config: CreepConfig, ctx: CheckContext) -> list[Finding]:
    sample = ctx.candidate.sample
    score = None if sample is None else sample.column("score")
    base = None if sample is None else sample.column("baseline_score")
    if score is None or base is None:
        return [
            skipped(
                config,
                "the sample does not carry both score and baseline_score",
                statistic=config.statistic,
            )
        ]
    hours = config.hours if config.hours is not None else ctx.policy.reference.lag_hours
    if hours is None:
        return [
            skipped(
                config,
                "no window: set hours in the check or [reference] lag_hours in the policy",
                statistic=config.statistic,
            )
        ]
    label = _LABEL[config.statistic]

    def finding(outcome: str, message: str, **fields: object) -> Finding:
        return Finding(
            check=config.name,
            kind=config.kind,
            outcome=outcome,  # type: ignore[arg-type]
            statistic=config.statistic,
            message=message,
            blocking=config.blocking,
            against=None,
            **fields,  # type: ignore[arg-type]
        )

    step, n = _step(config, score, base)
    if n < config.min_rows or not math.isfinite(step):
        return [
            finding(
                "inconclusive",
                f"{label}: only {n} usable paired rows ({config.min_rows} needed) or no spread",
            )
        ]
    base_mark = ctx.baseline.trained_until if ctx.baseline is not None else None
    chain = _chain(config, ctx, hours, base_mark)
    total = step + float(sum(chain))
    details: dict[str, object] = {
        "step": step,
        "rows": n,
        "hours": hours,
        "chain_steps": len(chain),
        "learn": {"step": step, "sum": total}
        | ({"baseline_until": base_mark.timestamp()} if base_mark is not None else {}),
    }
    where = f"{label} over the last {hours:g} h of training ({len(chain) + 1} steps)"
    plan = ctx.policy.learn_plan(config)
    sum_key = learn_key(config.name, "sum")
    bounds: dict[str, float] = {}
    why = f"static limit {config.max:g} (no [budget] in the policy)"
    if plan is not None and plan.level is not None:
        # Learn from sums trained before the window only: a creep's own promoted sums (inside
        # the window) would otherwise widen the limit as the creep goes on.
        def value_of(entry: HistoryEntry) -> float | None:
            return None if _in_window(entry, ctx, hours) else entry.values.get(sum_key)

        selection = select_history(
            ctx.history,
            value_of,
            now=ctx.now,
            window=plan.window,
            window_hours=plan.window_hours,
            include_overridden=plan.include_overridden,
        )
        details.update(
            {"level": plan.level, "history_used": len(selection.values)},
        )
        if len(selection.values) >= plan.min_history:
            # The check's share of the budget, split between the two tails.
            for side in ("upper", "lower"):
                fit = robust.tail_limit(selection.values, level=plan.level / 2, side=side)
                if fit.limit is not None:
                    bounds[side] = fit.limit
            why = (
                f"learned from {len(selection.values)} healthy sums at 1 in "
                f"{2 / plan.level:,.0f} per side"
            )
        else:
            why = (
                f"warm-up: {len(selection.values)} of {plan.min_history} healthy sums; static "
                f"limit {config.max:g}"
            )
    details["bounds"] = bounds
    if bounds:
        upper, lower = bounds.get("upper", math.inf), bounds.get("lower", -math.inf)
        beyond = total > upper or total < lower
        limit = upper if total >= 0 else lower
        shown = f"[{lower:+.4g}, {upper:+.4g}]"
    else:
        beyond = abs(total) > config.max
        limit = math.copysign(config.max, total)
        shown = f"[{-config.max:+.4g}, {config.max:+.4g}]"
    text = f"{where}: {total:+.4g} (this push {step:+.4g})"
    if beyond:
        return [
            finding(
                "breach",
                f"creep: {text} is outside {shown} ({why})",
                value=total,
                limit=limit,
                details=details,
            )
        ]
    return [
        finding("ok", f"{text}, within {shown} ({why})", value=total, limit=limit, details=details)
    ]
