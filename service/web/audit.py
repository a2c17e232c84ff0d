"""The audit page: every change of what serves and every operator action, filtered and paged.

``GET /ui/audit?model=&actor=&action=&since=&until=&before=``: newest first, 50 a page; the
filters combine (and); ``since`` and ``until`` are UTC times (``2026-12-01T02:45``, seconds and
a zone optional). Entries of models outside the viewer's scope are left out, as in
``GET /v1/audit``.
"""

from __future__ import annotations

from datetime import datetime
from typing import Annotated, Any

from fastapi import APIRouter, Query, Request
from fastapi.responses import HTMLResponse, Response

from service import views
from service.api.deps import ClockDep, DbDep
from service.errors import InvalidInput, TidegateError
from service.store import repo
from service.web import format
from service.web.deps import WebReaderDep
from service.web.routes import error_page, render

router = APIRouter(prefix="/ui", include_in_schema=False)

#: Entries per page.
AUDIT_PAGE = 50


def parse_moment(text: str | None, field: str) -> datetime | None:
    """A UTC time from a form field (``2026-12-01T02:45``, as a browser's datetime-local input
    sends it; a zone, if given, is honoured); empty is None."""
    if not text or not text.strip():
        return None
    try:
        return format.parse_time(text.strip())
    except ValueError:
        raise InvalidInput(
            f"{field}: {text!r} is not a time like 2026-12-01T02:45 (UTC)", field=f"query.{field}"
        ) from None


def _blank(value: str | None) -> str | None:
    return value.strip() if value and value.strip() else None


@router.get("/audit", response_class=HTMLResponse)
def audit_page(
    request: Request,
    db: DbDep,
    clock: ClockDep,
    principal: WebReaderDep,
    model: Annotated[str | None, Query(max_length=100)] = None,
    actor: Annotated[str | None, Query(max_length=200)] = None,
    action: Annotated[str | None, Query(max_length=60)] = None,
    since: Annotated[str | None, Query(max_length=40)] = None,
    until: Annotated[str | None, Query(max_length=40)] = None,
    before: Annotated[str | None, Query(max_length=100)] = None,
) -> Response:
    now = clock()
    filters = {
        "model": _blank(model),
        "actor": _blank(actor),
        "action": _blank(action),
        "since": _blank(since),
        "until": _blank(until),
    }
    try:
        start = parse_moment(filters["since"], "since")
        end = parse_moment(filters["until"], "until")
        before_id = None
        if before:
            try:
                before_id = repo.decode_cursor(before)
            except ValueError as exc:
                raise InvalidInput(str(exc), field="query.before") from None
        with db.read() as session:
            scope = [
                r.name for r in repo.list_model_rows(session) if principal.allows("read", r.name)
            ]
            allowed = scope
            if filters["model"] is not None and filters["model"] not in scope:
                allowed = []  # a model outside the scope (or unknown) shows nothing
            everything = "*" in principal.models
            rows = list(
                repo.list_audit(
                    session,
                    model=filters["model"],
                    models=None if everything and filters["model"] is None else allowed,
                    actor=filters["actor"],
                    action=filters["action"],
                    since=start,
                    until=end,
                    before_id=before_id,
                    limit=AUDIT_PAGE + 1,
                )
            )
            actions, actors = repo.audit_choices(session)
    except TidegateError as exc:
        return error_page(request, exc, principal, now)
    more = len(rows) > AUDIT_PAGE
    rows = rows[:AUDIT_PAGE]
    kept = {k: v for k, v in filters.items() if v is not None}
    context: dict[str, Any] = {
        "entries": [views.audit_view(r) for r in rows],
        "filters": filters,
        "models": scope,
        "actions": actions,
        "actors": actors,
        "older": repo.encode_cursor(rows[-1].id) if more and rows else None,
        "paged": before is not None,
        "query": kept,
    }
    return render(request, "audit.html", context, principal, now)
