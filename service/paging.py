"""Telling on-call: per-model gauges read from the database, and outgoing webhook messages.

**Gauges.** ``model_gauges`` reads each model's state from the database when Prometheus scrapes
``/metrics``, through the same read model as the model list (``views.model_view``), so every
worker and instance answers the same numbers and they agree with the pages and the CLI.
``config/alerts/tidegate-rules.yml`` holds alert rules on them.

**Webhook.** When a verdict holds, when a model becomes stuck, and when an operator overrides a
verdict, a message is written to the ``webhook_deliveries`` table *in the same transaction* as
the verdict or override (an outbox: an acknowledged event is never lost, and a rolled-back one
is never sent). A :class:`Dispatcher` thread per process sends due messages, one POST each:

- body: JSON (UTF-8), the event with links to the verdict page and the API;
- ``X-Tidegate-Event``: hold | stuck | override; ``X-Tidegate-Delivery``: the message id (the
  same on every retry, so a receiver can drop duplicates);
- ``X-Tidegate-Timestamp``: Unix seconds of this attempt;
- ``X-Tidegate-Signature``: ``sha256=`` + hex HMAC-SHA256 (RFC 2104) keyed with the shared
  secret over ``timestamp + "." + body``. A receiver recomputes it, compares in constant time
  and refuses timestamps older than a few minutes (a replayed message).

A 2xx answer delivers the message. Network errors, timeouts, 408, 429 and 5xx are retried with
exponential backoff and full jitter (the wait before attempt *n* + 1 is uniform on
``[0, base * 2**(n-1)]``, capped at an hour; Brooker, "Exponential Backoff And Jitter", AWS
Architecture Blog, 2015) up to ``TIDEGATE_WEBHOOK_MAX_ATTEMPTS``; other answers fail it at once.
Each message's attempts, last status and error are stored and shown on the model page.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import logging
import random
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any

import httpx
from sqlalchemy.orm import Session, sessionmaker

from service import views
from service.gate.policy import Policy, select_policy
from service.metrics import escape_label, format_value
from service.settings import Settings
from service.store import db as store_db
from service.store import deliveries, repo
from service.store.tables import ModelRow, OverrideRow, SnapshotRow, VerdictRow
from service.web import format as web_format

log = logging.getLogger("tidegate.paging")

RETRY_STATUSES = frozenset({408, 425, 429})
LEASE_SECONDS = 60.0
MAX_BACKOFF_SECONDS = 3600.0
USER_AGENT = "tidegate-webhook/1"


# --- signing --------------------------------------------------------------------------------


def mac(secret: str, message: bytes) -> str:
    """Hex HMAC-SHA256 of *message* keyed with the UTF-8 bytes of *secret* (RFC 2104; test
    vectors in RFC 4231)."""
    return hmac.new(secret.encode("utf-8"), message, hashlib.sha256).hexdigest()


def signature(secret: str, timestamp: int, body: bytes) -> str:
    """``sha256=<hex>``: :func:`mac` over ``b"<timestamp>." + body``."""
    return "sha256=" + mac(secret, f"{timestamp}.".encode() + body)


def verify(
    secret: str, *, timestamp: str, body: bytes, header: str, now: float, tolerance: float = 300
) -> bool:
    """What a receiver does: the signature matches and the timestamp is recent."""
    try:
        ts = int(timestamp)
    except ValueError:
        return False
    if abs(now - ts) > tolerance:
        return False
    return hmac.compare_digest(signature(secret, ts, body), header)


def backoff_seconds(attempt: int, base: float, rand: Callable[[], float] = random.random) -> float:
    """Full-jitter exponential backoff before the retry that follows attempt *attempt* (1-based)."""
    ceiling = min(MAX_BACKOFF_SECONDS, base * 2.0 ** max(0, attempt - 1))
    return ceiling * rand()


# --- events (called inside the transaction that stores the verdict or override) ------------


def _links(settings: Settings, model: str, key: str, verdict_id: int) -> dict[str, str]:
    base = settings.public_url.rstrip("/")
    return {
        "verdict_page": base + web_format.snapshot_url(model, key),
        "verdict_api": f"{base}/v1/verdicts/{verdict_id}",
        "model_page": base + web_format.model_url(model),
    }


def _payload(
    event: str,
    *,
    settings: Settings,
    model: ModelRow,
    snapshot: SnapshotRow,
    verdict: VerdictRow,
    decision_in_force: str,
    now: datetime,
    extra: dict[str, Any] | None = None,
) -> dict[str, Any]:
    out: dict[str, Any] = {
        "event": event,
        "at": views.iso(now),
        "model": model.name,
        "snapshot": snapshot.key,
        "verdict_id": verdict.id,
        "decision": verdict.decision,
        "decision_in_force": decision_in_force,
        "reasons": list(verdict.reasons or [])[:10],
        "links": _links(settings, model.name, snapshot.key, verdict.id),
    }
    if extra:
        out.update(extra)
    return out


def after_verdict(
    session: Session,
    *,
    settings: Settings,
    policies: Sequence[Policy],
    model: ModelRow,
    snapshot: SnapshotRow,
    verdict: VerdictRow,
    now: datetime,
) -> list[int]:
    """Queue the messages a new verdict calls for: ``hold`` when it holds, ``stuck`` when this
    hold makes the run of holds reach the policy's ``stuck_after_holds``. Returns their ids."""
    events = settings.webhook_event_set()
    if not events or verdict.decision != "hold" or settings.webhook_url is None:
        return []
    state = views.model_view(session, model=model, now=now, policies=policies)
    holds = int(state["consecutive_holds"])
    stuck = dict(state["stuck"])
    extra = {
        "consecutive_holds": holds,
        "stuck": bool(stuck.get("stuck")),
        "baseline": state.get("baseline"),
    }
    ids = []
    if "hold" in events:
        body = _payload(
            "hold",
            settings=settings,
            model=model,
            snapshot=snapshot,
            verdict=verdict,
            decision_in_force="hold",
            now=now,
            extra=extra,
        )
        ids.append(_add(session, settings, model, "hold", verdict.id, body, now))
    threshold = int(stuck.get("threshold") or 0)
    if "stuck" in events and threshold > 0 and holds == threshold:
        body = _payload(
            "stuck",
            settings=settings,
            model=model,
            snapshot=snapshot,
            verdict=verdict,
            decision_in_force="hold",
            now=now,
            extra={**extra, "message": stuck.get("message", "")},
        )
        ids.append(_add(session, settings, model, "stuck", verdict.id, body, now))
    return ids


def after_override(
    session: Session,
    *,
    settings: Settings,
    model: ModelRow,
    snapshot: SnapshotRow,
    verdict: VerdictRow,
    override: OverrideRow,
    baseline_before: str | None,
    baseline_after: str | None,
    now: datetime,
) -> list[int]:
    """Queue an ``override`` message for an operator's override."""
    if "override" not in settings.webhook_event_set():
        return []
    body = _payload(
        "override",
        settings=settings,
        model=model,
        snapshot=snapshot,
        verdict=verdict,
        decision_in_force=override.decision,
        now=now,
        extra={
            "override": {
                "decision": override.decision,
                "actor": override.actor,
                "reason": override.reason,
            },
            "baseline_before": baseline_before,
            "baseline_after": baseline_after,
        },
    )
    return [_add(session, settings, model, "override", verdict.id, body, now)]


def _add(
    session: Session,
    settings: Settings,
    model: ModelRow,
    event: str,
    verdict_id: int,
    body: dict[str, Any],
    now: datetime,
) -> int:
    assert settings.webhook_url is not None
    row = deliveries.add_delivery(
        session,
        model_id=model.id,
        event=event,
        verdict_id=verdict_id,
        url=settings.webhook_url,
        payload=body,
        now=now,
    )
    return row.id


def delivery_view(row: Any) -> dict[str, Any]:
    """A delivery as the model page and the API show it."""
    if row.delivered_at is not None:
        state = "delivered"
    elif row.failed_at is not None:
        state = "failed"
    else:
        state = "pending"
    return {
        "id": row.id,
        "event": row.event,
        "verdict_id": row.verdict_id,
        "snapshot": (row.payload or {}).get("snapshot"),
        "state": state,
        "attempts": row.attempts,
        "last_status": row.last_status,
        "last_error": row.last_error or None,
        "created_at": views.iso(row.created_at),
        "last_attempt_at": views.iso(row.last_attempt_at),
        "delivered_at": views.iso(row.delivered_at),
        "next_attempt_at": views.iso(row.next_attempt_at) if state == "pending" else None,
    }


# --- sending --------------------------------------------------------------------------------


@dataclass(frozen=True)
class Attempt:
    delivered: bool
    retry: bool
    status: int | None
    error: str


def send_once(
    client: httpx.Client, *, url: str, secret: str, delivery_id: int, payload: dict[str, Any]
) -> Attempt:
    """One POST of a message; classifies the answer (delivered / retry / give up)."""
    body = json.dumps(payload, separators=(",", ":"), sort_keys=True).encode("utf-8")
    ts = int(time.time())
    headers = {
        "content-type": "application/json",
        "user-agent": USER_AGENT,
        "x-tidegate-event": str(payload.get("event", "")),
        "x-tidegate-delivery": str(delivery_id),
        "x-tidegate-timestamp": str(ts),
        "x-tidegate-signature": signature(secret, ts, body),
    }
    try:
        response = client.post(url, content=body, headers=headers)
    except httpx.HTTPError as exc:
        return Attempt(False, True, None, f"{type(exc).__name__}: {exc}")
    status = response.status_code
    if 200 <= status < 300:
        return Attempt(True, False, status, "")
    retry = status >= 500 or status in RETRY_STATUSES
    return Attempt(False, retry, status, f"HTTP {status}")


class Dispatcher:
    """Sends due webhook messages from a daemon thread; ``wake()`` after a commit that queued
    one. Started only when a webhook URL is set; ``stop()`` on shutdown."""

    def __init__(
        self,
        settings: Settings,
        factory: sessionmaker[Session],
        *,
        clock: Callable[[], datetime],
        transport: httpx.BaseTransport | None = None,
    ) -> None:
        self.settings = settings
        self.factory = factory
        self.clock = clock
        self._transport = transport
        self._wake = threading.Event()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._lock = threading.Lock()

    @property
    def enabled(self) -> bool:
        return self.settings.webhook_url is not None and self.settings.webhook_secret is not None

    def wake(self) -> None:
        """Send what is due now; starts the thread if it is not running. The thread ends by
        itself once nothing is pending, so an idle service (or a test's app) keeps none."""
        if not self.enabled:
            return
        with self._lock:
            self._wake.set()
            if self._thread is None or not self._thread.is_alive():
                self._stop.clear()
                self._thread = threading.Thread(
                    target=self._run, name="tidegate-webhook", daemon=True
                )
                self._thread.start()

    def stop(self, timeout: float = 10.0) -> None:
        self._stop.set()
        self._wake.set()
        thread = self._thread
        if thread is not None:
            thread.join(timeout)

    def _run(self) -> None:
        with httpx.Client(
            timeout=self.settings.webhook_timeout_seconds, transport=self._transport
        ) as client:
            while not self._stop.is_set():
                self._wake.clear()
                try:
                    wait = self.run_due(client)
                except Exception:  # the database may be briefly unavailable; try again
                    log.exception("webhook dispatcher pass failed")
                    wait = 5.0
                if wait is None:
                    with self._lock:
                        if not self._wake.is_set():
                            self._thread = None
                            return
                    continue
                self._wake.wait(timeout=wait)

    def run_due(self, client: httpx.Client) -> float | None:
        """Send every due message once; returns how long to wait before the next pass (None:
        nothing is pending)."""
        secret = self.settings.webhook_secret
        assert secret is not None
        while not self._stop.is_set():
            now = self.clock()
            with store_db.read_transaction(self.factory) as session:
                ids = deliveries.due_ids(session, now=now)
            if not ids:
                break
            for delivery_id in ids:
                self._deliver(client, delivery_id, secret.get_secret_value())
        with store_db.read_transaction(self.factory) as session:
            due = deliveries.next_due_at(session)
        if due is None:
            return None
        due = repo.utc(due) or self.clock()
        return max(0.05, min(30.0, (due - self.clock()).total_seconds()))

    def _deliver(self, client: httpx.Client, delivery_id: int, secret: str) -> None:
        with store_db.transaction(self.factory) as session:
            if not deliveries.lease(
                session, delivery_id=delivery_id, now=self.clock(), seconds=LEASE_SECONDS
            ):
                return
        with store_db.read_transaction(self.factory) as session:
            row = deliveries.get(session, delivery_id=delivery_id)
            if row is None:
                return
            url, payload, attempts = row.url, dict(row.payload), row.attempts
        outcome = send_once(
            client, url=url, secret=secret, delivery_id=delivery_id, payload=payload
        )
        now = self.clock()
        retry_at = None
        more = attempts < self.settings.webhook_max_attempts
        if not outcome.delivered and outcome.retry and more:
            wait = backoff_seconds(attempts, self.settings.webhook_backoff_seconds)
            retry_at = now + timedelta(seconds=wait)
        with store_db.transaction(self.factory) as session:
            deliveries.record_attempt(
                session,
                delivery_id=delivery_id,
                now=now,
                status=outcome.status,
                error=outcome.error,
                delivered=outcome.delivered,
                retry_at=retry_at,
            )
        log.info(
            "webhook %s: %s",
            delivery_id,
            "delivered" if outcome.delivered else outcome.error,
        )


# --- gauges ---------------------------------------------------------------------------------


def _baseline_age_limit_seconds(policy: Policy | None) -> float | None:
    if policy is None:
        return None
    for check in policy.checks:
        if getattr(check, "kind", None) == "baseline-age":
            hours = getattr(check, "max_age_hours", None)
            if isinstance(hours, int | float):
                return float(hours) * 3600.0
    return None


def model_gauges(
    session: Session,
    *,
    policies: Sequence[Policy],
    now: datetime,
    allow: Callable[[str], bool],
) -> str:
    """Per-model gauges and stored-verdict counters in the Prometheus text format (0.0.4),
    read from the database now."""
    rows = [m for m in repo.list_model_rows(session) if allow(m.name)]
    counts = repo.verdict_counts_by_model(session) if rows else {}
    series: dict[str, list[str]] = {name: [] for name, _, _ in GAUGES}
    for model in rows:
        view = views.model_view(session, model=model, now=now, policies=policies)
        label = f'model="{escape_label(model.name)}"'
        stuck = dict(view["stuck"])
        series["tidegate_model_stuck"].append(f"{{{label}}} {1 if stuck.get('stuck') else 0}")
        series["tidegate_model_consecutive_holds"].append(
            f"{{{label}}} {int(view['consecutive_holds'])}"
        )
        age = view.get("baseline_age_seconds")
        if age is not None:
            series["tidegate_model_baseline_age_seconds"].append(
                f"{{{label}}} {format_value(float(age))}"
            )
        limit = _baseline_age_limit_seconds(select_policy(policies, model.name))
        if limit is not None:
            series["tidegate_model_baseline_age_limit_seconds"].append(
                f"{{{label}}} {format_value(limit)}"
            )
        last = view.get("last_verdict")
        if last:
            in_force = str(last.get("effective_decision") or last.get("decision"))
            for decision in ("promote", "hold"):
                series["tidegate_model_last_decision"].append(
                    f'{{{label},decision="{decision}"}} {1 if in_force == decision else 0}'
                )
        for decision in ("promote", "hold"):
            n = counts.get((model.id, decision), 0)
            series["tidegate_stored_verdicts_total"].append(
                f'{{{label},decision="{decision}"}} {n}'
            )
    lines: list[str] = []
    for name, kind, help_text in GAUGES:
        lines.append(f"# HELP {name} {help_text}")
        lines.append(f"# TYPE {name} {kind}")
        lines.extend(name + s for s in series[name])
    return "\n".join(lines) + "\n"


#: The database-backed series: name, type, help.
GAUGES: tuple[tuple[str, str, str], ...] = (
    ("tidegate_model_stuck", "gauge", "1 when the model is stuck behind repeated holds."),
    (
        "tidegate_model_consecutive_holds",
        "gauge",
        "Verdicts in a row, newest first, whose decision in force is hold.",
    ),
    (
        "tidegate_model_baseline_age_seconds",
        "gauge",
        "Seconds since the serving baseline became the baseline.",
    ),
    (
        "tidegate_model_baseline_age_limit_seconds",
        "gauge",
        "The policy's baseline-age limit in seconds (models whose policy has one).",
    ),
    (
        "tidegate_model_last_decision",
        "gauge",
        "1 for the decision in force of the model's latest verdict, 0 for the other.",
    ),
    (
        "tidegate_stored_verdicts_total",
        "counter",
        "Verdicts stored for the model, by the gate's decision (read from the database, so "
        "every worker answers the same).",
    ),
)


# --- the hooks the routes call --------------------------------------------------------------


def on_verdict(
    session: Session,
    *,
    settings: Settings,
    policies: Sequence[Policy],
    model: ModelRow,
    snapshot: SnapshotRow,
    verdict: VerdictRow,
    created: bool,
    now: datetime,
) -> list[int]:
    """After ``intake.submit`` in the same transaction: queue a new verdict's messages (a retry
    of a stored post queues nothing)."""
    if not created:
        return []
    return after_verdict(
        session,
        settings=settings,
        policies=policies,
        model=model,
        snapshot=snapshot,
        verdict=verdict,
        now=now,
    )


def on_override(session: Session, *, settings: Settings, outcome: Any, now: datetime) -> list[int]:
    """After ``operate.override_verdict`` in the same transaction."""
    return after_override(
        session,
        settings=settings,
        model=outcome.model,
        snapshot=outcome.snapshot,
        verdict=outcome.verdict,
        override=outcome.override,
        baseline_before=outcome.baseline_before,
        baseline_after=outcome.baseline_after,
        now=now,
    )


def wake(state: Any, queued: Sequence[int]) -> None:
    """After the commit: let the app's dispatcher send what was queued."""
    dispatcher = getattr(state, "dispatcher", None)
    if queued and dispatcher is not None:
        dispatcher.wake()
