"""The numbers of every stored finding, one row per verdict per finding (``finding_values``).

Written in the same transaction as the verdict (:func:`add`), read wherever a verdict's
numbers are needed without its findings' text and evidence: the gate's history
(``HistoryEntry.values``, :func:`values_by_verdict`), the trends of the model page
(:func:`trend_findings`), and anything a check may learn from later (:func:`quantities`).
A post reads the numbers of its model's newest few hundred verdicts through one index range
(``model_id, verdict_id``), so its cost does not grow with the number of stored verdicts.

What is kept of a finding: its identity (check name, kind, statistic, ``against``), outcome,
``value``, ``limit``, ``pvalue``, ``baseline_value``, ``candidate_value``, the interval's two
ends, and ``details["learn"]``: a flat mapping of further quantity names to numbers that a
check reports for learning (non-finite and non-numeric entries are dropped). The verdict's
``findings`` column stays the full record; these rows are derived from it (migration 0002
filled them for verdicts stored before).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, cast

from sqlalchemy import Table, insert, select
from sqlalchemy.orm import Session

from service.gate.history import learn_key
from service.store.tables import FindingValueRow

#: The table itself: reads select its columns directly (Core rows, no ORM loading), which is
#: most of their cost at a few thousand rows per post.
VALUES = cast(Table, FindingValueRow.__table__)


def _number(value: Any) -> float | None:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    number = float(value)
    return number if math.isfinite(number) else None


def learn_of(details: Any) -> dict[str, float] | None:
    """The flat ``learn`` mapping of a finding's details (numbers only), None when absent."""
    if not isinstance(details, Mapping):
        return None
    learn = details.get("learn")
    if not isinstance(learn, Mapping):
        return None
    out = {str(k): n for k, v in learn.items() if (n := _number(v)) is not None}
    return out or None


def rows_for(
    *, verdict_id: int, model_id: int, findings: Sequence[Mapping[str, Any]]
) -> list[dict[str, Any]]:
    """Insert values of ``finding_values`` for one verdict's findings (stored dict form)."""
    out: list[dict[str, Any]] = []
    for position, f in enumerate(findings):
        if not isinstance(f, Mapping) or "check" not in f:
            continue
        interval = f.get("interval")
        low = high = None
        if isinstance(interval, (list, tuple)) and len(interval) == 2:
            low, high = _number(interval[0]), _number(interval[1])
        out.append(
            {
                "verdict_id": verdict_id,
                "model_id": model_id,
                "position": position,
                "check_name": str(f["check"])[:200],
                "kind": str(f.get("kind", ""))[:40],
                "statistic": None if f.get("statistic") is None else str(f["statistic"])[:200],
                "against": None if f.get("against") is None else str(f["against"])[:20],
                "outcome": str(f.get("outcome", ""))[:16],
                "value": _number(f.get("value")),
                "limit_value": _number(f.get("limit")),
                "pvalue": _number(f.get("pvalue")),
                "baseline_value": _number(f.get("baseline_value")),
                "candidate_value": _number(f.get("candidate_value")),
                "interval_low": low,
                "interval_high": high,
                "learn": learn_of(f.get("details")),
            }
        )
    return out


def add(
    session: Session, *, verdict_id: int, model_id: int, findings: Sequence[Mapping[str, Any]]
) -> None:
    """Store the numbers of a new verdict's findings (one multi-row insert; no commit)."""
    rows = rows_for(verdict_id=verdict_id, model_id=model_id, findings=findings)
    if rows:
        session.execute(insert(VALUES), rows)


def _range(model_id: int, verdict_ids: Sequence[int]) -> Any:
    """One index range over the model's rows that covers *verdict_ids* (rows of other
    verdicts in the range are skipped by the callers)."""
    return (
        (VALUES.c.model_id == model_id)
        & (VALUES.c.verdict_id >= min(verdict_ids))
        & (VALUES.c.verdict_id <= max(verdict_ids))
    )


#: Index order: by verdict, then by row id, which is the findings' order (written in one
#: insert, in order), so no sort is needed.
_ORDER = (VALUES.c.verdict_id, VALUES.c.id)


def values_by_verdict(
    session: Session, *, model_id: int, verdict_ids: Sequence[int]
) -> dict[int, dict[str, float]]:
    """verdict id -> {check name: value, learn_key(check, unit): number} (what
    ``HistoryEntry.values`` holds, as service.gate.history.history_values builds it from
    findings). A later finding of the same check wins, as it did when
    the findings were decoded in order."""
    out: dict[int, dict[str, float]] = {vid: {} for vid in verdict_ids}
    if not verdict_ids:
        return out
    stmt = (
        select(VALUES.c.verdict_id, VALUES.c.check_name, VALUES.c.value, VALUES.c.learn)
        .where(
            _range(model_id, verdict_ids),
            VALUES.c.value.is_not(None) | VALUES.c.learn.is_not(None),
        )
        .order_by(*_ORDER)
    )
    current, found = None, None
    for verdict_id, check, value, learn in session.execute(stmt).all():
        if verdict_id != current:
            current, found = verdict_id, out.get(verdict_id)
        if found is None:
            continue
        if value is not None:
            found[check] = value
        # the gate's convention (service.gate.history.history_values): learn entries under
        # learn_key(check, unit)
        for unit, number in (learn or {}).items():
            if isinstance(number, (int, float)):
                found[learn_key(check, str(unit))] = float(number)
    return out


@dataclass(frozen=True)
class Quantities:
    """Every number stored for one finding of one verdict."""

    check: str
    kind: str
    statistic: str | None
    against: str | None
    outcome: str
    value: float | None
    limit: float | None
    pvalue: float | None
    baseline_value: float | None
    candidate_value: float | None
    interval: tuple[float, float] | None
    learn: Mapping[str, float] = field(default_factory=dict)

    def as_finding(self) -> dict[str, Any]:
        """The stored finding's numeric fields under their Finding names (dict form)."""
        return {
            "check": self.check,
            "kind": self.kind,
            "statistic": self.statistic,
            "against": self.against,
            "outcome": self.outcome,
            "value": self.value,
            "limit": self.limit,
            "pvalue": self.pvalue,
            "baseline_value": self.baseline_value,
            "candidate_value": self.candidate_value,
            "interval": None if self.interval is None else list(self.interval),
            "learn": dict(self.learn),
        }


def _quantities(rows: Iterable[Any]) -> Iterable[tuple[int, Quantities]]:
    for r in rows:
        interval = (
            (r.interval_low, r.interval_high)
            if r.interval_low is not None and r.interval_high is not None
            else None
        )
        yield (
            r.verdict_id,
            Quantities(
                check=r.check_name,
                kind=r.kind,
                statistic=r.statistic,
                against=r.against,
                outcome=r.outcome,
                value=r.value,
                limit=r.limit_value,
                pvalue=r.pvalue,
                baseline_value=r.baseline_value,
                candidate_value=r.candidate_value,
                interval=interval,
                learn=dict(r.learn or {}),
            ),
        )


def quantities(
    session: Session, *, model_id: int, verdict_ids: Sequence[int]
) -> dict[int, list[Quantities]]:
    """verdict id -> every stored finding's numbers, in the verdict's finding order."""
    out: dict[int, list[Quantities]] = {vid: [] for vid in verdict_ids}
    if not verdict_ids:
        return out
    rows = session.execute(select(VALUES).where(_range(model_id, verdict_ids)).order_by(*_ORDER))
    for verdict_id, q in _quantities(rows):
        if verdict_id in out:
            out[verdict_id].append(q)
    return out


def trend_findings(
    session: Session, *, model_id: int, verdict_ids: Sequence[int]
) -> dict[int, list[dict[str, Any]]]:
    """verdict id -> its findings' numbers in the stored findings' dict form, with the keys
    the model page's trends read (check, kind, statistic, outcome, value, limit,
    baseline_value), without decoding the verdicts' findings."""
    out: dict[int, list[dict[str, Any]]] = {vid: [] for vid in verdict_ids}
    if not verdict_ids:
        return out
    c = VALUES.c
    stmt = (
        select(c.verdict_id, c.check_name, c.kind, c.statistic, c.outcome, c.value)
        .add_columns(c.limit_value, c.baseline_value)
        .where(_range(model_id, verdict_ids))
        .order_by(*_ORDER)
    )
    for verdict_id, check, kind, statistic, outcome, value, limit, base in session.execute(
        stmt
    ).all():
        found = out.get(verdict_id)
        if found is not None:
            found.append(
                {
                    "check": check,
                    "kind": kind,
                    "statistic": statistic,
                    "outcome": outcome,
                    "value": value,
                    "limit": limit,
                    "baseline_value": base,
                }
            )
    return out
