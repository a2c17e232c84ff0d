"""One chain of baselines under every writer (issue 12): posts, overrides, manual sets,
rollbacks and pins on one model at once, from threads in one process (both databases) and from
a server with several workers; afterwards every promotion replaced the baseline in force when it
committed, followed its own rule, and the audit log says the same (tests/invariants.py).

Figures are printed (``pytest -s``) and written to ``tests/artifacts/trust-figures.json``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import httpx
import pytest

from service import operate
from tests.chain_mix import MODEL, Call, http_call, run_mix
from tests.databases import Api, make_token, settings_for, snapshot_body
from tests.invariants import chain_breaks, check_chain, check_store
from tests.serverproc import Server
from tests.test_server_process import backend, record


def test_the_chain_check_catches_an_override_on_a_stale_baseline(api: Api) -> None:
    """The check can fail: an override that recorded a baseline other than the one serving
    (what a stale read of the model row did under several workers) is caught."""
    for step in (1, 2, 3):
        assert api.post(MODEL, snapshot_body(f"s{step}", step=step)).status_code == 201
    check_chain(api.settings.database_url, model=MODEL)
    from sqlalchemy import text

    from service.store import db as store_db

    engine = store_db.make_engine(api.settings)
    with engine.begin() as conn:
        first = conn.execute(text("SELECT min(id) FROM snapshots")).scalar()
        conn.execute(
            text(
                "UPDATE promotions SET previous_id = :f WHERE id = (SELECT max(id) FROM promotions)"
            ),
            {"f": first},
        )
    engine.dispose()
    with pytest.raises(AssertionError, match="served then"):
        check_chain(api.settings.database_url, model=MODEL)


@pytest.mark.parametrize("database_url", ["postgresql"], indirect=True)
def test_an_override_reads_the_baseline_inside_the_lock(api: Api) -> None:
    """The model row was read (and cached by the session) before the lock was taken; a baseline
    that moved in between must still be the one the override sees. (This was the chain break
    under several workers: the override recorded a baseline replaced since.)"""
    assert api.post(MODEL, snapshot_body("a", step=1)).json()["decision"] == "promote"
    held = api.post(MODEL, snapshot_body("b", step=2, shift=0.5)).json()
    assert held["decision"] == "hold"
    database = api.app.state.database
    with database.transaction() as session:
        verdict, model = operate.verdict_with_model(session, verdict_id=held["verdict_id"])
        assert model.baseline_id is not None  # the row is cached in this session now
        moved_elsewhere(api, "c", step=3)  # another writer commits a new baseline meanwhile
        outcome = operate.override_verdict(
            session,
            verdict_id=held["verdict_id"],
            decision="promote",
            reason="test",
            actor="t",
            now=api.app.state.clock(),
        )
    # c (newer than b) serves: the override leaves it and says so
    assert outcome.baseline_before == "c" and not outcome.baseline_moved
    check_chain(api.settings.database_url, model=MODEL)


def moved_elsewhere(api: Api, key: str, step: int) -> None:
    """Commit a new baseline from another connection. (PostgreSQL only: on SQLite the test's
    transaction holds the write lock, so no other writer could commit meanwhile.)"""
    import threading

    done: list[int] = []
    thread = threading.Thread(
        target=lambda: done.append(api.post(MODEL, snapshot_body(key, step=step)).status_code)
    )
    thread.start()
    thread.join(timeout=120)
    assert done == [201]


def test_mixed_writers_keep_one_chain_in_one_process(api: Api) -> None:
    """Threads of one process (TestClient): 3 trainers x 12 posts, 3 operators x 12 actions."""
    headers = api.headers()

    def call_for(role: str) -> Call:
        def call(method: str, path: str, body: dict[str, Any] | None) -> tuple[int, Any]:
            response = api.client.request(method, path, json=body, headers=headers)
            return response.status_code, response.json()

        return call

    result = run_mix(call_for)
    assert not result.unexpected, result.unexpected[:3]
    state = check_store(api.settings.database_url)
    chain = check_chain(api.settings.database_url, model=MODEL)
    assert len(result.posts) == state.snapshots == 36
    assert chain.causes.get("override", 0) + chain.causes.get("rollback", 0) >= 1
    record(
        f"chain-threads-{backend(api.settings.database_url)}",
        {"requests": result.counts, "promotions": chain.promotions, "causes": chain.causes},
    )


@pytest.mark.slow
def test_mixed_writers_keep_one_chain_across_workers(database_url: str, tmp_path: Path) -> None:
    """A server with 3 workers; 3 trainers and 3 operators, each with its own connection."""
    settings = settings_for(database_url)
    tokens = {role: make_token(settings, role).secret for role in ("trainer", "operator")}
    runs = []
    with Server(database_url, tmp_path, workers=3) as server:
        clients: list[httpx.Client] = []

        def call_for(role: str) -> Call:
            client = httpx.Client(
                base_url=server.url,
                timeout=120.0,
                headers={"Authorization": f"Bearer {tokens[role]}"},
            )
            clients.append(client)
            return http_call(client)

        for run in range(2):
            result = run_mix(call_for, prefix=f"r{run}-", posts_per_trainer=10)
            runs.append(result)
            assert not result.unexpected, result.unexpected[:3]
            breaks = chain_breaks(database_url, model=MODEL)
            print(f"run {run}: {result.counts}, chain breaks so far: {breaks}")
            assert breaks == 0
        for client in clients:
            client.close()
    state = check_store(database_url)
    chain = check_chain(database_url, model=MODEL)
    assert state.snapshots == sum(len(r.posts) for r in runs) == 60
    assert chain.causes.get("override", 0) >= 1
    record(
        f"chain-workers-{backend(database_url)}",
        {
            "workers": 3,
            "runs": len(runs),
            "requests": [r.counts for r in runs],
            "promotions": chain.promotions,
            "causes": chain.causes,
            "backwards": chain.backwards,
        },
    )
