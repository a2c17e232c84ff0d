"""Webhook deliveries (the outbox): added with the verdict or override they report, taken by a
dispatcher, marked delivered or failed. Keyword-only functions that never commit.

Several workers or instances share the table: a dispatcher *leases* a due message with one
conditional ``UPDATE`` (only if nobody holds an unexpired lease), so a message is sent by one
dispatcher at a time, and by another one after a crash once the lease runs out.
"""

from __future__ import annotations

from collections.abc import Sequence
from datetime import datetime, timedelta
from typing import Any

from sqlalchemy import func, or_, select, update
from sqlalchemy.orm import Session

from service.store.tables import DeliveryRow

#: Longest error text kept per delivery.
ERROR_CHARS = 500


def add_delivery(
    session: Session,
    *,
    model_id: int,
    event: str,
    verdict_id: int | None,
    url: str,
    payload: dict[str, Any],
    now: datetime,
) -> DeliveryRow:
    row = DeliveryRow(
        model_id=model_id,
        event=event,
        verdict_id=verdict_id,
        url=url,
        payload=payload,
        created_at=now,
        attempts=0,
        next_attempt_at=now,
        last_error="",
    )
    session.add(row)
    session.flush()
    return row


def due_ids(session: Session, *, now: datetime, limit: int = 20) -> list[int]:
    """Messages neither delivered nor given up whose next attempt is due, oldest first."""
    stmt = (
        select(DeliveryRow.id)
        .where(
            DeliveryRow.delivered_at.is_(None),
            DeliveryRow.failed_at.is_(None),
            DeliveryRow.next_attempt_at <= now,
            or_(DeliveryRow.lease_until.is_(None), DeliveryRow.lease_until < now),
        )
        .order_by(DeliveryRow.id)
        .limit(limit)
    )
    return list(session.scalars(stmt))


def next_due_at(session: Session) -> datetime | None:
    """When the earliest pending message is next due (None: nothing pending)."""
    stmt = select(func.min(DeliveryRow.next_attempt_at)).where(
        DeliveryRow.delivered_at.is_(None), DeliveryRow.failed_at.is_(None)
    )
    value = session.scalar(stmt)
    return value if isinstance(value, datetime) or value is None else None


def lease(session: Session, *, delivery_id: int, now: datetime, seconds: float) -> bool:
    """Take message *delivery_id* for *seconds* unless another dispatcher holds it or it is
    settled; True when this caller has it."""
    result = session.execute(
        update(DeliveryRow)
        .where(
            DeliveryRow.id == delivery_id,
            DeliveryRow.delivered_at.is_(None),
            DeliveryRow.failed_at.is_(None),
            or_(DeliveryRow.lease_until.is_(None), DeliveryRow.lease_until < now),
        )
        .values(lease_until=now + timedelta(seconds=seconds), attempts=DeliveryRow.attempts + 1)
        .execution_options(synchronize_session=False)
    )
    return bool(getattr(result, "rowcount", 0) == 1)


def get(session: Session, *, delivery_id: int) -> DeliveryRow | None:
    return session.get(DeliveryRow, delivery_id)


def record_attempt(
    session: Session,
    *,
    delivery_id: int,
    now: datetime,
    status: int | None,
    error: str,
    delivered: bool,
    retry_at: datetime | None,
) -> None:
    """The outcome of one attempt: delivered, retried at *retry_at*, or given up (neither)."""
    values: dict[str, Any] = {
        "last_status": status,
        "last_error": error[:ERROR_CHARS],
        "last_attempt_at": now,
        "lease_until": None,
    }
    if delivered:
        values["delivered_at"] = now
    elif retry_at is not None:
        values["next_attempt_at"] = retry_at
    else:
        values["failed_at"] = now
    session.execute(
        update(DeliveryRow)
        .where(DeliveryRow.id == delivery_id)
        .values(**values)
        .execution_options(synchronize_session=False)
    )


def for_model(session: Session, *, model_id: int, limit: int = 20) -> Sequence[DeliveryRow]:
    """A model's latest messages, newest first."""
    stmt = (
        select(DeliveryRow)
        .where(DeliveryRow.model_id == model_id)
        .order_by(DeliveryRow.id.desc())
        .limit(limit)
    )
    return list(session.scalars(stmt))
