"""create_app(settings): wires routers, the store and the policies. Nothing touches a database
at import time; each test builds its own app on its own temporary database."""

from __future__ import annotations

import logging
from collections.abc import AsyncIterator, Callable, Sequence
from contextlib import asynccontextmanager
from datetime import UTC, datetime

from fastapi import FastAPI

from service import __version__, logs, paging
from service.api import docs
from service.api.auth import TokenGate
from service.api.deps import Database
from service.api.errors import install_error_handlers
from service.api.middleware import BodyLimit, RequestContext, SecurityHeaders
from service.api.routers import (
    audit,
    health,
    models,
    overrides,
    serving,
    snapshots,
    verdicts,
)
from service.api.routers import metrics as metrics_routes
from service.api.routers import policies as policy_routes
from service.api.routers import tokens as token_routes
from service.budget import Slots, over_resample_cap
from service.gate.policy import Policy, PolicyError, policies_for
from service.heavy import Heavy
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
    loaded = list(policies) if policies is not None else policies_for(settings.policy_dir)
    for policy in loaded:
        too_many = over_resample_cap(policy, settings.max_resamples)
        if too_many is not None:
            raise PolicyError(too_many, file=policy.path, key="resamples")

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        # Messages queued before a restart are sent again (the outbox survives the process).
        app.state.dispatcher.wake()
        yield
        app.state.dispatcher.stop()

    app = FastAPI(
        lifespan=lifespan,
        title="tidegate",
        version=__version__,
        description="A release gate for incrementally retrained ranking and recommendation "
        "models: post a snapshot, get promote or hold with reasons and evidence.",
        # the documentation page is served by service.api.docs, from local files
        docs_url=None,
        redoc_url=None,
    )
    app.state.settings = settings
    app.state.engine = engine
    # The migration scripts do not change while the service runs: read the head once.
    app.state.head_revision = store_db.head_revision(settings)
    app.state.database = Database(store_db.make_sessionmaker(engine))
    app.state.policies = loaded
    app.state.clock = clock
    app.state.metrics = Metrics()
    app.state.dispatcher = paging.Dispatcher(settings, app.state.database.factory, clock=clock)
    app.state.heavy = Heavy(slots=settings.heavy_concurrency)
    app.state.replay_slots = Slots(settings.replay_slots, "replays")
    install_error_handlers(app)
    for router in (
        snapshots.router,
        models.router,
        serving.router,
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
        docs.router,
    ):
        app.include_router(router)
    web_auth.install(app)
    snapshots.document_upload(app)
    # Added last = outermost: SecurityHeaders -> RequestContext -> BodyLimit -> TokenGate -> routes.
    app.add_middleware(TokenGate, settings=settings, database=app.state.database)
    app.add_middleware(BodyLimit, limit=settings.max_body_bytes)
    app.add_middleware(RequestContext, metrics=app.state.metrics)
    app.add_middleware(SecurityHeaders)
    return app
