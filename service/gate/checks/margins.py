"""Margins of the ``quality`` check: the stated margin, the normal change learned from healthy
history, and when a unit is too small to decide (underpowered). Pure.

**Learned normal change.** Under the policy's false-hold budget (or an ``adaptive`` table) a
``quality`` check learns, per unit (all rows and each segment value), how far the *bad end of
the interval* reaches on healthy promotions: for ``non-inferiority`` the lower bound of the gain
(the change oriented so that positive is better) at the check's confidence, for ``limit`` the
point gain. The learned limit ``L`` is the lower tail of a robust fit of those values at the
unit's share of the budget (:func:`service.gate.adaptive.learn_limit`; median and Qn, Hampel
1974, Rousseeuw & Croux 1993). The *learned normal change* is ``max(0, -L)``: a healthy push's
interval reaches down that far once in ``1 / level`` pushes. The effective margin is the larger
of the stated margin and the learned normal change:

- when the stated margin is the larger, the user's tolerance decides, as without history;
- when the learned change is larger, the stated margin lies inside normal step-to-step change
  (large paired samples make every tiny change "significant"), and holding at it would hold
  healthy pushes; the learned margin keeps the chance that a healthy push is not shown within
  the margin at the unit's level, so the budget holds.

Because the learned quantity is the interval's own bad end, a healthy candidate is "ok" (its
interval clears ``-margin``) except with probability ``level``, whatever its sample size was in
history; a fault is held as soon as its interval reaches beyond what healthy pushes show.

**Underpowered.** A unit whose interval straddles the boundary although its minimum detectable
effect ``(z_{(1+c)/2} + z_power) * SE`` exceeds the margin cannot decide at this size: it is
``underpowered``, not ``inconclusive``, and holds only when the policy says
``on_underpowered = "hold"``. A unit of ``auc``, ``calibration_ratio`` or ``ece`` with fewer
than ``min_positives`` positive or ``min_negatives`` negative rows is underpowered too: DeLong's
interval covers the truth 11 % of the time with 1 positive, 88 % with 3, 93 % with 10 and
about 95 % from 50 on (simulated; tests/gate/test_learned_quality.py). A standard error of
exactly zero is ``inconclusive``: the data cannot measure its own uncertainty, which is never
certainty.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Any, Literal

import numpy as np

from service.gate.adaptive import LearnPlan, learn_limit
from service.gate.history import learn_key
from service.gate.types import HistoryEntry

#: Metrics whose units need a minimum number of positives and negatives.
CLASS_METRICS = ("auc", "calibration_ratio", "ece")
#: The unit name of the leak guard's learned value (the point gain on all rows).
GAIN_KEY = "gain"


@dataclass(frozen=True)
class UnitMargin:
    """The margin a unit is judged against, and where it came from."""

    margin: float
    stated: float
    learned: float | None
    source: Literal["stated", "learned", "warm-up"]
    description: str
    evidence: dict[str, Any]

    def to_dict(self) -> dict[str, Any]:
        return {
            "margin": self.margin,
            "stated_margin": self.stated,
            "learned_change": self.learned,
            "margin_source": self.source,
            "why": self.description,
            "learning": self.evidence,
        }


def unit_margin(
    *,
    check: str,
    unit: str,
    rule: str,
    stated: float,
    plan: LearnPlan | None,
    history: Sequence[HistoryEntry],
    now: datetime,
    warm_up: float | None = None,
) -> UnitMargin:
    """The effective margin of one unit (module docstring); *warm_up* (the check's
    ``warm_up_margin``) replaces the stated margin while the unit is still learning."""
    if plan is None or rule == "superiority":
        why = (
            "stated margin (superiority requires a gain; it learns nothing)"
            if plan is not None
            else "stated margin (the policy learns no limits)"
        )
        return UnitMargin(stated, stated, None, "stated", why, {})
    lower = dataclasses.replace(plan, side="lower", transform="none")
    learned = learn_limit(lower, check=learn_key(check, unit), history=history, now=now)
    if learned.limit is None:
        if warm_up is not None:
            return UnitMargin(
                warm_up,
                stated,
                None,
                "warm-up",
                f"warm-up margin {warm_up:g} ({learned.description})",
                learned.evidence,
            )
        return UnitMargin(
            stated,
            stated,
            None,
            "stated",
            f"stated margin {stated:g} ({learned.description})",
            learned.evidence,
        )
    change = max(0.0, -learned.limit)
    what = "lower bounds of the gain" if rule == "non-inferiority" else "gains"
    if change > stated:
        why = (
            f"learned: healthy promotions' {what} reach {-change:+.4g} ({learned.description}); "
            f"the stated margin {stated:g} lies inside normal change"
        )
        return UnitMargin(change, stated, change, "learned", why, learned.evidence)
    why = (
        f"stated margin {stated:g}: wider than the learned normal change {change:.4g} "
        f"({learned.description})"
    )
    return UnitMargin(stated, stated, change, "stated", why, learned.evidence)


def leak_limit(
    *,
    check: str,
    stated: float | None,
    plan: LearnPlan | None,
    history: Sequence[HistoryEntry],
    now: datetime,
) -> tuple[float | None, str, dict[str, Any]]:
    """The leak guard's limit on the point gain: learned from healthy gains (upper tail) when
    the check learns and enough history exists, else the stated ``max_gain`` (None: no guard)."""
    if plan is None:
        return stated, "stated max_gain", {}
    upper = dataclasses.replace(plan, side="upper", transform="none")
    learned = learn_limit(upper, check=learn_key(check, GAIN_KEY), history=history, now=now)
    if learned.limit is None:
        return stated, f"stated max_gain ({learned.description})", learned.evidence
    return learned.limit, f"learned ({learned.description})", learned.evidence


def too_few_classes(
    metric: str, label: np.ndarray, *, min_positives: int, min_negatives: int
) -> str | None:
    """Why a unit of *metric* with these labels is too small, or None when it is not."""
    if metric not in CLASS_METRICS:
        return None
    positives = int(np.count_nonzero(label > 0))
    negatives = int(label.size - positives)
    if positives >= min_positives and negatives >= min_negatives:
        return None
    return (
        f"{positives} positive and {negatives} negative row(s); at least {min_positives} and "
        f"{min_negatives} are needed before its interval can be trusted"
    )
