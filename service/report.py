"""The gate report: how often each check held a model, and how often a person disagreed.

For the platform engineer tuning a policy. Per model and check, over the last 7 and 30 days:
the holds the check caused (a verdict the gate held with a blocking breach, or a blocking
inconclusive finding, of that check), and how many of those an operator overrode to promote:
the gate's *known false holds* (a person looked and shipped it anyway). A verdict held by two
checks counts for both. Beside them, the limit each check applied over time (a learned limit
moves; a fixed one is flat), and a replay of a changed policy over the same window
(:mod:`service.replay`) with the policy in force, side by side.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import Any

from sqlalchemy.orm import Session

from service.replay import ReplayResult, holding_checks
from service.store import repo
from service.store.tables import ModelRow
from service.views import iso

#: The report's two windows, in days.
WINDOWS = (7, 30)
#: Most verdicts read per model for the report (the newest first).
MAX_VERDICTS = 5000
#: Most verdicts one replay from the report page judges again (each is a full evaluation).
REPLAY_CAP = 200


@dataclass
class CheckTally:
    """One check's holds and known false holds per window (days -> count)."""

    check: str
    holds: dict[int, int] = field(default_factory=lambda: dict.fromkeys(WINDOWS, 0))
    overridden: dict[int, int] = field(default_factory=lambda: dict.fromkeys(WINDOWS, 0))

    def to_dict(self) -> dict[str, Any]:
        return {
            "check": self.check,
            "holds": {str(d): n for d, n in self.holds.items()},
            "overridden": {str(d): n for d, n in self.overridden.items()},
        }


def model_report(session: Session, *, model: ModelRow, now: datetime) -> dict[str, Any]:
    """The report of one model (see the module docstring)."""
    since = now - timedelta(days=max(WINDOWS))
    rows, _ = repo.list_verdicts(session, model_id=model.id, since=since, limit=MAX_VERDICTS)
    overrides = repo.overrides_for(session, verdict_ids=[v.id for v, _ in rows])
    tallies: dict[str, CheckTally] = {}
    totals = {d: {"verdicts": 0, "holds": 0, "overridden": 0} for d in WINDOWS}
    limits: dict[str, list[dict[str, Any]]] = {}
    for verdict, snapshot in reversed(rows):  # oldest first
        at = repo.utc(verdict.created_at)
        assert at is not None
        effective = repo.effective_decision(verdict, overrides[verdict.id])
        false_hold = verdict.decision == "hold" and effective == "promote"
        held_by = holding_checks(verdict.decision, verdict.findings)
        for days in WINDOWS:
            if at < now - timedelta(days=days):
                continue
            totals[days]["verdicts"] += 1
            totals[days]["holds"] += verdict.decision == "hold"
            totals[days]["overridden"] += false_hold
            for name in held_by:
                tally = tallies.setdefault(name, CheckTally(name))
                tally.holds[days] += 1
                tally.overridden[days] += false_hold
        for f in verdict.findings:
            if f.get("limit") is None or f.get("kind") in ("health", "lineage"):
                continue
            limits.setdefault(str(f["check"]), []).append(
                {
                    "at": iso(at),
                    "snapshot": snapshot.key,
                    "limit": f["limit"],
                    "value": f.get("value"),
                    "learned": isinstance(f.get("details"), Mapping) and "adaptive" in f["details"],
                }
            )
    # a limit learned from history (an adaptive check) moves; the rest are the policy's
    moving = {name: pts for name, pts in limits.items() if any(p["learned"] for p in pts)}
    return {
        "model": model.name,
        "verdicts_read": len(rows),
        "capped": len(rows) >= MAX_VERDICTS,
        "totals": {str(d): t for d, t in totals.items()},
        "checks": [
            t.to_dict()
            for t in sorted(tallies.values(), key=lambda t: (-t.holds[max(WINDOWS)], t.check))
        ],
        "limits": moving,
        "fixed_limits": {
            name: pts[-1]["limit"] for name, pts in limits.items() if name not in moving
        },
    }


def verdicts_in_window(session: Session, *, model: ModelRow, now: datetime, days: int) -> int:
    """How many verdicts the model has from the last *days* days."""
    return repo.count_verdicts(session, model_id=model.id, since=now - timedelta(days=days))


def replay_tally(result: ReplayResult) -> dict[str, Any]:
    """A replay's holds per check and its known false holds (overridden holds it still holds)."""
    per_check: dict[str, int] = {}
    for row in result.rows:
        for name in row.get("replay_held_by", []):
            per_check[name] = per_check.get(name, 0) + 1
    return {
        "policy": result.policy,
        "policy_digest": result.policy_digest,
        "summary": result.summary(),
        "per_check": per_check,
    }


def side_by_side(current: ReplayResult, changed: ReplayResult) -> dict[str, Any]:
    """The two replays of the same verdicts: each one's tally, and the snapshots they decide
    differently."""
    differ = []
    for a, b in zip(current.rows, changed.rows, strict=True):
        if a["replay_decision"] != b["replay_decision"]:
            differ.append(
                {
                    "snapshot": a["snapshot"],
                    "created_at": a["created_at"],
                    "then": a["decision"],
                    "in_force": a["effective_decision"],
                    "current": a["replay_decision"],
                    "changed": b["replay_decision"],
                    "current_reasons": a["replay_reasons"],
                    "changed_reasons": b["replay_reasons"],
                }
            )
    checks = sorted(
        set(replay_tally(current)["per_check"]) | set(replay_tally(changed)["per_check"])
    )
    return {
        "current": replay_tally(current),
        "changed": replay_tally(changed),
        "checks": checks,
        "differ": differ,
        "snapshots": len(current.rows),
    }
