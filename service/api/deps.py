"""Typed dependencies: the database, settings, policies, the clock and the caller."""

from __future__ import annotations

from collections.abc import Callable, Iterator
import fnmatch
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import datetime
from typing import Annotated

from fastapi import Depends, Request
from sqlalchemy.orm import Session, sessionmaker

from service.gate.policy import Policy
from service.settings import Settings
from service.store.db import transaction


@dataclass
class Database:
    """Opens one transaction per unit of work: commits once, or rolls back on error."""

    factory: sessionmaker[Session]

    @contextmanager
    def transaction(self) -> Iterator[Session]:
        with transaction(self.factory) as session:
            yield session


#: What each role may do. ``read``: see models, verdicts, snapshots, policies, audit;
#: ``submit``: post snapshots; ``operate``: override verdicts, set or roll back baselines, pin
#: references; ``admin``: tokens and everything else.
ROLE_ACTIONS: dict[str, frozenset[str]] = {
    "viewer": frozenset({"read"}),
    "trainer": frozenset({"read", "submit"}),
    "operator": frozenset({"read", "operate"}),
    "admin": frozenset({"read", "submit", "operate", "admin"}),
}


@dataclass(frozen=True)
class Principal:
    """Who is calling: a name for the audit log, a role and the model patterns in scope."""

    name: str
    role: str = "admin"
    models: tuple[str, ...] = field(default=("*",))

    def allows(self, action: str, model: str | None = None) -> bool:
        """May this caller do *action* (on *model*, when the action concerns one)?"""
        if action not in ROLE_ACTIONS.get(self.role, frozenset()):
            return False
        if model is None:
            return True
        return any(fnmatch.fnmatchcase(model, pattern) for pattern in self.models)


def get_db(request: Request) -> Database:
    return request.app.state.database  # type: ignore[no-any-return]


def get_settings(request: Request) -> Settings:
    return request.app.state.settings  # type: ignore[no-any-return]


def get_policies(request: Request) -> list[Policy]:
    return request.app.state.policies  # type: ignore[no-any-return]


def get_clock(request: Request) -> Callable[[], datetime]:
    return request.app.state.clock  # type: ignore[no-any-return]


def get_principal(request: Request) -> Principal:
    """Open mode: every caller may do everything; the audit name comes from ``X-Actor``."""
    name = request.headers.get("x-actor", "").strip()[:100] or "anonymous"
    return Principal(name=name)


DbDep = Annotated[Database, Depends(get_db)]
SettingsDep = Annotated[Settings, Depends(get_settings)]
PoliciesDep = Annotated[list[Policy], Depends(get_policies)]
ClockDep = Annotated[Callable[[], datetime], Depends(get_clock)]
PrincipalDep = Annotated[Principal, Depends(get_principal)]
