"""The model's own past, as the gate reads it: which earlier snapshots count as healthy, how
long the baseline has served, and whether the model is stuck behind repeated holds. Pure.

Which history counts
--------------------
:class:`service.gate.types.HistoryEntry` objects come newest first. An entry *counts* towards a
learned limit or a volume norm only when all of these hold:

- the gate itself decided ``promote`` (``decision``), so a **held** snapshot does not count,
  and neither does an **overridden hold** (the gate said hold, an operator promoted it anyway):
  its value was unusual by the gate's own measure, and counting it would let each override
  widen the limit a little further;
- the snapshot is still ``healthy``: it became the baseline and was **not rolled back** later
  (the store sets this flag);
- it lies inside the window: the newest ``window`` counted entries, and only those created in
  the last ``window_hours`` when that is set;
- it carries the number asked for (the check's value, or ``rows_trained``).

A policy may set ``include_overridden = true`` to let overridden holds count after all.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import Any

from service.gate.types import HistoryEntry

EXCLUSION_REASONS = ("held", "overridden hold", "not healthy", "outside time window", "no value")
# "no value": the entry does not carry the number (the check was skipped or added later, or
# the value is not positive where a log scale needs it).


@dataclass(frozen=True)
class HistorySelection:
    """The values that count, newest first, and how many entries were left out and why."""

    values: tuple[float, ...]
    keys: tuple[str, ...]
    excluded: dict[str, int] = field(default_factory=dict)
    scanned: int = 0

    def exclusion_text(self) -> str:
        parts = [f"{count} {reason}" for reason, count in self.excluded.items() if count]
        return ", ".join(parts) if parts else "none"


def select_history(
    history: Sequence[HistoryEntry],
    value_of: Callable[[HistoryEntry], float | None],
    *,
    now: datetime,
    window: int,
    window_hours: float | None = None,
    include_overridden: bool = False,
) -> HistorySelection:
    """The newest *window* counting values of *history* (rules in the module docstring)."""
    values: list[float] = []
    keys: list[str] = []
    excluded = dict.fromkeys(EXCLUSION_REASONS, 0)
    since = now - timedelta(hours=window_hours) if window_hours is not None else None
    scanned = 0
    for index, entry in enumerate(history):
        if len(values) >= window:
            break
        if since is not None and entry.created_at < since:
            # Newest first: everything from here on is older still.
            excluded["outside time window"] += len(history) - index
            break
        scanned += 1
        if entry.effective_decision == "hold":
            excluded["held"] += 1
            continue
        if entry.decision == "hold" and not include_overridden:
            excluded["overridden hold"] += 1
            continue
        if not entry.healthy:
            excluded["not healthy"] += 1
            continue
        value = value_of(entry)
        if value is None or not math.isfinite(value):
            excluded["no value"] += 1
            continue
        values.append(float(value))
        keys.append(entry.snapshot_key)
    return HistorySelection(tuple(values), tuple(keys), excluded, scanned)


def learn_key(check: str, unit: str) -> str:
    """History key of a per-unit learned value: ``<check>[<unit>]``."""
    return f"{check}[{unit}]"


def history_values(findings: Iterable[Mapping[str, Any]]) -> dict[str, float]:
    """The numbers a stored verdict offers to learned limits, as :class:`HistoryEntry` values.

    Each finding (as stored: its ``to_dict()``) gives its ``value`` under the check's name and
    every entry of ``details["learn"]`` (a flat mapping of unit to number) under
    :func:`learn_key`. Non-finite and non-numeric entries are left out.
    """
    values: dict[str, float] = {}
    for f in findings:
        if not isinstance(f, Mapping):
            continue
        check = f.get("check")
        if not isinstance(check, str):
            continue
        value = f.get("value")
        if isinstance(value, (int, float)) and math.isfinite(float(value)):
            values[check] = float(value)
        details = f.get("details")
        learn = details.get("learn") if isinstance(details, Mapping) else None
        if isinstance(learn, Mapping):
            for unit, number in learn.items():
                if isinstance(number, (int, float)) and math.isfinite(float(number)):
                    values[learn_key(check, str(unit))] = float(number)
    return values


def steps_apart(
    candidate_until: datetime | None,
    baseline_until: datetime | None,
    history: Sequence[HistoryEntry],
) -> float:
    """How many usual push intervals separate the candidate's watermark from the baseline's.

    The usual interval is the median gap between the watermarks of consecutive earlier posts
    (newest first in *history*, held or not). 1.0 when anything is unknown and never below 1:
    a learned limit describes one promotion step, and after a hold the next candidate is judged
    against an older baseline, so it is further away (see :mod:`service.gate.adaptive`).
    """
    if candidate_until is None or baseline_until is None:
        return 1.0
    marks = [e.trained_until for e in history if e.trained_until is not None]
    gaps = [
        (newer - older).total_seconds()
        for newer, older in zip(marks, marks[1:], strict=False)
        if newer > older
    ]
    if len(gaps) < 3:
        return 1.0
    usual = sorted(gaps)[len(gaps) // 2]
    apart = (candidate_until - baseline_until).total_seconds()
    return max(1.0, apart / usual) if usual > 0 else 1.0


def consecutive_holds(history: Sequence[HistoryEntry]) -> int:
    """How many of the newest entries in a row ended in ``hold`` (after any override)."""
    count = 0
    for entry in history:
        if entry.effective_decision != "hold":
            break
        count += 1
    return count


def format_age(seconds: float) -> str:
    """A short human reading of a duration: ``40 s``, ``25 min``, ``6 h``, ``3 d``."""
    seconds = max(0.0, seconds)
    if seconds < 60:
        return f"{seconds:.0f} s"
    minutes = seconds / 60
    if minutes < 59.5:
        return f"{minutes:.0f} min"
    hours = minutes / 60
    if hours < 48:
        return f"{hours:.1f} h".replace(".0 h", " h")
    return f"{hours / 24:.1f} d".replace(".0 d", " d")


@dataclass(frozen=True)
class StuckState:
    """Whether a model is stuck behind repeated holds, and since when its baseline serves."""

    consecutive_holds: int
    threshold: int
    stuck: bool
    baseline_age_seconds: float | None
    message: str

    def to_dict(self) -> dict[str, object]:
        return {
            "stuck": self.stuck,
            "consecutive_holds": self.consecutive_holds,
            "threshold": self.threshold,
            "baseline_age_seconds": self.baseline_age_seconds,
            "message": self.message,
        }


def stuck_state(
    history: Sequence[HistoryEntry] | int,
    *,
    threshold: int,
    baseline_since: datetime | None,
    now: datetime,
) -> StuckState:
    """Stuck when the newest *threshold* or more verdicts were holds (threshold 0: never).

    *history* is the verdict history newest first, or the count of consecutive holds when the
    caller has it already (the model list does).
    """
    holds = history if isinstance(history, int) else consecutive_holds(history)
    age = None if baseline_since is None else (now - baseline_since).total_seconds()
    stuck = threshold > 0 and holds >= threshold
    serving = (
        "no baseline yet"
        if baseline_since is None
        else f"serving a baseline from {format_age(age or 0.0)} ago"
    )
    if stuck:
        message = f"stuck: {holds} holds in a row; {serving}"
    else:
        message = f"{holds} hold(s) in a row; {serving}"
    return StuckState(holds, threshold, stuck, age, message)
