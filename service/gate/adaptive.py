"""Learned limits: a check's limit learned from the same check's values on earlier healthy
promotions, and the false-hold budget that sets how far out in the tail it sits. Pure.

A check that reports a ``value`` against a ``limit`` (drift statistics, paired change, metric
changes, list measures, skew, and any later kind that reports a value on a bad side) can learn
its limit from history in two ways:

- **the false-hold budget** (``[budget] false_holds_per_1000`` in the policy): every blocking
  check that learns gets an equal share of the budget (a Bonferroni split: the chance that any
  of ``m`` checks holds a healthy push is at most the sum of their levels), and its limit is
  the one-sided tail at that level of a robust fit of its history (median and Qn, widened to a
  prediction bound for the uncertainty of the fit itself; :func:`service.stats.robust.tail_limit`)
  on the scale where the statistic is close to normal: the logarithm for non-negative
  statistics such as PSI or KS D, ``log(1 - x)`` for correlations and overlaps near 1;
- **an ``adaptive`` table** on the check (``method = "robust-z"``: median + ``k`` robust sigmas,
  the Hampel identifier; ``method = "quantile"``: the empirical quantile), as before.

After the check has judged the candidate with its static limit, :func:`apply_adaptive` replaces
that limit by the learned one (bounded by ``min_limit``/``max_limit``) and judges again. For a
check flagged below its limit the mirror image is used. The history is each earlier snapshot's
value of the same check, which (since a promoted snapshot becomes the baseline) is the
statistic between consecutive promoted snapshots; which entries count is set out in
:mod:`service.gate.history`.

**Warm-up.** With fewer than ``min_history`` counting values (or a history with no spread at
all) no limit is learned: the check's stated static limit and its statistical tests stand, and
the finding says so. A breach that the static check found for another reason than its limit (a
metric below its floor, a segment over its limit) stays a breach. A check with ``alpha`` keeps
requiring significance.

Checks that judge several units (``quality`` per segment) learn per unit through
:func:`learn_limit` themselves, with keys ``<check>[<unit>]`` filled from
``Finding.details["learn"]`` (see :func:`service.gate.history.history_values`).

References
----------
1. Hampel, F. R. (1974). The influence curve and its role in robust estimation. JASA 69(346).
2. Rousseeuw, P. J. and Croux, C. (1993). Alternatives to the median absolute deviation. JASA
   88(424), 1273–1283.
3. Bonferroni, C. E. (1936); in modern form: Dunn, O. J. (1961). Multiple comparisons among
   means. JASA 56(293), 52–64. (Splitting a level across tests bounds the chance of any false
   rejection by the sum of the parts.)
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
Transform = Literal["none", "log", "log1m"]
Method = Literal["budget", "robust-z", "quantile"]


class BudgetRules(BaseModel):
    """The ``[budget]`` section: how many healthy pushes in 1,000 the policy accepts to hold."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    false_holds_per_1000: float = Field(
        gt=0,
        le=100,
        description="Healthy pushes in 1,000 the learned limits may hold, split equally across "
        "the blocking checks that learn.",
    )
    min_history: int = Field(
        20,
        ge=3,
        le=10000,
        description="Warm-up: with fewer healthy values a check keeps its stated static limit.",
    )
    window: int = Field(
        100, ge=3, le=2000, description="Learn from the newest this many healthy promotions."
    )
    window_hours: float | None = Field(
        None, gt=0, description="Also ignore history older than this many hours."
    )
    include_overridden: bool = Field(
        False, description="Let snapshots promoted by overriding a hold count as healthy."
    )

    def model_post_init(self, context: Any, /) -> None:
        if self.min_history > self.window:
            raise ValueError("min_history must not exceed window")

    @property
    def level(self) -> float:
        """The budget as a probability per push."""
        return self.false_holds_per_1000 / 1000.0


class AdaptiveRules(BaseModel):
    """The ``adaptive`` table of a check: how to learn its limit from history."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    method: Method | None = Field(
        None,
        description="budget (the tail of a robust fit at the check's share of the policy's "
        "false-hold budget), robust-z (median + k robust sigmas) or quantile (empirical); "
        "default: budget when the policy has a [budget], else robust-z.",
    )
    transform: Transform | None = Field(
        None,
        description="log: learn on the logarithm (positive, right-skewed statistics such as "
        "PSI or KS D); log1m: on log(1 - x) (correlations and overlaps near 1); none: on the "
        "values as they are. Default: the check's own scale with method budget, else none.",
    )
    k: float = Field(
        3.5, gt=0, le=100, description="Robust sigmas above the median (method robust-z)."
    )
    quantile: float = Field(
        0.99, ge=0.5, le=1.0, description="Empirical quantile level (method quantile)."
    )
    window: int | None = Field(
        None,
        ge=3,
        le=10000,
        description="Use the newest this many healthy promotions (default: [budget] window, "
        "else 50).",
    )
    window_hours: float | None = Field(
        None, gt=0, description="Also ignore history older than this many hours."
    )
    min_history: int | None = Field(
        None,
        ge=3,
        le=10000,
        description="Fewer healthy values than this: keep the static limit (default: [budget] "
        "min_history, else 20).",
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
        if (
            self.min_history is not None
            and self.window is not None
            and self.min_history > self.window
        ):
            raise ValueError("min_history must not exceed window")
        if (
            self.min_limit is not None
            and self.max_limit is not None
            and self.min_limit > self.max_limit
        ):
            raise ValueError("min_limit must not exceed max_limit")


@dataclasses.dataclass(frozen=True)
class LearnPlan:
    """Everything needed to learn one check's limit: its rules resolved against the policy's
    budget. ``level`` is the check's share of the budget (method ``budget``), ``shared_by`` the
    number of blocking checks that share it."""

    method: Method
    transform: Transform
    side: Side
    window: int
    min_history: int
    window_hours: float | None = None
    include_overridden: bool = False
    k: float = 3.5
    quantile: float = 0.99
    min_limit: float | None = None
    max_limit: float | None = None
    level: float | None = None
    shared_by: int = 1
    budget_per_1000: float | None = None
    #: Usual push intervals between candidate and baseline (>= 1); see :func:`learn_limit`.
    steps: float = 1.0

    def at_level(self, level: float) -> LearnPlan:
        """The same plan with the tail level split further (per unit of a check)."""
        return dataclasses.replace(self, level=level)


def make_plan(
    rules: AdaptiveRules | None,
    *,
    budget: BudgetRules | None,
    side: Side,
    natural: Transform,
    level: float | None,
    shared_by: int,
) -> LearnPlan:
    """Resolve a check's ``adaptive`` table (None: all defaults) against the policy's budget."""
    rules = rules or AdaptiveRules()
    method: Method = rules.method or ("budget" if budget is not None else "robust-z")
    if method == "budget" and (budget is None or level is None):
        raise ValueError("method 'budget' needs a [budget] section in the policy")
    transform = rules.transform or (natural if method == "budget" else "none")
    window = rules.window or (budget.window if budget is not None else 50)
    min_history = rules.min_history or (budget.min_history if budget is not None else 20)
    return LearnPlan(
        method=method,
        transform=transform,
        side=rules.side or side,
        window=window,
        min_history=min(min_history, window),
        window_hours=rules.window_hours or (budget.window_hours if budget else None),
        include_overridden=rules.include_overridden
        or (budget.include_overridden if budget else False),
        k=rules.k,
        quantile=rules.quantile,
        min_limit=rules.min_limit,
        max_limit=rules.max_limit,
        level=level if method == "budget" else None,
        shared_by=shared_by,
        budget_per_1000=budget.false_holds_per_1000 if budget is not None else None,
    )


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


def _forward(value: float, transform: Transform) -> float | None:
    """*value* on the learning scale, None where the scale has no place for it."""
    if transform == "log":
        return math.log(value) if value > 0 else None
    if transform == "log1m":
        return math.log(1.0 - value) if value < 1 else None
    return value


def _back(value: float, transform: Transform) -> float:
    if transform == "log":
        return math.exp(value)
    if transform == "log1m":
        return 1.0 - math.exp(value)
    return value


def _scale_side(side: Side, transform: Transform) -> Side:
    """``log(1 - x)`` reverses the order: a low overlap is a high value on that scale."""
    if transform == "log1m":
        return "upper" if side == "lower" else "lower"
    return side


_SCALE_TEXT = {"none": "", "log": " of the logs", "log1m": " of log(1 - x)"}


def _widen(median: float, limit: float, steps: float, transform: Transform, side: Side) -> float:
    """A one-step limit for a candidate *steps* push intervals from its baseline.

    Healthy change between snapshots accumulates like a random walk: a distance between
    snapshots ``r`` steps apart grows as ``sqrt(r)`` and a variance-like quantity (``1 - rho``)
    as ``r``. So on the log scale the limit moves by ``0.5 log r`` (log) or ``log r`` (log1m);
    on the value scale its distance from the median grows by ``sqrt(r)``. A mean-reverting
    model changes less than that, so the widening errs towards not holding healthy pushes after
    a hold (which otherwise cascade: each held push leaves the next one further away).
    Model assumption (Brownian scaling), no published source for its use here.
    """
    sign = 1.0 if side == "upper" else -1.0
    if transform == "log":
        return limit + sign * 0.5 * math.log(steps)
    if transform == "log1m":
        return limit + sign * math.log(steps)
    return median + (limit - median) * math.sqrt(steps)


def learn_limit(
    plan: LearnPlan | AdaptiveRules,
    *,
    check: str,
    side: Side | None = None,
    history: Sequence[HistoryEntry],
    now: datetime,
) -> LearnedLimit:
    """Learn the limit of history key *check* (a check name, or ``<check>[<unit>]``)."""
    if isinstance(plan, AdaptiveRules):  # an adaptive table on its own (no policy budget)
        plan = make_plan(
            plan, budget=None, side=side or "upper", natural="none", level=None, shared_by=1
        )
    transform = plan.transform

    def value_of(entry: HistoryEntry) -> float | None:
        value = entry.values.get(check)
        return None if value is None else _forward(value, transform)

    selection = select_history(
        history,
        value_of,
        now=now,
        window=plan.window,
        window_hours=plan.window_hours,
        include_overridden=plan.include_overridden,
    )
    n = len(selection.values)
    side = plan.side
    evidence: dict[str, Any] = {
        "method": plan.method,
        "transform": transform,
        "side": side,
        "history_used": n,
        "history_needed": plan.min_history,
        "history_scanned": selection.scanned,
        "excluded": dict(selection.excluded),
        "window": plan.window,
        "window_hours": plan.window_hours,
    }
    if plan.level is not None:
        evidence.update(
            {
                "level": plan.level,
                "shared_by": plan.shared_by,
                "budget_per_1000": plan.budget_per_1000,
            }
        )
    if n < plan.min_history:
        text = (
            f"warm-up: only {n} healthy promotion(s) with a value (excluded: "
            f"{selection.exclusion_text()}); {plan.min_history} needed to learn a limit"
        )
        evidence["warm_up"] = True
        return LearnedLimit(None, side, n, text, evidence)
    evidence["warm_up"] = False
    scale_side = _scale_side(side, transform)
    if plan.method == "budget":
        assert plan.level is not None
        fit = robust.tail_limit(selection.values, level=plan.level, side=scale_side)
        evidence.update(
            {
                "median": fit.median,
                "scale": fit.scale,
                "scale_source": fit.source,
                "df": fit.df,
                "multiplier": fit.multiplier,
            }
        )
        if fit.limit is None:
            evidence["warm_up"] = True
            text = f"warm-up: the {n} healthy values have no spread, so no tail can be fitted"
            return LearnedLimit(None, side, n, text, evidence)
        fitted = fit.limit
        if plan.steps > 1.0:
            fitted = _widen(fit.median, fitted, plan.steps, transform, scale_side)
            evidence["steps"] = plan.steps
        limit = _back(fitted, transform)
        text = (
            f"tail 1 in {1.0 / plan.level:,.0f} of a robust fit (median {fit.median:.3g}, "
            f"{fit.source} scale {fit.scale:.3g}{_SCALE_TEXT[transform]}) of {n} healthy "
            f"promotions; the check's share of the budget of "
            f"{plan.budget_per_1000:g} per 1,000 split over {plan.shared_by}"
        )
        if plan.steps > 1.0:
            text += f"; widened for a candidate {plan.steps:.1f} push intervals from its baseline"
    elif plan.method == "robust-z":
        spread = robust.robust_scale(selection.values)
        sign = 1.0 if scale_side == "upper" else -1.0
        limit = _back(spread.median + sign * plan.k * spread.scale, transform)
        op = "+" if scale_side == "upper" else "-"
        if transform == "log":
            text = (
                f"exp(median log {spread.median:.3g} {op} {plan.k:g} x robust sigma "
                f"{spread.scale:.3g} of the logs) over {n} healthy promotions"
            )
        else:
            text = (
                f"median {spread.median:.3g} {op} {plan.k:g} x robust sigma {spread.scale:.3g} "
                f"({spread.source}{_SCALE_TEXT[transform]}) over {n} healthy promotions"
            )
        evidence.update(
            {
                "median": spread.median,
                "scale": spread.scale,
                "scale_source": spread.source,
                "k": plan.k,
            }
        )
    else:
        # quantiles commute with a monotone transform
        limit = _back(
            robust.quantile_limit(selection.values, q=plan.quantile, side=scale_side), transform
        )
        level = plan.quantile if side == "upper" else 1.0 - plan.quantile
        text = f"{level:.3g} quantile over {n} healthy promotions"
        evidence.update({"quantile": level})
    raw = limit
    if plan.min_limit is not None and limit < plan.min_limit:
        limit = plan.min_limit
        text += f", raised to min_limit {plan.min_limit:g}"
    if plan.max_limit is not None and limit > plan.max_limit:
        limit = plan.max_limit
        text += f", lowered to max_limit {plan.max_limit:g}"
    evidence.update(
        {"learned_limit": raw, "limit": limit, "excluded_text": selection.exclusion_text()}
    )
    return LearnedLimit(limit, side, n, text, evidence)


def apply_adaptive(
    finding: Finding,
    *,
    rules: LearnPlan | AdaptiveRules,
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
