"""History: checks that read the model's own past rather than the other snapshot's sample.

``training-volume``
    The candidate's ``rows_trained`` against the same number on recent healthy promotions, by
    robust z-score (median and 1.4826 x MAD; Iglewicz & Hoaglin 1993): a job that trained on a
    tenth of the usual rows (a broken upstream partition) or ten times as many (a replay) is a
    breach. With too little history, the static ``min_rows``/``max_rows`` bounds apply.
``baseline-age``
    The baseline serving for longer than ``max_age_hours`` (by its watermark, or by when it
    became the baseline) is flagged; advisory unless the policy makes it blocking.

Which earlier snapshots count as healthy is set out in :mod:`service.gate.history`. The
watermark-must-advance rule is a built-in lineage finding (:mod:`service.gate.checks.lineage`);
the repeated-holds ("stuck") finding is built in too (``[history]`` policy section).
"""

from __future__ import annotations

import math
from typing import Literal

from pydantic import Field

from service.gate.checks.base import CheckConfig, CheckContext, register, skipped
from service.gate.history import format_age, select_history
from service.gate.types import Finding
from service.stats import robust


class TrainingVolumeConfig(CheckConfig):
    kind: Literal["training-volume"]
    k: float = Field(3.5, gt=0, description="Largest allowed robust z-score of rows_trained.")
    side: Literal["both", "upper", "lower"] = Field(
        "both", description="Flag too many rows (upper), too few (lower) or both."
    )
    window: int = Field(50, ge=3, le=10000, description="Newest this many healthy promotions.")
    window_hours: float | None = Field(
        None, gt=0, description="Also ignore history older than this many hours."
    )
    min_history: int = Field(
        10, ge=3, le=10000, description="Fewer healthy values: use min_rows/max_rows only."
    )
    min_rows: int | None = Field(None, ge=0, description="Static lowest rows_trained.")
    max_rows: int | None = Field(None, ge=0, description="Static highest rows_trained.")
    include_overridden: bool = Field(
        False, description="Let snapshots promoted by overriding a hold count as healthy."
    )
    required: bool = Field(
        False, description="A candidate that does not report rows_trained is a breach."
    )

    def consistency(self) -> None:
        super().consistency()
        if self.min_history > self.window:
            raise ValueError("min_history must not exceed window")
        if (
            self.min_rows is not None
            and self.max_rows is not None
            and self.min_rows > self.max_rows
        ):
            raise ValueError("min_rows must not exceed max_rows")
        if self.against != "baseline":
            raise ValueError("training-volume reads the history, not the reference")
        if self.adaptive is not None:
            raise ValueError("training-volume learns from history already; drop 'adaptive'")

    def learning(self) -> Literal["value", "own", "none"]:
        return "own"


@register("training-volume", TrainingVolumeConfig, family="history", needs_other=False)
def run_training_volume(config: TrainingVolumeConfig, ctx: CheckContext) -> list[Finding]:
    rows = ctx.candidate.rows_trained

    def finding(outcome: str, message: str, **fields: object) -> Finding:
        return Finding(
            check=config.name,
            kind=config.kind,
            outcome=outcome,  # type: ignore[arg-type]
            statistic="rows_trained_robust_z",
            message=message,
            blocking=config.blocking,
            against=None,
            **fields,  # type: ignore[arg-type]
        )

    if rows is None:
        if config.required:
            return [finding("breach", "the candidate does not report rows_trained")]
        return [skipped(config, "the candidate does not report rows_trained")]
    static: list[str] = []
    if config.min_rows is not None and rows < config.min_rows:
        static.append(f"rows_trained {rows} is below min_rows {config.min_rows}")
    if config.max_rows is not None and rows > config.max_rows:
        static.append(f"rows_trained {rows} is above max_rows {config.max_rows}")
    selection = select_history(
        ctx.history,
        lambda entry: None if entry.rows_trained is None else float(entry.rows_trained),
        now=ctx.now,
        window=config.window,
        window_hours=config.window_hours,
        include_overridden=config.include_overridden,
    )
    details: dict[str, object] = {
        "rows_trained": rows,
        "history_used": len(selection.values),
        "history_needed": config.min_history,
        "excluded": dict(selection.excluded),
    }
    if len(selection.values) < config.min_history:
        why = (
            f"only {len(selection.values)} healthy promotion(s) report rows_trained (excluded: "
            f"{selection.exclusion_text()}); {config.min_history} needed"
        )
        if static:
            return [finding("breach", "; ".join(static) + f" ({why})", details=details)]
        if config.min_rows is None and config.max_rows is None:
            return [skipped(config, f"{why}, and no static min_rows/max_rows")]
        return [
            finding("ok", f"rows_trained {rows} within the static bounds ({why})", details=details)
        ]
    plan = ctx.policy.learn_plan(config)
    if plan is not None and plan.level is not None:
        return [_volume_by_budget(config, rows, selection.values, plan.level, static, details)]
    result = robust.robust_z(float(rows), selection.values)
    details.update({"median": result.median, "scale": result.scale, "scale_source": result.source})
    z = result.z
    if config.side == "upper":
        beyond = z > config.k
    elif config.side == "lower":
        beyond = z < -config.k
    else:
        beyond = abs(z) > config.k
    ztext = f"{z:+.2f}" if math.isfinite(z) else ("+inf" if z > 0 else "-inf")
    text = (
        f"rows_trained {rows} vs median {result.median:.0f} of {result.n} healthy promotions: "
        f"robust z {ztext}"
    )
    if not math.isfinite(z):
        text += " (the history has no spread at all)"
    if beyond:
        static.append(f"{text}, beyond {config.k:g}")
    if static:
        return [finding("breach", "; ".join(static), value=z, limit=config.k, details=details)]
    return [
        finding("ok", f"{text} (within {config.k:g})", value=z, limit=config.k, details=details)
    ]


def _volume_by_budget(
    config: TrainingVolumeConfig,
    rows: int,
    history: tuple[float, ...],
    level: float,
    static: list[str],
    details: dict[str, object],
) -> Finding:
    """rows_trained against limits at the check's share of the false-hold budget: the tails
    of a robust fit (median, Qn) of log rows_trained (volumes vary by factors, so the log is
    the natural scale), the level split over the flagged sides."""
    logs = [math.log(v) for v in history if v > 0]
    sides: list[Literal["upper", "lower"]] = (
        ["upper", "lower"] if config.side == "both" else [config.side]
    )
    share = level / len(sides)
    bounds: dict[str, float] = {}
    if len(logs) >= 3:
        for side in sides:
            fit = robust.tail_limit(logs, level=share, side=side)
            if fit.limit is not None:
                bounds[side] = math.exp(fit.limit)
    details.update({"level": level, "bounds": bounds, "history_values": len(logs)})
    problems = list(static)
    value = math.log(rows) if rows > 0 else -math.inf
    if "upper" in bounds and rows > bounds["upper"]:
        problems.append(f"rows_trained {rows} is above the learned limit {bounds['upper']:.0f}")
    if "lower" in bounds and rows < bounds["lower"]:
        problems.append(f"rows_trained {rows} is below the learned limit {bounds['lower']:.0f}")
    shown = ", ".join(f"{side} {bound:.0f}" for side, bound in sorted(bounds.items()))
    why = (
        f"learned from {len(logs)} healthy promotions at 1 in {1 / share:,.0f} per side"
        if bounds
        else "the history has no spread; only the static bounds apply"
    )
    return Finding(
        check=config.name,
        kind=config.kind,
        outcome="breach" if problems else "ok",
        statistic="log_rows_trained",
        value=value if math.isfinite(value) else None,
        limit=math.log(bounds["upper"]) if "upper" in bounds else None,
        message="; ".join(problems) + f" ({why})"
        if problems
        else f"rows_trained {rows} within the learned limits ({shown}; {why})",
        blocking=config.blocking,
        against=None,
        details=details,
    )


class BaselineAgeConfig(CheckConfig):
    kind: Literal["baseline-age"]
    blocking: bool = Field(
        False, description="A breach holds the candidate; false (the default here): advisory."
    )
    max_age_hours: float = Field(gt=0, description="Largest allowed age of the baseline, hours.")
    age_from: Literal["watermark", "promotion"] = Field(
        "watermark",
        description="Age of the baseline's data (trained_until) or since it became the baseline.",
    )

    def consistency(self) -> None:
        super().consistency()
        if self.against != "baseline":
            raise ValueError("baseline-age measures the baseline, not the reference")
        if self.adaptive is not None:
            raise ValueError("baseline-age has a fixed max_age_hours; drop 'adaptive'")

    def learning(self) -> Literal["value", "own", "none"]:
        return "none"


@register("baseline-age", BaselineAgeConfig, family="history")
def run_baseline_age(config: BaselineAgeConfig, ctx: CheckContext) -> list[Finding]:
    base = ctx.baseline
    assert base is not None  # needs_other: evaluate skips when absent
    since = None
    source = ""
    if config.age_from == "watermark" and base.trained_until is not None:
        since, source = base.trained_until, "trained until"
    elif ctx.baseline_since is not None:
        since, source = ctx.baseline_since, "baseline since"
        if config.age_from == "watermark":
            source += " (the baseline has no watermark)"
    if since is None:
        return [skipped(config, "the baseline's age is unknown (no watermark, no promotion time)")]
    age_hours = (ctx.now - since).total_seconds() / 3600.0
    old = age_hours > config.max_age_hours
    text = (
        f"serving a baseline from {format_age(age_hours * 3600)} ago ({source} {since.isoformat()})"
    )
    return [
        Finding(
            check=config.name,
            kind=config.kind,
            outcome="breach" if old else "ok",
            statistic="baseline_age_hours",
            value=age_hours,
            limit=config.max_age_hours,
            message=f"{text}, older than {config.max_age_hours:g} h"
            if old
            else f"{text} (at most {config.max_age_hours:g} h)",
            blocking=config.blocking,
            against="baseline",
        )
    ]
