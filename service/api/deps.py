"""Typed dependencies: the database, settings, policies, the clock and the caller."""

from __future__ import annotations

import fnmatch
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import datetime
from typing import Annotated, Any

from fastapi import Depends, Query, Request
from sqlalchemy.orm import Session, sessionmaker

from service.errors import Forbidden, InvalidInput
from service.gate.policy import Policy
from service.settings import Settings
from service.store.db import read_transaction, transaction


@dataclass
class Database:
    """Opens one transaction per unit of work: commits once, or rolls back on error."""

    factory: sessionmaker[Session]

    @contextmanager
    def transaction(self) -> Iterator[Session]:
        with transaction(self.factory) as session:
            yield session

    @contextmanager
    def read(self) -> Iterator[Session]:
        """A read-only unit of work (SQLite: a deferred transaction, which never waits for the
        write lock and never fails on it; nothing is committed)."""
        with read_transaction(self.factory) as session:
            yield session


#: What each role may do. ``read``: see models, verdicts, snapshots, policies, audit;
#: ``submit``: post snapshots; ``operate``: override verdicts, set or roll back baselines, pin
#: references; ``replay``: judge past snapshots again under a policy sent with the request
#: (costly work a caller shapes: operators, who change what policies do, and admins);
#: ``admin``: tokens and everything else.
ROLE_ACTIONS: dict[str, frozenset[str]] = {
    "viewer": frozenset({"read"}),
    "trainer": frozenset({"read", "submit"}),
    "operator": frozenset({"read", "operate", "replay"}),
    "admin": frozenset({"read", "submit", "operate", "replay", "admin"}),
}


@dataclass(frozen=True)
class Principal:
    """Who is calling: a name for the audit log, a role and the model patterns in scope."""

    name: str
    role: str = "admin"
    models: tuple[str, ...] = field(default=("*",))
    #: The API token's id (None in open mode).
    token_id: int | None = None

    def allows(self, action: str, model: str | None = None) -> bool:
        """May this caller do *action* (on *model*, when the action concerns one)?"""
        if action not in ROLE_ACTIONS.get(self.role, frozenset()):
            return False
        if model is None:
            return True
        return any(fnmatch.fnmatchcase(model, pattern) for pattern in self.models)

    def require(self, action: str, model: str | None = None) -> None:
        """Raise Forbidden unless :meth:`allows` (the message names neither the model nor
        anything else the caller may not see)."""
        if action not in ROLE_ACTIONS.get(self.role, frozenset()):
            raise Forbidden(f"the role {self.role!r} may not {ACTION_WORDS.get(action, action)}")
        if model is not None and not self.allows(action, model):
            raise Forbidden("this token's model scope does not cover this model", field="model")
        if action == "admin" and "*" not in self.models:
            # a scoped admin could otherwise make itself an unscoped token
            raise Forbidden("administration needs an admin token whose scope is every model (*)")


ACTION_WORDS = {
    "read": "read",
    "submit": "post snapshots",
    "operate": "override verdicts or set baselines",
    "admin": "manage tokens",
    "replay": "replay past snapshots under a policy",
}


def get_db(request: Request) -> Database:
    return request.app.state.database  # type: ignore[no-any-return]


def get_settings(request: Request) -> Settings:
    return request.app.state.settings  # type: ignore[no-any-return]


def get_policies(request: Request) -> list[Policy]:
    return request.app.state.policies  # type: ignore[no-any-return]


def get_clock(request: Request) -> Callable[[], datetime]:
    return request.app.state.clock  # type: ignore[no-any-return]


def get_principal(request: Request) -> Principal:
    """The authenticated caller (see :mod:`service.api.auth`); Unauthorized (401) without a
    valid token. Open mode: every caller may do everything, named by ``X-Actor``."""
    from service.api.auth import principal_for

    return principal_for(request)


class Allowed:
    """Route dependency declaring the action a route needs: the caller must hold a role that
    allows *action* and, when the path names a ``{model}``, a scope that covers it. Routes whose
    object's model is not in the path (a verdict by id, lists) check each object again with
    :meth:`Principal.require` or filter with :meth:`Principal.allows`.

    Every route declares one (or :data:`PUBLIC`); ``tests/test_access.py`` walks the routes and
    fails on a route that declares none.
    """

    def __init__(self, action: str) -> None:
        if not any(action in actions for actions in ROLE_ACTIONS.values()):
            raise ValueError(f"unknown action {action!r}")
        self.action = action

    def __call__(
        self, request: Request, principal: Annotated[Principal, Depends(get_principal)]
    ) -> Principal:
        model = request.path_params.get("model")
        principal.require(self.action, model if isinstance(model, str) else None)
        return principal

    def __repr__(self) -> str:
        return f"Allowed({self.action!r})"


class Public:
    """Route dependency declaring that a route needs no token (liveness, readiness)."""

    action = "public"

    def __call__(self) -> None:
        return None

    def __repr__(self) -> str:
        return "PUBLIC"


PUBLIC = Public()


@dataclass(frozen=True)
class RouteInfo:
    """One route of the app: path template, methods, and the access it declares (None for
    routes that are not API routes: the OpenAPI schema and its documentation pages)."""

    path: str
    methods: frozenset[str]
    access: tuple[str, ...] | None
    dependant: Any = None


def app_routes(app: Any) -> list[RouteInfo]:
    """Every route of *app*, including those of included routers."""
    from fastapi.routing import APIRoute

    try:  # FastAPI versions that keep included routers as such
        from fastapi.routing import iter_route_contexts

        contexts: list[Any] = list(iter_route_contexts(app.routes))
        pairs = [(c, c.original_route) for c in contexts]
    except ImportError:  # older versions flatten routes into app.routes
        pairs = [(r, r) for r in app.routes]
    out = []
    for route, original in pairs:
        path = getattr(route, "path", None)
        if path is None:
            continue
        methods = frozenset(getattr(route, "methods", None) or ())
        if isinstance(original, APIRoute):
            out.append(RouteInfo(path, methods, tuple(access_of(route.dependant)), route.dependant))
        else:
            out.append(RouteInfo(path, methods, None))
    return out


def access_of(dependant: Any) -> list[str]:
    """The access declarations (Allowed actions or 'public') in a route's dependency tree."""
    found = []
    for dep in dependant.dependencies:
        if isinstance(dep.call, (Allowed, Public)):
            found.append(dep.call.action)
        found.extend(access_of(dep))
    return found


def cursor_before(
    cursor: Annotated[
        str | None, Query(max_length=100, description="next_cursor of the previous page.")
    ] = None,
) -> int | None:
    """The id a page continues before, from the ``cursor`` query parameter (422 if not ours)."""
    if cursor is None:
        return None
    from service.store import repo

    try:
        return repo.decode_cursor(cursor)
    except ValueError as exc:
        raise InvalidInput(str(exc), field="query.cursor") from None


DbDep = Annotated[Database, Depends(get_db)]
CursorDep = Annotated[int | None, Depends(cursor_before)]
SettingsDep = Annotated[Settings, Depends(get_settings)]
PoliciesDep = Annotated[list[Policy], Depends(get_policies)]
ClockDep = Annotated[Callable[[], datetime], Depends(get_clock)]
PrincipalDep = Annotated[Principal, Depends(get_principal)]
#: The caller, allowed to read / post snapshots / operate / administer (see :class:`Allowed`).
ReaderDep = Annotated[Principal, Depends(Allowed("read"))]
TrainerDep = Annotated[Principal, Depends(Allowed("submit"))]
OperatorDep = Annotated[Principal, Depends(Allowed("operate"))]
AdminDep = Annotated[Principal, Depends(Allowed("admin"))]
ReplayerDep = Annotated[Principal, Depends(Allowed("replay"))]
