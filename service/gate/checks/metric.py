"""Reported metrics: numbers the trainer computed itself (``metrics`` in the post).

A metric has a direction (``higher`` or ``lower`` is better). The candidate breaches when it is
worse than the other snapshot by more than ``max_drop`` (absolute) or ``max_relative_drop``
(relative to the other's value), or when it crosses the ``floor`` (for higher-is-better) or the
``ceiling`` (for lower-is-better). Floors and ceilings apply even without a baseline.
"""

from __future__ import annotations

from typing import Literal

from pydantic import Field

from service.gate.checks.base import CheckConfig, CheckContext, register
from service.gate.types import Finding


class MetricConfig(CheckConfig):
    kind: Literal["metric"]
    metric: str = Field(min_length=1, description="Name of the reported metric.")
    direction: Literal["higher", "lower"] = Field(description="Which way is better.")
    max_drop: float | None = Field(None, ge=0, description="Largest allowed worsening, absolute.")
    max_relative_drop: float | None = Field(
        None, ge=0, description="Largest allowed worsening relative to the other's value."
    )
    floor: float | None = Field(None, description="Lowest acceptable value (direction=higher).")
    ceiling: float | None = Field(None, description="Highest acceptable value (direction=lower).")
    required: bool = Field(True, description="A candidate that does not report it is a breach.")

    def consistency(self) -> None:
        super().consistency()
        if self.floor is not None and self.direction != "higher":
            raise ValueError("floor goes with direction = 'higher'")
        if self.ceiling is not None and self.direction != "lower":
            raise ValueError("ceiling goes with direction = 'lower'")
        if (
            self.max_drop is None
            and self.max_relative_drop is None
            and self.floor is None
            and self.ceiling is None
        ):
            raise ValueError("set at least one of max_drop, max_relative_drop, floor, ceiling")


@register("metric", MetricConfig, family="quality", needs_other=False)
def run_metric(config: MetricConfig, ctx: CheckContext) -> list[Finding]:
    name = config.metric
    cand = ctx.candidate.metrics.get(name)

    def finding(outcome: str, message: str, **numbers: float | None) -> Finding:
        return Finding(
            check=config.name,
            kind=config.kind,
            outcome=outcome,  # type: ignore[arg-type]
            statistic=f"{name} change",
            message=message,
            blocking=config.blocking,
            against=config.against,
            **numbers,  # type: ignore[arg-type]
        )

    if cand is None:
        if config.required:
            return [finding("breach", f"reported metric {name!r} is missing")]
        return [finding("skipped", f"reported metric {name!r} not reported")]
    problems: list[str] = []
    sign = 1.0 if config.direction == "higher" else -1.0
    if config.floor is not None and cand < config.floor:
        problems.append(f"{name} {cand:.4g} is below the floor {config.floor:g}")
    if config.ceiling is not None and cand > config.ceiling:
        problems.append(f"{name} {cand:.4g} is above the ceiling {config.ceiling:g}")
    other = ctx.other.metrics.get(name) if ctx.other is not None else None
    change: float | None = None
    limit: float | None = None
    if other is not None:
        change = cand - other
        worsening = -sign * change
        if config.max_drop is not None:
            limit = -sign * config.max_drop
            if worsening > config.max_drop:
                problems.append(
                    f"{name} {cand:.4g} vs {config.against} {other:.4g}: worse by "
                    f"{worsening:.4g}, more than {config.max_drop:g}"
                )
        if config.max_relative_drop is not None and other != 0:
            relative = worsening / abs(other)
            if relative > config.max_relative_drop:
                problems.append(
                    f"{name} {cand:.4g} vs {config.against} {other:.4g}: worse by "
                    f"{relative:.2%}, more than {config.max_relative_drop:.2%}"
                )
    if problems:
        return [
            finding(
                "breach",
                "; ".join(problems),
                value=change,
                limit=limit,
                baseline_value=other,
                candidate_value=cand,
            )
        ]
    if other is None:
        text = f"{name} {cand:.4g} (no {config.against} value to compare)"
    else:
        text = f"{name} {cand:.4g} vs {config.against} {other:.4g} (change {change:+.4g})"
    return [
        finding("ok", text, value=change, limit=limit, baseline_value=other, candidate_value=cand)
    ]
