"""Engines, sessions and the migration-state check.

SQLite: WAL journal, foreign keys on, a busy timeout, the synchronous level from settings, and
every transaction opened with ``BEGIN IMMEDIATE``. A deferred transaction that reads and then
writes can fail at once with "database is locked" (a busy snapshot) whatever the busy timeout;
taking the write lock at BEGIN makes writers queue instead, so concurrent posts for one model are
serialised. Before that, writers of one process queue in arrival order in a
:class:`WriteQueue` (so the busy timeout is only a backstop between processes). PostgreSQL: the
row of the model is locked with ``SELECT ... FOR UPDATE`` where the baseline changes (see
repository functions).
"""

from __future__ import annotations

import logging
import sys
import threading
from collections import deque
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from sqlalchemy import Engine, create_engine, event, text
from sqlalchemy.orm import Session, sessionmaker

from service.settings import Settings

log = logging.getLogger("tidegate.store")

ROOT = Path(__file__).resolve().parent.parent.parent


class DatabaseNotReady(RuntimeError):
    """The database is not at the current migration revision."""


def make_engine(settings: Settings) -> Engine:
    url = settings.database_url
    if url.startswith("sqlite"):
        engine = create_engine(
            url,
            connect_args={
                "check_same_thread": False,
                "timeout": settings.sqlite_busy_timeout_ms / 1000,
            },
        )
        busy = settings.sqlite_busy_timeout_ms
        synchronous = settings.sqlite_synchronous

        @event.listens_for(engine, "connect")
        def _on_connect(dbapi_conn: Any, _record: Any) -> None:
            dbapi_conn.isolation_level = None  # we issue BEGIN ourselves
            cursor = dbapi_conn.cursor()
            cursor.execute("PRAGMA journal_mode=WAL")
            cursor.execute("PRAGMA foreign_keys=ON")
            cursor.execute(f"PRAGMA busy_timeout={int(busy)}")
            cursor.execute(f"PRAGMA synchronous={synchronous}")
            cursor.close()

        @event.listens_for(engine, "begin")
        def _on_begin(conn: Any) -> None:
            # A read-only unit of work (read_transaction) starts deferred: it takes no write
            # lock, so readers never queue behind writers, and it cannot hit a busy snapshot
            # because it never upgrades to a writer.
            if conn.get_execution_options().get(READ_ONLY):
                conn.exec_driver_sql("BEGIN")
            else:
                conn.exec_driver_sql("BEGIN IMMEDIATE")

        setattr(
            engine,
            _QUEUE_ATTRIBUTE,
            (write_queue(engine.url.database or ""), float(settings.sqlite_write_wait_seconds)),
        )
        return engine
    return create_engine(url, pool_pre_ping=True)


#: Execution option marking a read-only transaction (see read_transaction).
READ_ONLY = "tidegate_read_only"


def make_sessionmaker(engine: Engine) -> sessionmaker[Session]:
    return sessionmaker(engine, expire_on_commit=False)


class WriteQueue:
    """First come, first served turns at writing one SQLite database, for the threads of this
    process.

    SQLite lets one writer at a time hold its lock; the others wait in its busy handler, which
    sleeps and retries, is not fair, and gives up after the busy timeout ("database is
    locked"). Writers of one process instead queue here, before their transaction begins, in
    arrival order, and each hands the turn to the next when it commits or rolls back; so the
    busy timeout is only a backstop against writers of other processes (the command line, a
    second server). A thread that already holds the turn (a write inside a write) goes on.
    """

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._owner: int | None = None
        self._depth = 0
        self._waiters: deque[tuple[int, threading.Event]] = deque()

    @property
    def waiting(self) -> int:
        """Threads waiting for a turn now."""
        with self._lock:
            return len(self._waiters)

    def acquire(self, timeout: float) -> bool:
        """Wait up to *timeout* seconds for the turn; False when it did not come."""
        me = threading.get_ident()
        with self._lock:
            if self._owner == me:
                self._depth += 1
                return True
            if self._owner is None and not self._waiters:
                self._owner, self._depth = me, 1
                return True
            event = threading.Event()
            self._waiters.append((me, event))
        if event.wait(timeout):
            return True
        with self._lock:
            if event.is_set():  # handed over as the wait ended
                return True
            self._waiters.remove((me, event))
            return False

    def release(self) -> None:
        with self._lock:
            assert self._owner == threading.get_ident(), "released by a thread without the turn"
            self._depth -= 1
            if self._depth:
                return
            if self._waiters:
                owner, event = self._waiters.popleft()
                self._owner, self._depth = owner, 1
                event.set()
            else:
                self._owner = None

    @contextmanager
    def turn(self, timeout: float) -> Iterator[None]:
        if not self.acquire(timeout):
            raise StorageBusy(
                f"other writes kept the database busy for {timeout:g} s; nothing was stored, "
                "retry later"
            )
        try:
            yield
        finally:
            self.release()


class StorageBusy(RuntimeError):
    """The turn to write did not come in time (nothing was written; a retry is safe)."""


_QUEUES: dict[str, WriteQueue] = {}
_QUEUES_LOCK = threading.Lock()
#: Attribute of a SQLite engine holding (its database's write queue, the longest wait).
_QUEUE_ATTRIBUTE = "tidegate_write_queue"


def write_queue(database: str) -> WriteQueue:
    """The write queue of the SQLite file *database* (one per file and process, shared by
    every engine on it)."""
    name = database if database in {"", ":memory:"} else str(Path(database).resolve())
    with _QUEUES_LOCK:
        return _QUEUES.setdefault(name, WriteQueue())


def engine_write_queue(engine: Engine) -> tuple[WriteQueue, float] | None:
    """The write queue of *engine* and how long a writer may wait in it (None: not SQLite)."""
    found = getattr(engine, _QUEUE_ATTRIBUTE, None)
    return found if isinstance(found, tuple) else None


@contextmanager
def transaction(factory: sessionmaker[Session], *, wait: float | None = None) -> Iterator[Session]:
    """One session that commits once at the end, or rolls back on any error.

    On SQLite the transaction first waits for its turn in the database's :class:`WriteQueue`
    (at most *wait* seconds, default the ``sqlite_write_wait_seconds`` setting); StorageBusy
    when the turn does not come."""
    bind = factory.kw.get("bind")
    queued = engine_write_queue(bind) if isinstance(bind, Engine) else None
    if queued is None:
        with _transaction(factory) as session:
            yield session
        return
    queue, longest = queued
    with queue.turn(longest if wait is None else wait), _transaction(factory) as session:
        yield session


@contextmanager
def _transaction(factory: sessionmaker[Session]) -> Iterator[Session]:
    session = factory()
    try:
        yield session
        session.commit()
    except BaseException:
        session.rollback()
        raise
    finally:
        session.close()


@contextmanager
def read_transaction(factory: sessionmaker[Session]) -> Iterator[Session]:
    """A session for reading only: SQLite opens it with a deferred ``BEGIN``; it is closed at
    the end without a commit (the database transaction is rolled back), so nothing it did is
    ever stored. Rows read keep their loaded values after the block (closing detaches them;
    it does not expire them)."""
    session = factory()
    try:
        session.connection(execution_options={READ_ONLY: True})
        yield session
    finally:
        session.close()


def storage_settings(engine: Engine) -> dict[str, str]:
    """The storage settings in force, read back from the database (logged at start)."""
    with engine.connect() as conn:
        if engine.dialect.name == "sqlite":
            names = ["journal_mode", "synchronous", "busy_timeout", "foreign_keys"]
            levels = {"0": "OFF", "1": "NORMAL", "2": "FULL", "3": "EXTRA"}
            out = {}
            for name in names:
                value = str(conn.exec_driver_sql(f"PRAGMA {name}").scalar())
                out[name] = levels.get(value, value) if name == "synchronous" else value
            return out
        if engine.dialect.name == "postgresql":
            return {
                name: str(conn.execute(text(f"SHOW {name}")).scalar())
                for name in ("fsync", "synchronous_commit", "default_transaction_isolation")
            }
    return {}


def migrations_folder() -> Path:
    """The Alembic scripts: ``migrations/`` of the source tree (an editable install), else the
    copy a wheel installs under ``<prefix>/share/tidegate/migrations`` (pyproject.toml)."""
    source = ROOT / "migrations"
    if (source / "env.py").exists():
        return source
    return Path(sys.prefix) / "share" / "tidegate" / "migrations"


def alembic_config(settings: Settings) -> Any:
    from alembic.config import Config

    cfg = Config()
    cfg.set_main_option("script_location", str(migrations_folder()))
    cfg.set_main_option("sqlalchemy.url", settings.database_url.replace("%", "%%"))
    cfg.attributes["settings"] = settings
    return cfg


def head_revision(settings: Settings) -> str | None:
    from alembic.script import ScriptDirectory

    return ScriptDirectory.from_config(alembic_config(settings)).get_current_head()


def current_revision(engine: Engine) -> str | None:
    from alembic.runtime.migration import MigrationContext

    with engine.connect() as conn:
        return MigrationContext.configure(conn).get_current_revision()


def upgrade(settings: Settings, revision: str = "head") -> None:
    from alembic import command

    command.upgrade(alembic_config(settings), revision)


def downgrade(settings: Settings, revision: str) -> None:
    from alembic import command

    command.downgrade(alembic_config(settings), revision)


def ensure_ready(settings: Settings, engine: Engine) -> None:
    """Migrate (when settings say so) or refuse a database not at the head revision."""
    if settings.migrate_on_start:
        upgrade(settings)
    current = current_revision(engine)
    head = head_revision(settings)
    if current != head:
        raise DatabaseNotReady(
            f"database {engine.url.render_as_string(hide_password=True)} is at revision "
            f"{current or 'none (empty)'}, the service needs {head}. Run `tidegate db upgrade` "
            "(or set TIDEGATE_MIGRATE_ON_START=true)."
        )
