"""Drift: has the distribution of the candidate's scores moved away from the other snapshot's?

Statistics are looked up in :data:`DRIFT_STATISTICS` by the policy's ``statistic`` key; each
returns a :class:`DriftValue`. The limit ``max`` is on the effect size; ``alpha``, when set,
additionally requires the shift to be significant (p-value below ``alpha``) before it counts as
a breach, so "PSI above 0.1 and significant at 0.001" is ``max = 0.1, alpha = 0.001``. For PSI
the finding then also reports the sample-size-aware limit: the PSI value that would be
significant at ``alpha`` for these two sample sizes (its chi-square null), in
``details.psi_null_limit``. A statistic with a p-value may also be used with ``alpha`` alone
(a pure test, e.g. Anderson–Darling).

With ``segments``, the statistic is computed on all rows and per segment value (the other
sample must carry the same segment columns); p-values are adjusted over that family.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
from pydantic import Field, field_validator

from service.gate.adaptive import Transform
from service.gate.checks.base import CheckContext, format_p, register, skipped
from service.gate.checks.memo import sorted_of
from service.gate.checks.segments import (
    ALL,
    CorrectedSegmentKeys,
    Unit,
    expand,
    matching_rows,
    split,
)
from service.gate.types import Finding, Sample
from service.stats import distance
from service.stats import drift as drift_stats
from service.stats.multiple import adjust


class DriftConfig(CorrectedSegmentKeys):
    kind: Literal["drift"]
    statistic: str = Field(description="Which drift statistic: see the drift statistics table.")
    column: Literal["score"] = Field("score", description="Sample column compared (score).")
    max: float | None = Field(
        None, gt=0, description="Largest allowed value of the statistic (effect size)."
    )
    alpha: float | None = Field(
        None, gt=0, lt=1, description="Also require p-value below this before it is a breach."
    )
    bins: int = Field(10, ge=2, le=1000, description="Bins for binned statistics (psi, js).")
    spread: Literal["std", "iqr"] = Field(
        "std",
        description="Baseline spread that normalises wasserstein, mean_shift, quantile_shift.",
    )

    @field_validator("statistic")
    @classmethod
    def _known_statistic(cls, value: str) -> str:
        if value not in DRIFT_STATISTICS:
            known = ", ".join(sorted(DRIFT_STATISTICS))
            raise ValueError(f"unknown drift statistic {value!r} (known: {known})")
        return value

    def consistency(self) -> None:
        super().consistency()
        if self.max is None and self.alpha is None:
            raise ValueError("set max (effect size), alpha (significance), or both")
        if self.alpha is not None and not DRIFT_STATISTICS[self.statistic].has_pvalue:
            raise ValueError(f"statistic {self.statistic!r} has no p-value: use max, not alpha")

    def natural_transform(self) -> Transform:
        """Every drift statistic is non-negative and right-skewed: learn on the logarithm."""
        return "log"


@dataclass(frozen=True)
class DriftValue:
    value: float
    pvalue: float | None = None
    label: str = ""
    details: dict[str, Any] = field(default_factory=dict)


DriftFn = Callable[[np.ndarray, np.ndarray, DriftConfig], DriftValue]


@dataclass(frozen=True)
class DriftStatistic:
    """A drift statistic: its function, and whether it gives a p-value (so ``alpha`` applies).

    With ``sorted_input`` the function receives both samples in ascending order (from the
    evaluation's shared sorts, see memo.py) and must give the same value as on the samples in
    row order: statistics that sort their inputs anyway (PSI, KS, ...) skip their own sorts.
    """

    fn: DriftFn
    has_pvalue: bool
    sorted_input: bool = False


def _psi(base: np.ndarray, cand: np.ndarray, config: DriftConfig) -> DriftValue:
    result = drift_stats.psi(base, cand, bins=config.bins, presorted=True)
    details: dict[str, Any] = {
        "edges": list(result.edges),
        "baseline_share": list(result.expected),
        "candidate_share": list(result.actual),
    }
    if config.alpha is not None and result.bins > 1:
        details["psi_null_limit"] = drift_stats.psi_null_quantile(
            base.size, cand.size, result.bins, 1.0 - config.alpha
        )
    return DriftValue(result.statistic, result.pvalue, "PSI", details)


def _ks(base: np.ndarray, cand: np.ndarray, config: DriftConfig) -> DriftValue:
    result = drift_stats.ks_2samp(base, cand, presorted=True)
    return DriftValue(result.statistic, result.pvalue, "KS D")


def _js(base: np.ndarray, cand: np.ndarray, config: DriftConfig) -> DriftValue:
    result = distance.jensen_shannon(base, cand, bins=config.bins, presorted=True)
    return DriftValue(
        result.statistic,
        result.pvalue,
        "Jensen-Shannon distance",
        {
            "edges": list(result.edges),
            "baseline_share": list(result.baseline_share),
            "candidate_share": list(result.candidate_share),
            "pvalue_test": "G-test of homogeneity on the same bins",
        },
    )


def _wasserstein(base: np.ndarray, cand: np.ndarray, config: DriftConfig) -> DriftValue:
    result = distance.wasserstein(base, cand, spread=config.spread, presorted=True)
    return DriftValue(result.statistic, None, f"Wasserstein-1 / baseline {config.spread}")


def _ad(base: np.ndarray, cand: np.ndarray, config: DriftConfig) -> DriftValue:
    result = distance.anderson_ksamp(base, cand, presorted=True)
    return DriftValue(
        result.statistic,
        result.pvalue,
        "Anderson-Darling T",
        {"a2akN": result.a2, "pvalue_method": result.pvalue_method},
    )


def _mean_shift(base: np.ndarray, cand: np.ndarray, config: DriftConfig) -> DriftValue:
    result = distance.mean_shift(base, cand, spread=config.spread)
    return DriftValue(result.statistic, result.pvalue, f"mean shift / baseline {config.spread}")


def _quantile_shift(base: np.ndarray, cand: np.ndarray, config: DriftConfig) -> DriftValue:
    result, per_level = distance.quantile_shift(base, cand, spread=config.spread)
    return DriftValue(
        result.statistic, None, f"quantile shift / baseline {config.spread}", {"shifts": per_level}
    )


#: statistic name -> statistic; add entries to offer more (see DEVELOPERS.md).
DRIFT_STATISTICS: dict[str, DriftStatistic] = {
    "psi": DriftStatistic(_psi, True, sorted_input=True),
    "ks": DriftStatistic(_ks, True, sorted_input=True),
    "js": DriftStatistic(_js, True, sorted_input=True),
    "wasserstein": DriftStatistic(_wasserstein, False, sorted_input=True),
    "ad": DriftStatistic(_ad, True, sorted_input=True),
    "mean_shift": DriftStatistic(_mean_shift, True),
    "quantile_shift": DriftStatistic(_quantile_shift, False),
}


def finite_scores(values: np.ndarray) -> np.ndarray:
    """The finite values; the array itself when all are (no copy)."""
    ok = np.isfinite(values)
    return values if bool(ok.all()) else values[ok]


def _unit_scores(sample: Sample, unit: Unit, column: str, other: bool) -> np.ndarray:
    values = sample.columns[column]
    if other:
        rows = matching_rows(sample, unit)
    else:
        rows = unit.rows
    return finite_scores(values if rows is None else values[rows])


@register("drift", DriftConfig, family="drift")
def run_drift(config: DriftConfig, ctx: CheckContext) -> list[Finding]:
    other = ctx.other
    assert other is not None  # needs_other: evaluate skips when absent
    if ctx.candidate.sample is None or other.sample is None:
        return [skipped(config, f"no sample on the {config.against} or the candidate")]
    sample, other_sample = ctx.candidate.sample, other.sample
    minimum = max(config.bins, 2)
    wanted = expand(config.segments, sample)
    names = [n for n in wanted if other_sample.column("segment." + n) is not None]
    layout = split(sample, names, config.min_segment_rows)
    missing = layout.missing_columns + [n for n in wanted if n not in names]
    results: list[tuple[Unit, np.ndarray, np.ndarray, DriftValue]] = []
    skipped_units: list[dict[str, Any]] = []
    for unit in layout.units:
        cand = _unit_scores(sample, unit, config.column, other=False)
        base = _unit_scores(other_sample, unit, config.column, other=True)
        if cand.size < minimum or base.size < minimum:
            if unit.column is None:
                # Inputs present but unusable: the data cannot resolve the question, which is
                # what inconclusive means (skipped is for absent inputs). It holds under
                # on_inconclusive = "hold" instead of letting the push through unchecked.
                return [
                    Finding(
                        check=config.name,
                        kind=config.kind,
                        outcome="inconclusive",
                        statistic=config.statistic,
                        message=f"too few finite scores to compare ({cand.size} candidate, "
                        f"{base.size} {config.against}; at least {minimum} on each side)",
                        blocking=config.blocking,
                        against=config.against,
                        details={
                            "finite_candidate": int(cand.size),
                            "finite_other": int(base.size),
                            "needed": minimum,
                        },
                    )
                ]
            skipped_units.append(
                {
                    "segment": unit.label,
                    "rows": int(cand.size),
                    "baseline_rows": int(base.size),
                    "outcome": "skipped",
                    "error": f"too few finite scores (need {minimum} on each side)",
                }
            )
            continue
        statistic = DRIFT_STATISTICS[config.statistic]
        if statistic.sorted_input:
            value = statistic.fn(sorted_of(base), sorted_of(cand), config)
        else:
            value = statistic.fn(base, cand, config)
        results.append((unit, base, cand, value))
    has_p = DRIFT_STATISTICS[config.statistic].has_pvalue
    raw = [r[3].pvalue if r[3].pvalue is not None else 1.0 for r in results]
    adjusted = adjust(raw, config.correction) if has_p else [None] * len(results)
    table: list[dict[str, Any]] = []
    over_units: list[str] = []
    for (unit, base, cand, value), p_adj in zip(results, adjusted, strict=True):
        over = config.max is None or value.value > config.max
        significant = config.alpha is None or (p_adj is not None and p_adj < config.alpha)
        if over and significant:
            over_units.append(unit.label)
        table.append(
            {
                "segment": unit.label,
                "rows": int(cand.size),
                "baseline_rows": int(base.size),
                "value": value.value,
                "pvalue": value.pvalue,
                "p_adjusted": None if p_adj is None else float(p_adj),
                "outcome": "breach" if over and significant else "ok",
            }
        )
    unit, base, cand, whole = results[0]
    label = whole.label or config.statistic
    ptext = "" if whole.pvalue is None else f", {format_p(whole.pvalue)}"
    message = _message(config, label, whole, ptext, over_units, table)
    details: dict[str, Any] = {
        "mean_is": "baseline_value and candidate_value are mean scores",
        "alpha": config.alpha,
        **whole.details,
    }
    if len(layout.units) > 1 or layout.too_small or missing:
        details.update(
            {
                "segments": table + skipped_units,
                "too_small": layout.too_small,
                "missing_segment_columns": missing,
                "correction": config.correction if has_p else None,
            }
        )
    return [
        Finding(
            check=config.name,
            kind=config.kind,
            outcome="breach" if over_units else "ok",
            statistic=config.statistic,
            value=whole.value,
            limit=config.max,
            pvalue=whole.pvalue,
            baseline_value=float(np.mean(base)),
            candidate_value=float(np.mean(cand)),
            message=message,
            blocking=config.blocking,
            against=config.against,
            details=details,
        )
    ]


def _message(
    config: DriftConfig,
    label: str,
    whole: DriftValue,
    ptext: str,
    over_units: list[str],
    table: list[dict[str, Any]],
) -> str:
    head = f"score {label} {whole.value:.3g} vs {config.against}"
    if len(table) == 1:  # no segments: one sentence about all rows
        if over_units:
            return f"{head} exceeds {_limit_text(config)}{ptext}"
        if config.max is not None and whole.value > config.max:
            return (
                f"{head} exceeds {config.max:g} but is not significant at {config.alpha:g}{ptext}"
            )
        return f"{head} within {_within_text(config)}{ptext}"
    if over_units:
        worst = ", ".join(
            f"{r['segment'] if r['segment'] != ALL else 'all rows'} {r['value']:.3g}"
            for r in table
            if r["outcome"] == "breach"
        )
        return f"{head}{ptext}; exceeds {_limit_text(config)} in {worst}"
    return f"{head}{ptext}; within {_within_text(config)} on all rows and in every segment"


def _within_text(config: DriftConfig) -> str:
    """What an ``ok`` finding stayed within: the limit alone (an ok finding is no claim of
    significance), or, without a limit, below significance."""
    if config.max is not None:
        return f"the limit {config.max:g}"
    return f"chance (not significant at {config.alpha:g})"


def _limit_text(config: DriftConfig) -> str:
    if config.max is not None and config.alpha is not None:
        return f"{config.max:g} (significant at {config.alpha:g})"
    if config.max is not None:
        return f"{config.max:g}"
    return f"significance {config.alpha:g}"
