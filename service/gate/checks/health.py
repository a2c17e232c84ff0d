"""Health: the candidate's own sample, judged alone. Always blocking (common practice).

Finds non-finite scores, scores out of the allowed range, collapsed output, saturation (too
many rows sharing one value) and too few rows.

Collapse is judged against the baseline's spread when there is a baseline: a score standard
deviation at or below ``min_std_ratio`` of the baseline's (its sample, or the stored summary once
the sample is pruned) is collapsed, whatever the scale of the scores. The absolute floor
``min_std`` applies when there is no baseline spread to compare with (the model's first
snapshot, or a baseline without finite scores). An absolute floor alone
cannot know the scale: 1e-4 is collapsed for probabilities spread over 0.15 but normal for a
model whose scores all lie near 1e-3 (common practice, no source).
"""

from __future__ import annotations

import numpy as np

from service.gate.checks.memo import sorted_with_order
from service.gate.policy import SampleRules
from service.gate.types import Finding, Snapshot

KIND = "health"


def _finding(check: str, breach: bool, message: str, **numbers: float | None) -> Finding:
    return Finding(
        check=f"health.{check}",
        kind=KIND,
        outcome="breach" if breach else "ok",
        message=message,
        statistic=check,
        blocking=True,
        **numbers,  # type: ignore[arg-type]
    )


def _spread(snapshot: Snapshot | None) -> float | None:
    """Standard deviation of *snapshot*'s finite scores (sample, else stored summary)."""
    if snapshot is None:
        return None
    if snapshot.sample is not None and len(snapshot.sample):
        finite = snapshot.sample.score[np.isfinite(snapshot.sample.score)]
        if finite.size == 0:
            return None
        with np.errstate(over="ignore", invalid="ignore"):
            std = float(np.std(finite))
        return std if np.isfinite(std) else None
    if snapshot.summary is not None and snapshot.summary.std is not None:
        return float(snapshot.summary.std)
    return None


def _collapse(rules: SampleRules, std: float, baseline: Snapshot | None) -> Finding:
    base_std = _spread(baseline) if rules.min_std_ratio > 0 else None
    if base_std is not None and base_std > 0.0:
        limit = rules.min_std_ratio * base_std
        ratio = std / base_std
        bad = std <= limit
        message = (
            f"output collapsed: score standard deviation {std:.3g} is {ratio:.3g} of the "
            f"baseline's {base_std:.3g}; at or below {rules.min_std_ratio:g} of the baseline's "
            "is collapsed"
            if bad
            else f"score standard deviation {std:.4g}, {ratio:.3g} of the baseline's {base_std:.4g}"
        )
        return _finding(
            "collapse",
            bad,
            message,
            value=std,
            limit=limit,
            baseline_value=base_std,
            candidate_value=std,
        )
    bad = std <= rules.min_std
    return _finding(
        "collapse",
        bad,
        f"output collapsed: score standard deviation {std:.3g} is at or below {rules.min_std:g}"
        if bad
        else f"score standard deviation {std:.4g} (absolute floor {rules.min_std:g}; no "
        "baseline spread to compare with)",
        value=std,
        limit=rules.min_std,
    )


def health_findings(
    rules: SampleRules, candidate: Snapshot, baseline: Snapshot | None = None
) -> list[Finding]:
    """Health findings for *candidate* under *rules*; *baseline* (when there is one) gives the
    spread that collapse is judged against."""
    sample = candidate.sample
    if sample is None and not rules.required:
        return [
            Finding(
                check="health.rows",
                kind=KIND,
                outcome="skipped",
                message="no sample posted: the policy judges reported metrics only "
                "([sample] required = false)",
                statistic="rows",
                blocking=True,
            )
        ]
    n = 0 if sample is None else len(sample)
    findings = [
        _finding(
            "rows",
            n < rules.min_rows,
            f"sample has {n} rows, fewer than the {rules.min_rows} required"
            if n < rules.min_rows
            else f"sample has {n} rows (at least {rules.min_rows} required)",
            value=n,
            limit=rules.min_rows,
        )
    ]
    if sample is None or n == 0:
        return findings
    score = sample.score
    finite_mask = np.isfinite(score)
    nonfinite_share = 1.0 - float(np.mean(finite_mask))
    bad = nonfinite_share > rules.max_nonfinite_share
    n_bad = int(n - finite_mask.sum())
    findings.append(
        _finding(
            "non-finite",
            bad,
            f"{n_bad} of {n} scores are NaN, infinite or missing ({nonfinite_share:.2%}); "
            f"at most {rules.max_nonfinite_share:.2%} allowed"
            if bad
            else f"{n_bad} non-finite scores ({nonfinite_share:.2%})",
            value=nonfinite_share,
            limit=rules.max_nonfinite_share,
        )
    )
    # The column itself when every score is finite, so what the checks share about it (its
    # sort, see memo.py) is shared with this check too.
    finite = score if n_bad == 0 else score[finite_mask]
    if finite.size == 0:
        return findings
    low = -np.inf if rules.score_min is None else rules.score_min
    high = np.inf if rules.score_max is None else rules.score_max
    out_share = float(np.mean((finite < low) | (finite > high)))
    bad = out_share > rules.max_out_of_range_share
    findings.append(
        _finding(
            "range",
            bad,
            f"{out_share:.2%} of scores fall outside [{low:g}, {high:g}] "
            f"(observed {finite.min():.4g} to {finite.max():.4g})"
            if bad
            else f"scores within [{low:g}, {high:g}] (observed {finite.min():.4g} to "
            f"{finite.max():.4g})",
            value=out_share,
            limit=rules.max_out_of_range_share,
        )
    )
    with np.errstate(over="ignore", invalid="ignore"):
        std = float(np.std(finite))
    if not np.isfinite(std):  # values near the float limit: the spread overflows, not collapsed
        std = float(np.finfo(np.float64).max)
    findings.append(_collapse(rules, std, baseline))
    # The most common value's count: the longest run of equal values in sorted order (the
    # score's sort order is shared with the checks that follow: AUC, PSI, KS, ...).
    ordered = sorted_with_order(finite)
    new = np.empty(ordered.size, dtype=bool)
    new[0] = True
    np.not_equal(ordered[1:], ordered[:-1], out=new[1:])
    runs = np.diff(np.append(np.flatnonzero(new), ordered.size))
    mode_share = float(runs.max() / n)
    bad = mode_share > rules.max_mode_share
    findings.append(
        _finding(
            "saturation",
            bad,
            f"{mode_share:.2%} of rows share one score value; at most "
            f"{rules.max_mode_share:.2%} allowed"
            if bad
            else f"most common score value covers {mode_share:.2%} of rows",
            value=mode_share,
            limit=rules.max_mode_share,
        )
    )
    return findings
