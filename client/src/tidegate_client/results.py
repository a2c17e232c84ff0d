"""What the service answers, as frozen objects with fixed fields.

Each keeps the JSON it was made from in ``raw`` (fields added to the service later are there
before the client knows them).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from typing import Any, Literal

__all__ = ["Finding", "Serving", "Verdict", "WaitResult"]

Decision = Literal["promote", "hold"]


def _time(value: Any) -> datetime | None:
    if not isinstance(value, str) or not value:
        return None
    return datetime.fromisoformat(value.replace("Z", "+00:00"))


def _float(value: Any) -> float | None:
    return float(value) if isinstance(value, (int, float)) and not isinstance(value, bool) else None


@dataclass(frozen=True)
class Finding:
    """One check's result.

    Attributes
    ----------
    check : str
        The check's name in the policy, e.g. ``score-psi`` or ``health.rows``.
    kind : str
        Its family: ``health``, ``lineage``, ``drift``, ``quality``, ...
    outcome : str
        ``ok``, ``breach``, ``advisory``, ``inconclusive`` or ``skipped``.
    message : str
        The finding in words.
    statistic, value, limit, pvalue, baseline_value, candidate_value
        The figures behind it, where the check has them.
    blocking : bool
        Whether a breach of this check holds the candidate.
    """

    check: str
    kind: str
    outcome: str
    message: str
    statistic: str | None = None
    value: float | None = None
    limit: float | None = None
    pvalue: float | None = None
    baseline_value: float | None = None
    candidate_value: float | None = None
    blocking: bool = True
    raw: dict[str, Any] = field(default_factory=dict, repr=False, compare=False)

    @classmethod
    def from_json(cls, data: dict[str, Any]) -> Finding:
        return cls(
            check=str(data.get("check", "")),
            kind=str(data.get("kind", "")),
            outcome=str(data.get("outcome", "")),
            message=str(data.get("message", "")),
            statistic=data.get("statistic"),
            value=_float(data.get("value")),
            limit=_float(data.get("limit")),
            pvalue=_float(data.get("pvalue")),
            baseline_value=_float(data.get("baseline_value")),
            candidate_value=_float(data.get("candidate_value")),
            blocking=bool(data.get("blocking", True)),
            raw=data,
        )


@dataclass(frozen=True)
class Verdict:
    """The gate's answer to a post.

    Attributes
    ----------
    verdict_id : int
        The verdict's id (``tidegate why``, ``/ui/verdicts/{id}``).
    model, snapshot : str
        The model and the snapshot key judged.
    decision : {'promote', 'hold'}
        The gate's decision, as judged.
    effective_decision : {'promote', 'hold'}
        The decision in force: the latest operator override's, else the gate's.
    serves_now : bool
        Whether this snapshot is the one serving at the time of the answer. A job deploys when
        this is true; it is what ``tidegate submit`` exits 0 on.
    reasons : tuple of str
        Why, most severe first (empty for a clean promote).
    findings : tuple of Finding
        Every check's result.
    link : str
        The verdict's page for a person.
    created : bool
        True for a new verdict; False when the post was a retry of a stored snapshot.
    raw : dict
        The JSON answer.
    """

    verdict_id: int
    model: str
    snapshot: str
    decision: Decision
    effective_decision: Decision
    serves_now: bool
    reasons: tuple[str, ...]
    findings: tuple[Finding, ...]
    link: str
    created: bool
    baseline: str | None = None
    policy_digest: str | None = None
    raw: dict[str, Any] = field(default_factory=dict, repr=False, compare=False)

    @property
    def promoted(self) -> bool:
        """The decision in force is promote (the snapshot may still not serve, when a newer
        one was promoted since)."""
        return self.effective_decision == "promote"

    @property
    def overridden(self) -> bool:
        """An operator changed the gate's decision."""
        return self.effective_decision != self.decision or bool(self.raw.get("overridden"))

    def breaches(self) -> tuple[Finding, ...]:
        """The findings that breached (blocking or advisory)."""
        return tuple(f for f in self.findings if f.outcome in {"breach", "advisory"})

    @classmethod
    def from_json(cls, data: dict[str, Any], *, base_url: str, created: bool) -> Verdict:
        effective = data.get("effective_decision") or data["decision"]
        serves = data.get("serves_now")
        if not isinstance(serves, bool):  # a service older than the field
            serves = effective == "promote" and bool(data.get("moved_baseline"))
        return cls(
            verdict_id=int(data["verdict_id"]),
            model=str(data["model"]),
            snapshot=str(data["snapshot"]),
            decision=data["decision"],
            effective_decision=effective,
            serves_now=serves,
            reasons=tuple(str(r) for r in data.get("reasons", ())),
            findings=tuple(Finding.from_json(f) for f in data.get("findings", ())),
            link=f"{base_url}/ui/verdicts/{int(data['verdict_id'])}",
            created=created,
            baseline=data.get("baseline"),
            policy_digest=data.get("policy_digest"),
            raw=data,
        )


@dataclass(frozen=True)
class Serving:
    """What serves now for a model (``GET /v1/models/{model}/serving``).

    Attributes
    ----------
    model : str
    snapshot : str or None
        The key of the snapshot that serves; None when nothing serves yet.
    since : datetime or None
        When it started serving (UTC).
    cause : str or None
        What made it serve: ``gate`` (a promote verdict), ``override`` (an operator overrode a
        hold), ``manual`` (set by hand) or ``rollback`` (set back to an older snapshot).
    verdict_id : int or None
        The verdict behind it (for ``gate`` and ``override``).
    audit_id : int or None
        The audit log entry of the change.
    actor : str or None
        Who made the change (``gate`` for the gate).
    reason : str or None
        The reason given.
    trained_until : datetime or None
        The serving snapshot's watermark.
    asked : str or None
        The snapshot key asked about (``serving(model, snapshot=...)``), if any.
    asked_state : {'serves', 'waiting', 'superseded'} or None
        For the snapshot asked about: it serves; it may still come to serve (held, and nothing
        newer serves: an operator may still override); or it can no longer serve because a
        newer snapshot serves (only an explicit rollback would bring it back).
    etag : str or None
        The answer's entity tag, for cheap polling.
    """

    model: str
    snapshot: str | None
    since: datetime | None
    cause: str | None
    verdict_id: int | None
    audit_id: int | None
    actor: str | None
    reason: str | None
    trained_until: datetime | None = None
    asked: str | None = None
    asked_state: str | None = None
    etag: str | None = None
    raw: dict[str, Any] = field(default_factory=dict, repr=False, compare=False)

    @classmethod
    def from_json(cls, data: dict[str, Any], *, etag: str | None = None) -> Serving:
        asked = data.get("asked") or {}
        return cls(
            model=str(data["model"]),
            snapshot=data.get("snapshot"),
            since=_time(data.get("since")),
            cause=data.get("cause"),
            verdict_id=data.get("verdict_id"),
            audit_id=data.get("audit_id"),
            actor=data.get("actor"),
            reason=data.get("reason"),
            trained_until=_time(data.get("trained_until")),
            asked=asked.get("snapshot"),
            asked_state=asked.get("state"),
            etag=etag,
            raw=data,
        )


@dataclass(frozen=True)
class WaitResult:
    """How :meth:`tidegate_client.Client.wait` ended.

    Attributes
    ----------
    state : {'serves', 'superseded', 'timeout'}
        The snapshot serves; a newer snapshot serves, so it can no longer serve (without a
        rollback); or the timeout passed first.
    serving : Serving or None
        The last answer of the service (None if it never answered).
    polls : int
        How many requests were made (answers 304 Not Modified included).
    """

    state: Literal["serves", "superseded", "timeout"]
    serving: Serving | None
    polls: int
