"""Adaptive limits: a check's limit learned from the same check's values on earlier healthy
promotions. Pure.

A check that reports a ``value`` against a ``limit`` (drift statistics, metric changes, list
measures, skew) may carry an ``adaptive`` table in the policy. After the check has judged the
candidate with its static limit, :func:`apply_adaptive` replaces that limit by one learned from
history and judges again:

- ``method = "robust-z"``: ``median + k * robust sigma`` of the history (Hampel identifier; the
  robust sigma is ``1.4826 * MAD``, see :mod:`service.stats.robust`);
- ``method = "quantile"``: the empirical ``quantile`` of the history.

For a check flagged below its limit (a higher-is-better metric, a list overlap) the mirror
image is used: ``median - k * sigma`` or the ``1 - quantile`` level. ``min_limit`` and
``max_limit`` bound the learned limit. The history is each earlier snapshot's value of the same
check, which (since a promoted snapshot becomes the baseline) is the statistic between
consecutive promoted snapshots; which entries count is set out in :mod:`service.gate.history`.

With fewer than ``min_history`` counting values the static limit stands and the finding says
so. A breach that the static check found for another reason than its limit (a metric below its
floor, say) stays a breach. A check with ``alpha`` keeps requiring significance.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from datetime import datetime
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field

from service.gate.history import select_history
from service.gate.types import Finding, HistoryEntry
from service.stats import robust

Side = Literal["upper", "lower"]


class AdaptiveRules(BaseModel):
    """The ``adaptive`` table of a check: how to learn its limit from history."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    method: Literal["robust-z", "quantile"] = Field(
        "robust-z",
        description="robust-z (median + k robust sigmas) or quantile (empirical).",
    )
    transform: Literal["none", "log"] = Field(
        "none",
        description="log: learn on the logarithm (for positive, right-skewed statistics "
        "such as PSI or KS D); none: on the values as they are.",
    )
    k: float = Field(
        3.5, gt=0, le=100, description="Robust sigmas above the median (method robust-z)."
    )
    quantile: float = Field(
        0.99, ge=0.5, le=1.0, description="Empirical quantile level (method quantile)."
    )
    window: int = Field(
        50, ge=3, le=10000, description="Use the newest this many healthy promotions."
    )
    window_hours: float | None = Field(
        None, gt=0, description="Also ignore history older than this many hours."
    )
    min_history: int = Field(
        20, ge=3, le=10000, description="Fewer healthy values than this: keep the static limit."
    )
    side: Side | None = Field(
        None,
        description="Flag values above (upper) or below (lower) the limit; default from the check.",
    )
    min_limit: float | None = Field(None, description="The learned limit is never below this.")
    max_limit: float | None = Field(None, description="The learned limit is never above this.")
    include_overridden: bool = Field(
        False, description="Let snapshots promoted by overriding a hold count as healthy."
    )

    def model_post_init(self, context: Any, /) -> None:
        """Cross-key rules, run once the keys themselves are valid."""
        if self.min_history > self.window:
            raise ValueError("min_history must not exceed window")
        if (
            self.min_limit is not None
            and self.max_limit is not None
            and self.min_limit > self.max_limit
        ):
            raise ValueError("min_limit must not exceed max_limit")


@dataclasses.dataclass(frozen=True)
class LearnedLimit:
    """A limit learned from history, or why none could be learned (``limit`` is None)."""

    limit: float | None
    side: Side
    n: int
    description: str
    evidence: dict[str, Any]


def _beyond(value: float, limit: float, side: Side) -> bool:
    return value > limit if side == "upper" else value < limit


def learn_limit(
    rules: AdaptiveRules,
    *,
    check: str,
    side: Side,
    history: Sequence[HistoryEntry],
    now: datetime,
) -> LearnedLimit:
    """Learn check *check*'s limit from *history* under *rules*."""
    log = rules.transform == "log"

    def value_of(entry: HistoryEntry) -> float | None:
        value = entry.values.get(check)
        if value is None or (log and value <= 0):
            return None  # on a log scale a non-positive value has no place
        return math.log(value) if log else value

    selection = select_history(
        history,
        value_of,
        now=now,
        window=rules.window,
        window_hours=rules.window_hours,
        include_overridden=rules.include_overridden,
    )
    n = len(selection.values)
    evidence: dict[str, Any] = {
        "method": rules.method,
        "transform": rules.transform,
        "side": side,
        "history_used": n,
        "history_needed": rules.min_history,
        "history_scanned": selection.scanned,
        "excluded": dict(selection.excluded),
        "window": rules.window,
        "window_hours": rules.window_hours,
    }
    if n < rules.min_history:
        text = (
            f"only {n} healthy promotion(s) with a value (excluded: "
            f"{selection.exclusion_text()}); {rules.min_history} needed to learn a limit"
        )
        return LearnedLimit(None, side, n, text, evidence)
    if rules.method == "robust-z":
        spread = robust.robust_scale(selection.values)
        sign = 1.0 if side == "upper" else -1.0
        limit = spread.median + sign * rules.k * spread.scale
        op = "+" if side == "upper" else "-"
        if log:
            limit = math.exp(limit)
            text = (
                f"exp(median log {spread.median:.3g} {op} {rules.k:g} x robust sigma "
                f"{spread.scale:.3g} of the logs) over {n} healthy promotions"
            )
        else:
            text = (
                f"median {spread.median:.3g} {op} {rules.k:g} x robust sigma {spread.scale:.3g} "
                f"({spread.source}) over {n} healthy promotions"
            )
        evidence.update(
            {
                "median": spread.median,
                "scale": spread.scale,
                "scale_source": spread.source,
                "k": rules.k,
            }
        )
    else:
        limit = robust.quantile_limit(selection.values, q=rules.quantile, side=side)
        if log:
            limit = math.exp(limit)  # quantiles commute with a monotone transform
        level = rules.quantile if side == "upper" else 1.0 - rules.quantile
        text = f"{level:.3g} quantile over {n} healthy promotions"
        evidence.update({"quantile": level})
    raw = limit
    if rules.min_limit is not None and limit < rules.min_limit:
        limit = rules.min_limit
        text += f", raised to min_limit {rules.min_limit:g}"
    if rules.max_limit is not None and limit > rules.max_limit:
        limit = rules.max_limit
        text += f", lowered to max_limit {rules.max_limit:g}"
    evidence.update(
        {"learned_limit": raw, "limit": limit, "excluded_text": selection.exclusion_text()}
    )
    return LearnedLimit(limit, side, n, text, evidence)


def apply_adaptive(
    finding: Finding,
    *,
    rules: AdaptiveRules,
    side: Side,
    alpha: float | None,
    history: Sequence[HistoryEntry],
    now: datetime,
) -> Finding:
    """Judge *finding* again against the limit learned from *history* (module docstring)."""
    if (
        finding.outcome not in ("ok", "breach")
        or finding.value is None
        or finding.statistic == "error"
    ):
        return finding
    learned = learn_limit(rules, check=finding.check, side=side, history=history, now=now)
    static_limit = finding.limit
    evidence = dict(learned.evidence)
    evidence["static_limit"] = static_limit
    evidence["static_outcome"] = finding.outcome
    details = dict(finding.details)
    details["adaptive"] = evidence
    if learned.limit is None:
        evidence["used"] = False
        message = f"{finding.message} (static limit kept: {learned.description})"
        return dataclasses.replace(finding, message=message, details=details)
    evidence["used"] = True
    value = finding.value
    static_beyond = static_limit is not None and _beyond(value, static_limit, side)
    other_reason = finding.outcome == "breach" and not static_beyond
    significant = alpha is None or (finding.pvalue is not None and finding.pvalue < alpha)
    beyond = _beyond(value, learned.limit, side)
    breach = other_reason or (beyond and significant)
    label = f"{finding.statistic or 'value'} {value:.3g}"
    if finding.against:
        label += f" vs {finding.against}"
    word = ("exceeds" if side == "upper" else "falls below") if beyond else "within"
    static_text = "none" if static_limit is None else f"{static_limit:g}"
    message = (
        f"{label} {word} the learned limit {learned.limit:.3g} "
        f"({learned.description}; static limit {static_text})"
    )
    if beyond and not significant:
        message += f", but is not significant at {alpha:g}"
    if other_reason:
        message = f"{finding.message}; {message}"
    details["static_message"] = finding.message
    return dataclasses.replace(
        finding,
        outcome="breach" if breach else "ok",
        limit=learned.limit if math.isfinite(learned.limit) else None,
        message=message,
        details=details,
    )
