"""create_app(settings): wires routers, the store and the policies. Nothing touches a database
at import time; each test builds its own app on its own temporary database."""

from __future__ import annotations

import logging
from collections.abc import Callable, Sequence
from datetime import UTC, datetime

from fastapi import FastAPI

from service import __version__, logs
from service.api.auth import TokenGate
from service.api.deps import Database
from service.api.errors import install_error_handlers
from service.api.middleware import BodyLimit, RequestContext
from service.api.routers import audit, health, models, overrides, snapshots, verdicts
from service.api.routers import metrics as metrics_routes
from service.api.routers import policies as policy_routes
from service.api.routers import tokens as token_routes
from service.gate.policy import Policy, load_policies
from service.metrics import Metrics
from service.settings import Settings
from service.store import db as store_db
from service.web import audit as web_audit
from service.web import auth as web_auth
from service.web import report as web_report
from service.web import routes as web_routes

log = logging.getLogger("tidegate")


def utc_now() -> datetime:
    return datetime.now(UTC)


def create_app(
    settings: Settings | None = None,
    *,
    policies: Sequence[Policy] | None = None,
    clock: Callable[[], datetime] = utc_now,
    check_database: bool = True,
) -> FastAPI:
    """Build the service. Raises DatabaseNotReady when the database is not at the current
    revision (unless ``settings.migrate_on_start``), PolicyError for a bad policy file."""
    settings = settings or Settings()
    engine = store_db.make_engine(settings)
    if check_database:
        store_db.ensure_ready(settings, engine)
        storage = store_db.storage_settings(engine)
        log.info(
            "storage settings: %s",
            storage,
            extra=logs.fields(event="storage", dialect=engine.dialect.name, **storage),
        )
    if settings.auth == "open":
        log.warning(
            "OPEN mode: no API tokens are checked (demo and local development only)",
            extra=logs.fields(event="auth", auth="open"),
        )
    loaded = list(policies) if policies is not None else load_policies(settings.policy_dir)
    app = FastAPI(
        title="tidegate",
        version=__version__,
        description="A release gate for incrementally retrained ranking and recommendation "
        "models: post a snapshot, get promote or hold with reasons and evidence.",
    )
    app.state.settings = settings
    app.state.engine = engine
    # The migration scripts do not change while the service runs: read the head once.
    app.state.head_revision = store_db.head_revision(settings)
    app.state.database = Database(store_db.make_sessionmaker(engine))
    app.state.policies = loaded
    app.state.clock = clock
    app.state.metrics = Metrics()
    install_error_handlers(app)
    for router in (
        snapshots.router,
        models.router,
        verdicts.router,
        overrides.router,
        audit.router,
        policy_routes.router,
        health.router,
        token_routes.router,
        metrics_routes.router,
        web_routes.router,
        web_audit.router,
        web_report.router,
        web_routes.root,
        web_auth.router,
    ):
        app.include_router(router)
    web_auth.install(app)
    # Added last = outermost: RequestContext -> BodyLimit -> TokenGate -> routes.
    app.add_middleware(TokenGate, settings=settings, database=app.state.database)
    app.add_middleware(BodyLimit, limit=settings.max_body_bytes)
    app.add_middleware(RequestContext, metrics=app.state.metrics)
    return app
