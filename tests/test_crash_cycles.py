"""SIGKILL, many times, while trainers post and operators override, roll back, set baselines
and pin references on one model (issue 12). PostgreSQL runs three workers; SQLite one (its
writers queue in the process). Each cycle starts the server on the same database, runs the
mixed workload (tests/chain_mix.py), kills the whole process group after a number of
acknowledged changes that varies by cycle, and checks:

* every acknowledged post is stored with the verdict that was acknowledged;
* every acknowledged operator action is in the audit log (each carries a unique reason), and
  nothing was half-written (tests/invariants.py ``check_store``);
* the baseline chain held through all of it (``check_chain``), across every cycle so far.

Cycles: 35 on SQLite and 15 on PostgreSQL (50); ``TIDEGATE_CRASH_CYCLES`` sets both.
Figures are written to ``tests/artifacts/trust-figures.json``.
"""

from __future__ import annotations

import os
import signal
import threading
from pathlib import Path

import httpx
import pytest
from sqlalchemy import select

from service.settings import Settings
from service.store import db as store_db
from service.store.tables import AuditRow
from tests.chain_mix import MODEL, Call, http_call, run_mix
from tests.databases import make_token, settings_for
from tests.invariants import check_chain, check_store
from tests.serverproc import Server
from tests.test_server_process import backend, record

#: Cycles per database (50 in all); ``TIDEGATE_CRASH_CYCLES`` sets both. PostgreSQL's run fewer:
#: each restarts three workers, the slow part of a cycle.
CYCLES = {"sqlite": 35, "postgresql": 15}
if os.environ.get("TIDEGATE_CRASH_CYCLES"):
    CYCLES = dict.fromkeys(CYCLES, int(os.environ["TIDEGATE_CRASH_CYCLES"]))


def audit_reasons(url: str) -> set[str]:
    engine = store_db.make_engine(Settings(database_url=url))
    try:
        with store_db.read_transaction(store_db.make_sessionmaker(engine)) as session:
            return set(session.scalars(select(AuditRow.reason)))
    finally:
        engine.dispose()


@pytest.mark.slow
def test_sigkill_cycles_with_mixed_writers(database_url: str, tmp_path: Path) -> None:
    settings = settings_for(database_url)
    tokens = {role: make_token(settings, role).secret for role in ("trainer", "operator")}
    workers = 1 if backend(database_url) == "sqlite" else 3
    server = Server(database_url, tmp_path, workers=workers)
    figures = {"acknowledged": 0, "found": 0, "posts": 0, "actions": 0}
    cycles = CYCLES[backend(database_url)]
    for cycle in range(cycles):
        server.start()
        kill_after = 2 + (cycle * 7) % 13  # 2 .. 14 acknowledged changes, varying
        killed = threading.Event()
        clients: list[httpx.Client] = []

        def on_ack(
            count: int, kill_after: int = kill_after, killed: threading.Event = killed
        ) -> None:
            if count >= kill_after and not killed.is_set():
                killed.set()
                server.signal(signal.SIGKILL)

        def call_for(role: str, clients: list[httpx.Client] = clients) -> Call:
            client = httpx.Client(
                base_url=server.url,
                timeout=120.0,
                headers={"Authorization": f"Bearer {tokens[role]}"},
            )
            clients.append(client)
            return http_call(client)

        result = run_mix(
            call_for,
            trainers=2,
            operators=2,
            posts_per_trainer=8,
            actions_per_operator=8,
            rows=40,
            prefix=f"c{cycle}-",
            on_ack=on_ack,
        )
        for client in clients:
            client.close()
        if not killed.is_set():  # the workload ended first
            server.signal(signal.SIGKILL)
        server.wait()
        assert not result.unexpected, result.unexpected[:3]

        state = check_store(database_url)
        for key, verdict_id in result.posts.items():
            assert state.verdict_of[(MODEL, key)][0] == verdict_id, f"cycle {cycle}: lost {key}"
        reasons = audit_reasons(database_url)
        lost = [r for r in result.reasons if r not in reasons]
        assert not lost, f"cycle {cycle}: acknowledged actions lost: {lost}"
        check_chain(database_url, model=MODEL)
        figures["acknowledged"] += len(result.posts) + len(result.reasons)
        figures["found"] += len(result.posts) + len(result.reasons) - len(lost)
        figures["posts"] += len(result.posts)
        figures["actions"] += len(result.reasons)
    chain = check_chain(database_url, model=MODEL)
    record(
        f"crash-cycles-{backend(database_url)}",
        {
            "cycles": cycles,
            "workers": workers,
            **figures,
            "lost": figures["acknowledged"] - figures["found"],
            "promotions": chain.promotions,
            "causes": chain.causes,
        },
    )
