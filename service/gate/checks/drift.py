"""Drift: has the distribution of the candidate's scores moved away from the other snapshot's?

Statistics are looked up in :data:`DRIFT_STATISTICS` by the policy's ``statistic`` key; each
returns a :class:`DriftValue`. The limit (``max``) is on the effect size; ``alpha``, when set,
additionally requires the shift to be significant (p-value below ``alpha``) before it counts as
a breach, so "PSI above 0.1 and significant at 0.001" is ``max = 0.1, alpha = 0.001``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
from pydantic import Field, field_validator

from service.gate.checks.base import CheckConfig, CheckContext, format_p, register, skipped
from service.gate.types import Finding
from service.stats import drift as drift_stats


class DriftConfig(CheckConfig):
    kind: Literal["drift"]
    statistic: str = Field(description="Which drift statistic: see the drift statistics table.")
    column: Literal["score"] = Field("score", description="Sample column compared (score).")
    max: float = Field(gt=0, description="Largest allowed value of the statistic (effect size).")
    alpha: float | None = Field(
        None, gt=0, lt=1, description="Also require p-value below this before it is a breach."
    )
    bins: int = Field(10, ge=2, le=1000, description="Bins for binned statistics (psi, js).")

    @field_validator("statistic")
    @classmethod
    def _known_statistic(cls, value: str) -> str:
        if value not in DRIFT_STATISTICS:
            known = ", ".join(sorted(DRIFT_STATISTICS))
            raise ValueError(f"unknown drift statistic {value!r} (known: {known})")
        return value


@dataclass(frozen=True)
class DriftValue:
    value: float
    pvalue: float | None = None
    label: str = ""
    details: dict[str, Any] = field(default_factory=dict)


DriftFn = Callable[[np.ndarray, np.ndarray, DriftConfig], DriftValue]


def _psi(base: np.ndarray, cand: np.ndarray, config: DriftConfig) -> DriftValue:
    result = drift_stats.psi(base, cand, bins=config.bins)
    return DriftValue(
        result.statistic,
        result.pvalue,
        "PSI",
        {
            "edges": list(result.edges),
            "baseline_share": list(result.expected),
            "candidate_share": list(result.actual),
        },
    )


def _ks(base: np.ndarray, cand: np.ndarray, config: DriftConfig) -> DriftValue:
    result = drift_stats.ks_2samp(base, cand)
    return DriftValue(result.statistic, result.pvalue, "KS D")


#: statistic name -> function; other modules add entries (see DEVELOPERS.md).
DRIFT_STATISTICS: dict[str, DriftFn] = {"psi": _psi, "ks": _ks}


def finite_scores(values: np.ndarray) -> np.ndarray:
    return values[np.isfinite(values)]


@register("drift", DriftConfig, family="drift")
def run_drift(config: DriftConfig, ctx: CheckContext) -> list[Finding]:
    other = ctx.other
    assert other is not None  # needs_other: evaluate skips when absent
    if ctx.candidate.sample is None or other.sample is None:
        return [skipped(config, f"no sample on the {config.against} or the candidate")]
    cand = finite_scores(ctx.candidate.sample.column(config.column))  # type: ignore[arg-type]
    base = finite_scores(other.sample.column(config.column))  # type: ignore[arg-type]
    minimum = max(config.bins, 2)
    if cand.size < minimum or base.size < minimum:
        return [
            skipped(
                config,
                f"too few finite scores to compare ({cand.size} candidate, {base.size} "
                f"{config.against}; need {minimum})",
                statistic=config.statistic,
            )
        ]
    result = DRIFT_STATISTICS[config.statistic](base, cand, config)
    over = result.value > config.max
    significant = config.alpha is None or (result.pvalue is not None and result.pvalue < config.alpha)
    breach = over and significant
    label = result.label or config.statistic
    ptext = "" if result.pvalue is None else f", {format_p(result.pvalue)}"
    if breach:
        message = f"score {label} {result.value:.3g} vs {config.against} exceeds {config.max:g}{ptext}"
    elif over:
        message = (
            f"score {label} {result.value:.3g} vs {config.against} exceeds {config.max:g} but is "
            f"not significant at {config.alpha:g}{ptext}"
        )
    else:
        message = f"score {label} {result.value:.3g} vs {config.against} within {config.max:g}{ptext}"
    return [
        Finding(
            check=config.name,
            kind=config.kind,
            outcome="breach" if breach else "ok",
            statistic=config.statistic,
            value=result.value,
            limit=config.max,
            pvalue=result.pvalue,
            baseline_value=float(np.mean(base)),
            candidate_value=float(np.mean(cand)),
            message=message,
            blocking=config.blocking,
            against=config.against,
            details={"mean_is": "baseline_value and candidate_value are mean scores", **result.details},
        )
    ]
