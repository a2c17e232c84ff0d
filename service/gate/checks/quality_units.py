"""Parts of the ``quality`` check that stand apart from its decision: paired AUC for every unit
from one sort per score, and the candidate-only judgement against floor and ceiling when there
is nothing to compare with. See :mod:`service.gate.checks.quality`."""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

from service.gate.checks.base import CheckContext, skipped
from service.gate.checks.comparisons import Comparison, Options, Side, value_of
from service.gate.checks.memo import order_of, sorted_with_order
from service.gate.checks.segments import ALL, Unit, kept_codes
from service.gate.types import Finding, Sample
from service.stats.auc import AUCChange, delong_paired
from service.stats.delong_segments import delong_paired_by_value
from service.stats.inference import normal_change
from service.stats.parallel import both

if TYPE_CHECKING:
    from service.gate.checks.quality import QualityConfig


def _has_ties(ordered: np.ndarray) -> bool:
    """Whether two of the sorted values are equal."""
    return bool(np.any(ordered[1:] == ordered[:-1]))


def paired_auc_units(
    sample: Sample,
    cand: Side,
    base: Side,
    units: list[Unit],
    keep: np.ndarray | None,
    opts: Options,
    rows: int,
) -> dict[str, Comparison | str]:
    """Paired DeLong for every unit from one sort per score (see delong_segments)."""
    order_c, order_b = both(lambda: order_of(cand.score), lambda: order_of(base.score), rows=rows)
    # Ties from the sorted values the sort gave with the order (no second gather).
    ties = (_has_ties(sorted_with_order(cand.score)), _has_ties(sorted_with_order(base.score)))
    positive = cand.label > 0
    found: dict[str, AUCChange | str] = {
        ALL: delong_paired(
            None, cand.score, base.score, positive=positive, orders=(order_c, order_b), ties=ties
        )
    }
    for column in sorted({u.column for u in units if u.column is not None}):
        codes, n_values = kept_codes(sample, column, keep)
        per_value = delong_paired_by_value(
            positive, cand.score, base.score, (order_c, order_b), codes, n_values, ties=ties
        )
        for unit in units:
            if unit.column == column and unit.index is not None:
                found[unit.label] = per_value[unit.index]
    out: dict[str, Comparison | str] = {}
    for label, result in found.items():
        if isinstance(result, str):
            out[label] = result
            continue
        n = result.n_positive + result.n_negative
        test = normal_change(
            result.difference,
            result.se,
            confidence=opts.confidence,
            method=result.method,
            n_candidate=n,
            n_baseline=n,
        )
        out[label] = Comparison(result.candidate, result.baseline, test, "rows")
    return out


def floor_only(
    config: QualityConfig, ctx: CheckContext, name: str, cand: Side, opts: Options
) -> list[Finding]:
    """No baseline to compare with: judge the candidate's own value against floor/ceiling."""
    if config.floor is None and config.ceiling is None:
        return [
            skipped(
                config,
                f"{name}: no baseline_score and no {config.against} sample with labels "
                "to compare with",
                statistic=config.metric,
            )
        ]
    value = value_of(cand, opts)
    problems = bound_problems(config, name, value)
    return [
        Finding(
            check=config.name,
            kind=config.kind,
            outcome="breach" if problems else "ok",
            statistic=config.metric,
            candidate_value=value,
            limit=config.floor if config.floor is not None else config.ceiling,
            message="; ".join(problems)
            or f"{name} {value:.4g} within bounds (nothing to compare with)",
            blocking=config.blocking,
            against=config.against,
            details={"rows": int(cand.score.size), "mode": "candidate only"},
        )
    ]


def bound_problems(config: QualityConfig, name: str, value: float) -> list[str]:
    problems = []
    if config.floor is not None and value < config.floor:
        problems.append(f"{name} {value:.4g} is below the floor {config.floor:g}")
    if config.ceiling is not None and value > config.ceiling:
        problems.append(f"{name} {value:.4g} is above the ceiling {config.ceiling:g}")
    return problems
