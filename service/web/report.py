"""The gate report page and its replay form.

=====================================  =================================================
``GET /ui/report``                     every model in scope: holds per check in 7 and 30
                                       days, known false holds, learned limits over time
``GET /ui/report?model=M``             the same for one model, with the replay form
``POST /ui/report/replay``             (operator) replay a changed policy over the same
                                       window beside the policy in force; stores nothing
=====================================  =================================================
"""

from __future__ import annotations

from datetime import datetime
from typing import Annotated, Any

from fastapi import APIRouter, Form, Query, Request
from fastapi.responses import HTMLResponse, Response
from sqlalchemy.orm import Session

from service import report
from service.api.deps import ClockDep, DbDep, PoliciesDep, Principal, SettingsDep
from service.errors import InvalidInput, NotFound, TidegateError
from service.gate.policy import PolicyError, parse_policy, select_policy
from service.replay import replay
from service.store import repo
from service.web import csrf, format, svg
from service.web.deps import WebOperatorDep, WebReaderDep
from service.web.routes import error_page, render

router = APIRouter(prefix="/ui", include_in_schema=False)


def _label(text: str | None) -> str:
    moment = format.parse_time(text)
    return moment.strftime("%m-%d %H:%M") if moment else "?"


def limit_charts(model: str, limits: dict[str, list[dict[str, Any]]]) -> list[dict[str, Any]]:
    """One chart per check whose limit moved: the limit each verdict was held to."""
    charts = []
    for check, points in limits.items():
        series = [
            svg.TrendPoint(
                _label(p["at"]),
                p["limit"],
                href=format.snapshot_url(model, p["snapshot"]),
                note=p["snapshot"] + (" (learned)" if p["learned"] else " (fixed)"),
            )
            for p in points
        ]
        title = f"{check}: limit applied"
        label = "limit each verdict was held to"
        charts.append(
            {
                "wide": svg.trend_chart(series, title=title, value_label=label),
                "narrow": svg.trend_chart(
                    series, title=title, width=340, height=230, labels=3, value_label=label
                ),
            }
        )
    return charts


def _report_context(
    session: Session, *, principal: Principal, now: datetime, model: str | None, policies: Any
) -> dict[str, Any]:
    rows = [r for r in repo.list_model_rows(session) if principal.allows("read", r.name)]
    if model is not None:
        rows = [r for r in rows if r.name == model]
        if not rows:
            raise NotFound(f"no model {model!r}", field="model")
    reports = []
    for row in rows:
        one = report.model_report(session, model=row, now=now)
        one["charts"] = limit_charts(row.name, one["limits"])
        policy = select_policy(policies, row.name)
        one["policy"] = policy
        one["window_verdicts"] = {
            days: report.verdicts_in_window(session, model=row, now=now, days=days)
            for days in report.WINDOWS
        }
        reports.append(one)
    return {
        "reports": reports,
        "one_model": model,
        "windows": report.WINDOWS,
        "replay_cap": report.REPLAY_CAP,
    }


@router.get("/report", response_class=HTMLResponse)
def report_page(
    request: Request,
    db: DbDep,
    clock: ClockDep,
    policies: PoliciesDep,
    principal: WebReaderDep,
    model: Annotated[str | None, Query(max_length=100)] = None,
) -> Response:
    now = clock()
    try:
        with db.read() as session:
            context = _report_context(
                session, principal=principal, now=now, model=model or None, policies=policies
            )
    except TidegateError as exc:
        return error_page(request, exc, principal, now)
    return render(request, "report.html", context, principal, now)


@router.post("/report/replay", response_class=HTMLResponse)
def replay_form(
    request: Request,
    db: DbDep,
    clock: ClockDep,
    policies: PoliciesDep,
    settings: SettingsDep,
    principal: WebOperatorDep,
    model: Annotated[str, Form(max_length=100)] = "",
    policy: Annotated[str, Form(max_length=200_000)] = "",
    days: Annotated[int, Form(ge=1, le=30)] = 7,
    csrf_token: Annotated[str, Form(max_length=200)] = "",
) -> Response:
    """Replay the typed policy and the policy in force over the model's verdicts of the last
    *days* days (at most :data:`service.report.REPLAY_CAP`, the newest), side by side."""
    now = clock()
    try:
        csrf.verify(request, csrf_token)
        principal.require("operate", model or None)
        if not model:
            raise InvalidInput("say which model to replay", field="model")
        current = select_policy(policies, model)
        if current is None:
            raise InvalidInput(f"no policy matches model {model!r}", field="model")
        try:
            changed = parse_policy(policy, name="changed", path="(form)")
        except PolicyError as exc:
            raise InvalidInput(str(exc), field="policy", code="invalid_policy") from None
        with db.read() as session:
            row = repo.get_model(session, name=model)
            if row is None:
                raise NotFound(f"no model {model!r}", field="model")
            count = report.verdicts_in_window(session, model=row, now=now, days=days)
            limit = max(1, min(count, report.REPLAY_CAP))
            results = [
                replay(
                    session,
                    model_name=model,
                    policy=p,
                    limit=limit,
                    history_limit=settings.history_limit,
                )
                for p in (current, changed)
            ]
            context = _report_context(
                session, principal=principal, now=now, model=model, policies=policies
            )
    except InvalidInput as exc:
        return _report_again(request, principal, now, policies, model, policy, days, exc)
    except TidegateError as exc:
        return error_page(request, exc, principal, now)
    context.update(
        comparison=report.side_by_side(*results),
        typed_policy=policy,
        replay_days=days,
        replay_count=count,
    )
    return render(request, "report.html", context, principal, now)


def _report_again(
    request: Request,
    principal: Principal,
    now: datetime,
    policies: Any,
    model: str,
    policy: str,
    days: int,
    exc: TidegateError,
) -> Response:
    """The report again with the problem beside the form and the typed policy kept."""
    try:
        with request.app.state.database.read() as session:
            context = _report_context(
                session, principal=principal, now=now, model=model or None, policies=policies
            )
    except TidegateError as inner:
        return error_page(request, inner, principal, now)
    context.update(form_error=exc.message, typed_policy=policy, replay_days=days)
    return render(request, "report.html", context, principal, now, exc.status)
