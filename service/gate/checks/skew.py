"""Offline/online skew: does the trainer's offline scoring of the baseline match what serving
logged for the same rows?

The sample carries ``served_score`` (what serving logged for the baseline on those rows) and
``baseline_score`` (what the trainer recomputes offline for the baseline). On the same model and
the same rows they should agree; when they do not, the trainer's features no longer match
serving's (a broken join, a stale feature table, a changed transformation), and every offline
comparison the gate makes is suspect. Common practice, no published source.

Statistics (``statistic`` key):

- ``mean-abs-diff``: mean of ``|served_score - baseline_score|``;
- ``share-differing``: share of rows where they differ by more than ``tolerance``.

Rows where either score is missing or non-finite count as differing (and are left out of the
mean absolute difference, with their count in the message).
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from pydantic import Field

from service.gate.adaptive import Transform
from service.gate.checks.base import CheckConfig, CheckContext, register, skipped
from service.gate.types import Finding

_LABEL = {
    "mean-abs-diff": "mean |served - offline baseline score|",
    "share-differing": "share of rows where served and offline baseline scores differ",
}


class SkewConfig(CheckConfig):
    kind: Literal["skew"]
    statistic: Literal["mean-abs-diff", "share-differing"] = Field(
        description="mean-abs-diff or share-differing (beyond tolerance)."
    )
    max: float = Field(ge=0, description="Largest allowed value of the statistic.")
    tolerance: float = Field(
        1e-3, ge=0, description="Scores further apart than this differ (share-differing)."
    )
    min_rows: int = Field(100, ge=1, description="Fewer rows with both scores: inconclusive.")

    def natural_transform(self) -> Transform:
        """Both statistics are non-negative: learn on the logarithm."""
        return "log"


@register("skew", SkewConfig, family="skew", needs_other=False)
def run_skew(config: SkewConfig, ctx: CheckContext) -> list[Finding]:
    sample = ctx.candidate.sample
    served = None if sample is None else sample.column("served_score")
    offline = None if sample is None else sample.column("baseline_score")
    if served is None or offline is None:
        return [
            skipped(
                config,
                "the sample does not carry both served_score and baseline_score",
                statistic=config.statistic,
            )
        ]
    both = np.isfinite(served) & np.isfinite(offline)
    n_both = int(both.sum())
    n_missing = int(served.size - n_both)

    def finding(
        outcome: str, message: str, extra: dict[str, float] | None = None, **fields: float
    ) -> Finding:
        details: dict[str, float | int] = {
            "rows": int(served.size),
            "rows_with_both": n_both,
            "rows_missing_a_score": n_missing,
            "tolerance": config.tolerance,
            **(extra or {}),
        }
        return Finding(
            check=config.name,
            kind=config.kind,
            outcome=outcome,  # type: ignore[arg-type]
            statistic=config.statistic,
            message=message,
            blocking=config.blocking,
            against=None,
            details=details,
            **fields,  # type: ignore[arg-type]
        )

    if n_both < config.min_rows:
        return [
            finding(
                "inconclusive",
                f"only {n_both} rows carry both served and offline baseline scores; "
                f"{config.min_rows} needed",
            )
        ]
    diff = np.abs(served[both] - offline[both])
    if config.statistic == "mean-abs-diff":
        value = float(diff.mean())
        shown = f"{value:.4g}"
    else:
        value = float((np.count_nonzero(diff > config.tolerance) + n_missing) / served.size)
        shown = f"{value:.2%} (tolerance {config.tolerance:g})"
    missing = f"; {n_missing} row(s) miss a score" if n_missing else ""
    over = value > config.max
    text = f"{_LABEL[config.statistic]} {shown}{missing}"
    return [
        finding(
            "breach" if over else "ok",
            f"{text} exceeds {config.max:g}: the trainer's features may not match serving's"
            if over
            else f"{text} (at most {config.max:g})",
            value=value,
            limit=config.max,
            extra={
                "mean_served_score": float(np.mean(served[both])),
                "mean_offline_baseline_score": float(np.mean(offline[both])),
            },
        )
    ]
