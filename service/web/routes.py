"""The on-call pages and their two forms.

=====================================  =================================================
``GET /ui/``                           the models, stuck ones first
``GET /ui/models/{model}``             timeline, trends, baseline history, audit trail
``GET /ui/models/{model}/snapshots/{key}``  the verdict of one snapshot (the stable link)
``GET /ui/verdicts/{id}``              redirects to the stable link of that verdict
``POST /ui/verdicts/{id}/override``    the override form
``POST /ui/models/{model}/baseline``   the roll-back form
=====================================  =================================================

Handlers parse, call the read models (:mod:`service.views`) or the operator actions
(:mod:`service.operate`), and render. Errors become an HTML page with the same status and
code the API would give.
"""

from __future__ import annotations

from collections.abc import Mapping
from datetime import datetime
from pathlib import Path
from typing import Annotated, Any

from fastapi import APIRouter, Depends, Form, Query, Request
from fastapi import Path as PathParam
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from fastapi.templating import Jinja2Templates
from sqlalchemy.orm import Session

from service import explain, intake, operate, paging, views
from service.api.deps import PUBLIC, ClockDep, DbDep, PoliciesDep, Principal
from service.api.schemas import MAX_ID
from service.errors import Conflict, Forbidden, InvalidInput, NotFound, TidegateError
from service.evidence import DEFAULT_BINS
from service.gate.policy import select_policy
from service.store import deliveries, history_values, repo
from service.store.tables import ModelRow, SnapshotRow, VerdictRow
from service.text import shown
from service.web import csrf, evidence_view, format, svg, trends
from service.web.auth import SESSION_COOKIE
from service.web.deps import WebOperatorDep, WebReaderDep

TEMPLATES = Jinja2Templates(directory=str(Path(__file__).parent / "templates"))
for _name in (
    "utc_text",
    "num",
    "signed",
    "pct",
    "pvalue",
    "milliseconds",
    "duration_text",
    "state_text",
):
    TEMPLATES.env.filters[_name] = getattr(format, _name)
TEMPLATES.env.filters["thousands"] = format.count
TEMPLATES.env.globals.update(model_url=format.model_url, snapshot_url=format.snapshot_url)

#: Verdicts shown in a model page's decision strip and trends (the latest), and per table page.
WINDOW = 96
TABLE_PAGE = 25

router = APIRouter(prefix="/ui", include_in_schema=False)
root = APIRouter(include_in_schema=False, dependencies=[Depends(PUBLIC)])


@root.get("/")
def home() -> RedirectResponse:
    return RedirectResponse("/ui/", status_code=307)


STATIC = Path(__file__).parent / "static"
#: The files under ``/ui/static/`` (a fixed list: nothing else on disk is reachable).
STATIC_FILES = {"tidegate.css": "text/css; charset=utf-8"}


@router.get("/static/{name}", dependencies=[Depends(PUBLIC)])
def static_file(name: Annotated[str, PathParam(max_length=40)]) -> Response:
    """The pages' style sheet: public (the sign-in page needs it), cached for an hour."""
    media = STATIC_FILES.get(name)
    if media is None:
        return Response("not found", status_code=404, media_type="text/plain")
    return Response(
        (STATIC / name).read_bytes(),
        media_type=media,
        headers={"Cache-Control": "public, max-age=3600"},
    )


def render(
    request: Request,
    template: str,
    context: Mapping[str, Any],
    principal: Principal,
    now: datetime,
    status: int = 200,
) -> HTMLResponse:
    full = {
        "principal": principal,
        "signed_in": bool(request.cookies.get(SESSION_COOKIE)),
        "now": now,
        "ago": lambda value: format.age_text(value, now),
        "csrf_token": csrf.token_for(request),
        "base_url": str(request.base_url).rstrip("/"),
        **context,
    }
    response = TEMPLATES.TemplateResponse(request, template, full, status_code=status)
    return csrf.attach(request, response)  # type: ignore[return-value]


def error_page(
    request: Request, exc: TidegateError, principal: Principal, now: datetime
) -> HTMLResponse:
    return render(request, "error.html", {"error": exc}, principal, now, exc.status)


def _require(principal: Principal, action: str, model: str) -> None:
    if not principal.allows(action, model):
        verb = "see" if action == "read" else "change"
        raise Forbidden(f"{principal.name} ({principal.role}) may not {verb} {shown(model)}")


def _model(session: Session, name: str) -> ModelRow:
    row = repo.get_model(session, name=name)
    if row is None:
        raise NotFound(f"no model {shown(name)}", field="model")
    return row


def strip_items(
    model: str, rows: list[tuple[VerdictRow, SnapshotRow]], overrides: Mapping[int, list[Any]]
) -> list[svg.StripItem]:
    """Decision strip items, oldest first, from verdict rows newest first."""
    items = []
    for verdict, snap in reversed(rows):
        effective = repo.effective_decision(verdict, overrides[verdict.id])
        title = f"{snap.key}: {effective}"
        if overrides[verdict.id]:
            title += f" (gate said {verdict.decision}; overridden)"
        if verdict.reasons:
            title += f": {verdict.reasons[0]}"
        items.append(
            svg.StripItem(
                effective, bool(overrides[verdict.id]), format.snapshot_url(model, snap.key), title
            )
        )
    return items


# --- the model list -------------------------------------------------------------------------


def stuck_first(view: Mapping[str, Any]) -> tuple[bool, int, bool, str]:
    """Sort key of the model list: stuck models, then more holds in a row, then a last verdict
    held, then by name."""
    last_held = (view.get("last_verdict") or {}).get("effective_decision") == "hold"
    return (not is_stuck(view), -int(view["consecutive_holds"]), not last_held, str(view["name"]))


def is_stuck(view: Mapping[str, Any]) -> bool:
    """The model view's stuck flag (holds in a row at or over the policy's threshold)."""
    stuck = view.get("stuck")
    return bool(stuck.get("stuck")) if isinstance(stuck, Mapping) else bool(stuck)


@router.get("/", response_class=HTMLResponse)
def models_page(
    request: Request, db: DbDep, clock: ClockDep, policies: PoliciesDep, principal: WebReaderDep
) -> Response:
    now = clock()
    with db.read() as session:
        shown = []
        for row in repo.list_model_rows(session):
            if not principal.allows("read", row.name):
                continue
            view = views.model_view(session, model=row, now=now, policies=policies)
            rows, _ = repo.list_verdicts(session, model_id=row.id, limit=48)
            overrides = repo.overrides_for(session, verdict_ids=[v.id for v, _ in rows])
            view["strip"] = svg.decision_strip(
                strip_items(row.name, rows, overrides), cell=7, gap=1.5, height=18
            )
            shown.append(view)
    shown.sort(key=stuck_first)
    return render(request, "models.html", {"models": shown}, principal, now)


# --- one model ------------------------------------------------------------------------------


def _time_label(value: datetime | None) -> str:
    moment = repo.utc(value)
    return moment.strftime("%m-%d %H:%M") if moment else "?"


def model_context(
    session: Session, *, row: ModelRow, now: datetime, policies: Any, before: str | None
) -> dict[str, Any]:
    view = views.model_view(session, model=row, now=now, policies=policies)
    window, _ = repo.list_verdicts(session, model_id=row.id, limit=WINDOW, details=True)
    before_id = None
    if before:
        try:
            before_id = repo.decode_cursor(before)
        except ValueError as exc:
            raise InvalidInput(str(exc), field="query.before") from None
    page, next_id = repo.list_verdicts(
        session, model_id=row.id, limit=TABLE_PAGE, before_id=before_id
    )
    ids = list({v.id for v, _ in window} | {v.id for v, _ in page})
    overrides = repo.overrides_for(session, verdict_ids=ids)
    policy = select_policy(policies, row.name)
    # The trends need the findings' numbers only: from finding_values, not the findings.
    numbers = history_values.trend_findings(
        session, model_id=row.id, verdict_ids=[v.id for v, _ in window]
    )
    trend_rows = [
        trends.Row(
            key=s.key,
            label=_time_label(v.created_at),
            decision=repo.effective_decision(v, overrides[v.id]),
            findings=numbers[v.id],
            metrics=dict(s.metrics or {}),
            summary=s.summary,
        )
        for v, s in reversed(window)
    ]
    charts = [
        {
            "wide": svg.trend_chart(
                t.points, title=t.title, bands=t.bands, limit_label=t.limit_label
            ),
            "narrow": svg.trend_chart(
                t.points,
                title=t.title,
                bands=t.bands,
                limit_label=t.limit_label,
                width=340,
                height=230,
                labels=3,
            ),
        }
        for t in trends.build_trends(row.name, trend_rows, policy)
    ]
    reference = intake.resolve_reference(session, model=row, policy=policy, now=now)
    timeline = []
    for v, s in page:
        item = views.verdict_summary(v, s, overrides[v.id], row.name)
        item["overrides"] = [views.override_view(o) for o in overrides[v.id]]
        timeline.append(item)
    promotions = views.promotions_view(session, model=row, limit=12)
    earlier = []
    for p in promotions:
        for key in (p["snapshot"], p["previous"]):
            if key and key != view["baseline"] and key not in earlier:
                earlier.append(key)
    return {
        "model": view,
        "policy": policy,
        "strip": svg.decision_strip(strip_items(row.name, window, overrides)),
        "window": len(window),
        "charts": charts,
        "timeline": timeline,
        "older": repo.encode_cursor(next_id) if next_id is not None else None,
        "paged": before is not None,
        "promotions": promotions,
        "reference": reference.key if reference else None,
        "rollback_choices": earlier[:20],
        "audit": [
            views.audit_view(a)
            for a in repo.list_audit(session, model=row.name, limit=12, exclude_actor="gate")
        ],
        "deliveries": [
            paging.delivery_view(d) for d in deliveries.for_model(session, model_id=row.id)
        ],
    }


@router.get("/models/{model}", response_class=HTMLResponse)
def model_page(
    request: Request,
    model: str,
    db: DbDep,
    clock: ClockDep,
    policies: PoliciesDep,
    principal: WebReaderDep,
    before: Annotated[str | None, Query(max_length=100)] = None,
    done: Annotated[str | None, Query(max_length=20)] = None,
) -> Response:
    now = clock()
    try:
        with db.read() as session:
            context = model_context(
                session, row=_model(session, model), now=now, policies=policies, before=before
            )
    except TidegateError as exc:
        return error_page(request, exc, principal, now)
    context["done"] = done
    return render(request, "model.html", context, principal, now)


# --- one verdict ----------------------------------------------------------------------------


def verdict_context(session: Session, *, verdict: VerdictRow, model: ModelRow) -> dict[str, Any]:
    detail = views.verdict_detail(session, verdict=verdict)
    evidence = views.verdict_evidence(session, verdict=verdict, bins=DEFAULT_BINS)
    comparisons = []
    for c in evidence["comparisons"]:
        comparisons.append(
            {
                **c,
                "charts": evidence_view.overlay(
                    c["distribution"], evidence_view.SIDE_CSS.get(c["against"], "tg-base")
                ),
            }
        )
    neighbours = {}
    for side in ("previous", "next"):
        vid = detail[f"{side}_verdict_id"]
        other = repo.get_verdict(session, verdict_id=vid) if vid else None
        snap = repo.snapshot_by_id(session, snapshot_id=other.snapshot_id) if other else None
        neighbours[side] = snap.key if snap else None
    effective = detail["effective_decision"]
    proposal = "promote" if effective == "hold" else "hold"
    return {
        "v": detail,
        "ev": evidence,
        "state": explain.state_line(detail, evidence),
        "judged_against": explain.judged_against(detail, evidence),
        "answers": explain.briefing(detail, evidence),
        "sections": explain.SECTIONS,
        "findings": evidence_view.finding_rows(detail["findings"]),
        "comparisons": comparisons,
        "segment_tables": evidence_view.segment_tables(detail["findings"]),
        "lists": evidence_view.lists_context(evidence.get("lists")),
        "neighbours": neighbours,
        "proposal": proposal,
        "proposal_effect": operate.preview_override(session, verdict=verdict, decision=proposal),
        "model_row": model,
    }


def _verdict_by_key(session: Session, model: str, key: str) -> tuple[VerdictRow, ModelRow]:
    row = _model(session, model)
    snap = repo.get_snapshot(session, model_id=row.id, key=key)
    if snap is None:
        raise NotFound(f"model {shown(model)} has no snapshot {shown(key)}", field="key")
    verdict = repo.verdict_for_snapshot(session, snapshot_id=snap.id)
    if verdict is None:
        raise NotFound(f"snapshot {shown(key)} has no verdict", field="key")
    return verdict, row


@router.get("/models/{model}/snapshots/{key}", response_class=HTMLResponse)
def verdict_page(
    request: Request,
    model: str,
    key: str,
    db: DbDep,
    clock: ClockDep,
    principal: WebReaderDep,
    done: Annotated[str | None, Query(max_length=20)] = None,
) -> Response:
    now = clock()
    try:
        with db.read() as session:
            verdict, row = _verdict_by_key(session, model, key)
            context = verdict_context(session, verdict=verdict, model=row)
    except TidegateError as exc:
        return error_page(request, exc, principal, now)
    context["done"] = done
    return render(request, "verdict.html", context, principal, now)


@router.get("/verdicts/{verdict_id}")
def verdict_link(
    request: Request,
    verdict_id: Annotated[int, PathParam(ge=1, le=MAX_ID)],
    db: DbDep,
    clock: ClockDep,
    principal: WebReaderDep,
) -> Response:
    try:
        with db.read() as session:
            verdict, model = operate.verdict_with_model(session, verdict_id=verdict_id)
            _require(principal, "read", model.name)
            snap = repo.snapshot_by_id(session, snapshot_id=verdict.snapshot_id)
            assert snap is not None
            target = format.snapshot_url(model.name, snap.key)
    except TidegateError as exc:
        return error_page(request, exc, principal, clock())
    return RedirectResponse(target, status_code=303)


# --- the forms ------------------------------------------------------------------------------


@router.post("/verdicts/{verdict_id}/override", response_class=HTMLResponse)
def override_form(
    request: Request,
    verdict_id: Annotated[int, PathParam(ge=1, le=MAX_ID)],
    db: DbDep,
    clock: ClockDep,
    principal: WebOperatorDep,
    decision: Annotated[str, Form(max_length=20)] = "",
    reason: Annotated[str, Form(max_length=4000)] = "",
    csrf_token: Annotated[str, Form(max_length=200)] = "",
) -> Response:
    now = clock()
    try:
        csrf.verify(request, csrf_token)
        with db.transaction() as session:
            verdict, model = operate.verdict_with_model(session, verdict_id=verdict_id)
            _require(principal, "operate", model.name)
            outcome = operate.override_verdict(
                session,
                verdict_id=verdict_id,
                decision=decision,
                reason=reason,
                actor=principal.name,
                now=now,
            )
            queued = paging.on_override(
                session, settings=request.app.state.settings, outcome=outcome, now=now
            )
            target = format.snapshot_url(model.name, outcome.snapshot.key)
    except (InvalidInput, Conflict) as exc:
        return _form_again(
            request, exc, principal, now, verdict_id=verdict_id, decision=decision, reason=reason
        )
    except TidegateError as exc:
        return error_page(request, exc, principal, now)
    paging.wake(request.app.state, queued)
    return RedirectResponse(target + "?done=override", status_code=303)


def _form_again(
    request: Request,
    exc: TidegateError,
    principal: Principal,
    now: datetime,
    *,
    verdict_id: int,
    decision: str,
    reason: str,
) -> Response:
    """The verdict page again, with the problem beside the form and what was typed kept.
    Nothing was stored (the transaction rolled back)."""
    try:
        with request.app.state.database.read() as session:
            verdict, model = operate.verdict_with_model(session, verdict_id=verdict_id)
            context = verdict_context(session, verdict=verdict, model=model)
    except TidegateError as inner:
        return error_page(request, inner, principal, now)
    context.update(form_error=exc.message, typed_reason=reason, done=None)
    if decision in operate.DECISIONS:
        context["proposal"] = decision
    return render(request, "verdict.html", context, principal, now, exc.status)


@router.post("/models/{model}/baseline", response_class=HTMLResponse)
def rollback_form(
    request: Request,
    model: str,
    db: DbDep,
    clock: ClockDep,
    policies: PoliciesDep,
    principal: WebOperatorDep,
    snapshot: Annotated[str, Form(max_length=200)] = "",
    reason: Annotated[str, Form(max_length=4000)] = "",
    csrf_token: Annotated[str, Form(max_length=200)] = "",
    back: Annotated[str, Form(max_length=20)] = "model",
) -> Response:
    now = clock()
    try:
        csrf.verify(request, csrf_token)
        if not snapshot.strip():
            raise InvalidInput("say which snapshot should serve", field="snapshot")
        with db.transaction() as session:
            operate.rollback(
                session,
                model_name=model,
                key=snapshot.strip(),
                reason=reason,
                actor=principal.name,
                now=now,
            )
    except (InvalidInput, Conflict, NotFound) as exc:
        try:
            with db.read() as session:
                context = model_context(
                    session, row=_model(session, model), now=now, policies=policies, before=None
                )
        except TidegateError as inner:
            return error_page(request, inner, principal, now)
        context.update(
            rollback_error=exc.message, typed_snapshot=snapshot, typed_reason=reason, done=None
        )
        return render(request, "model.html", context, principal, now, exc.status)
    except TidegateError as exc:
        return error_page(request, exc, principal, now)
    if back == "snapshot":
        return RedirectResponse(
            format.snapshot_url(model, snapshot.strip()) + "?done=rollback", status_code=303
        )
    return RedirectResponse(format.model_url(model) + "?done=rollback", status_code=303)
