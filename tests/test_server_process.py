"""The real server in a subprocess (issue 6): SIGKILL in the middle of a burst of posts loses no
acknowledged post and leaves nothing half-written; SIGTERM lets the request in flight finish;
several workers on one database keep one chain of baselines; logs are structured JSON with the
storage settings and a request id.

Figures (runs, posts acknowledged, found after restart) are printed (``pytest -s``) and written
to ``tests/artifacts/`` for the README.
"""

from __future__ import annotations

import json
import signal
import socket
import threading
import time
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import httpx
import pytest

from tests.databases import make_token, settings_for, snapshot_body
from tests.invariants import check_store
from tests.serverproc import Server

ARTIFACTS = Path(__file__).resolve().parent / "artifacts"
CLIENTS = 4
POSTS_PER_CLIENT = 12
ROWS = 2000  # big enough that a post spends a few milliseconds in the database
KILL_AFTER = (3, 17, 34)  # acknowledged posts before SIGKILL, one run each
MODELS = ("shelf-ranker", "also-read")


def record(name: str, figures: dict[str, Any]) -> None:
    ARTIFACTS.mkdir(exist_ok=True)
    path = ARTIFACTS / "trust-figures.json"
    data = json.loads(path.read_text()) if path.exists() else {}
    data[name] = figures
    path.write_text(json.dumps(data, indent=2, sort_keys=True))
    print(f"\n{name}: {json.dumps(figures, sort_keys=True)}")


def backend(url: str) -> str:
    return "sqlite" if url.startswith("sqlite") else "postgresql"


@pytest.fixture
def trainer(database_url: str) -> str:
    return make_token(settings_for(database_url), "trainer", label="crash-trainer").secret


def burst_bodies() -> list[list[tuple[str, dict[str, Any]]]]:
    """Per client, its posts: (model, body). Watermarks interleave across clients."""
    out = []
    for c in range(CLIENTS):
        posts = []
        for i in range(POSTS_PER_CLIENT):
            step = i * CLIENTS + c
            model = MODELS[step % len(MODELS)]
            posts.append((model, snapshot_body(f"c{c}-{i}", step=step, seed=step, rows=ROWS)))
        out.append(posts)
    return out


def run_burst(
    server: Server, token: str, kill_after: int
) -> tuple[dict[tuple[str, str], dict[str, Any]], list[tuple[str, dict[str, Any]]], int]:
    """Post from CLIENTS threads; SIGKILL the server after *kill_after* acknowledgements.
    Returns the acknowledged verdicts, the posts that got no acknowledgement, and how many
    posts were in flight (sent, not answered) when the signal went."""
    acked: dict[tuple[str, str], dict[str, Any]] = {}
    unacked: list[tuple[str, dict[str, Any]]] = []
    lock = threading.Lock()
    killed = threading.Event()
    in_flight = {"now": 0, "at_kill": 0}

    def client(posts: list[tuple[str, dict[str, Any]]]) -> None:
        with httpx.Client(
            base_url=server.url, timeout=120.0, headers={"Authorization": f"Bearer {token}"}
        ) as http:
            for n, (model, body) in enumerate(posts):
                if killed.is_set():
                    with lock:
                        unacked.extend(posts[n:])
                    return
                with lock:
                    in_flight["now"] += 1
                try:
                    response = http.post(f"/v1/models/{model}/snapshots", json=body)
                except httpx.HTTPError:
                    with lock:
                        unacked.extend(posts[n:])
                    return
                finally:
                    with lock:
                        in_flight["now"] -= 1
                assert response.status_code == 201, response.text
                with lock:
                    acked[(model, body["key"])] = response.json()
                    if len(acked) >= kill_after and not killed.is_set():
                        killed.set()
                        in_flight["at_kill"] = in_flight["now"]
                        server.signal(signal.SIGKILL)

    with ThreadPoolExecutor(CLIENTS) as pool:
        list(pool.map(client, burst_bodies()))
    server.wait()
    return acked, unacked, in_flight["at_kill"]


def test_sigkill_mid_burst_loses_no_acknowledged_post(
    database_url: str, trainer: str, tmp_path: Path
) -> None:
    server = Server(database_url, tmp_path)
    runs = []
    for kill_after in KILL_AFTER:
        server.start()
        acked, unacked, in_flight = run_burst(server, trainer, kill_after)
        assert len(acked) >= kill_after
        before = check_store(database_url)  # nothing half-written, integrity ok, one chain
        server.start()  # restart on the same database
        found = 0
        for key, verdict in acked.items():
            # every acknowledged post is stored, with the verdict that was acknowledged
            assert before.verdict_of[key] == (verdict["verdict_id"], verdict["decision"])
            found += 1
        committed_unacked = sum(1 for model, body in unacked if (model, body["key"]) in before.keys)
        retried = {201: 0, 200: 0}
        with httpx.Client(
            base_url=server.url, timeout=120.0, headers={"Authorization": f"Bearer {trainer}"}
        ) as http:
            for model, body in unacked:
                response = http.post(f"/v1/models/{model}/snapshots", json=body)
                assert response.status_code in (200, 201), response.text
                # stored before the kill (its answer was lost): the stored verdict, 200
                expected = 200 if (model, body["key"]) in before.keys else 201
                assert response.status_code == expected
                retried[response.status_code] += 1
        server.kill()
        after = check_store(database_url)
        assert {(m, b["key"]) for posts in burst_bodies() for m, b in posts} <= after.keys
        runs.append(
            {
                "kill_after_acks": kill_after,
                "posts": CLIENTS * POSTS_PER_CLIENT,
                "in_flight_at_kill": in_flight,
                "acknowledged": len(acked),
                "acknowledged_found_after_restart": found,
                "unacknowledged": len(unacked),
                "unacknowledged_but_committed": committed_unacked,
                "retried_201": retried[201],
                "retried_200": retried[200],
            }
        )
        # the next run starts over on fresh keys: drop what this one stored
        clear(database_url)
    record(f"crash-{backend(database_url)}", {"runs": runs})


def clear(url: str) -> None:
    """Remove every model's data (keeps tokens), so the next run posts the same keys anew."""
    from sqlalchemy import text

    from service.settings import Settings
    from service.store import db as store_db

    engine = store_db.make_engine(Settings(database_url=url))
    with engine.begin() as conn:
        conn.execute(text("UPDATE models SET baseline_id = NULL, reference_id = NULL"))
        for table in (
            "promotions",
            "overrides",
            "verdicts",
            "sample_columns",
            "snapshots",
            "policies",
            "audit_log",
            "models",
        ):
            conn.execute(text(f"DELETE FROM {table}"))
    engine.dispose()


def test_sigterm_lets_the_request_in_flight_finish(
    database_url: str, trainer: str, tmp_path: Path
) -> None:
    server = Server(database_url, tmp_path).start()
    body = json.dumps(snapshot_body("in-flight", step=1, rows=ROWS)).encode()
    head = (
        f"POST /v1/models/shelf-ranker/snapshots HTTP/1.1\r\nHost: 127.0.0.1\r\n"
        f"Authorization: Bearer {trainer}\r\nContent-Type: application/json\r\n"
        f"Content-Length: {len(body)}\r\nConnection: close\r\n\r\n"
    ).encode()
    with socket.create_connection(("127.0.0.1", server.port), timeout=30) as conn:
        conn.sendall(head + body[: len(body) // 2])  # the request is in flight ...
        time.sleep(2.0)  # (let the server start reading it)
        server.signal(signal.SIGTERM)  # ... when the stop comes
        # no new connections are taken while stopping: polled, the stop may take a while to
        # begin on a loaded machine
        deadline = time.monotonic() + 120
        refused = False
        while not refused and time.monotonic() < deadline:
            try:
                socket.create_connection(("127.0.0.1", server.port), timeout=5).close()
                time.sleep(0.2)
            except OSError:
                refused = True
        assert refused, "the server kept taking connections after SIGTERM"
        conn.sendall(body[len(body) // 2 :])
        answer = b""
        while chunk := conn.recv(65536):
            answer += chunk
    status = answer.split(b"\r\n", 1)[0]
    assert status == b"HTTP/1.1 201 Created", answer[:300]
    assert json.loads(answer.split(b"\r\n\r\n", 1)[1])["snapshot"] == "in-flight"
    # a clean exit (uvicorn re-raises the SIGTERM it caught once it has shut down)
    assert server.wait() in (0, -signal.SIGTERM)
    assert ("shelf-ranker", "in-flight") in check_store(database_url).keys
    lines = [json.loads(line) for line in server.log().splitlines() if line.startswith("{")]
    assert any("Shutting down" in line["message"] for line in lines)
    assert any("Finished server process" in line["message"] for line in lines)


def test_logs_are_json_with_storage_settings_and_request_ids(
    database_url: str, trainer: str, tmp_path: Path
) -> None:
    with Server(database_url, tmp_path) as server:
        response = httpx.get(
            f"{server.url}/v1/models",
            headers={"Authorization": f"Bearer {trainer}", "X-Request-ID": "trace-42"},
        )
        assert response.headers["x-request-id"] == "trace-42"
        generated = httpx.get(
            f"{server.url}/v1/models", headers={"Authorization": f"Bearer {trainer}"}
        )
        assert len(generated.headers["x-request-id"]) == 32
        refused = httpx.get(f"{server.url}/v1/models")
        assert refused.status_code == 401 and refused.headers["x-request-id"]
    lines = server.log().splitlines()
    records = [json.loads(line) for line in lines if line.strip()]  # every line is JSON
    storage = next(r for r in records if r.get("event") == "storage")
    if backend(database_url) == "sqlite":
        assert storage["journal_mode"] == "wal"
        assert storage["synchronous"] == "FULL"
        assert storage["busy_timeout"] == "10000"
    else:
        assert storage["fsync"] == "on" and storage["synchronous_commit"] == "on"
    traced = [r for r in records if r.get("request_id") == "trace-42"]
    assert traced and traced[-1]["status"] == 200 and traced[-1]["route"] == "/v1/models"
    assert any(r.get("status") == 401 and r.get("error") == "unauthorized" for r in records)


@pytest.fixture
def workers_server(database_url: str, tmp_path: Path) -> Iterator[Server]:
    server = Server(database_url, tmp_path, workers=3).start()
    yield server
    server.stop()


def test_several_workers_keep_one_chain_of_baselines(
    database_url: str, trainer: str, workers_server: Server
) -> None:
    from tests.test_concurrency import concurrent_posts

    with httpx.Client(
        base_url=workers_server.url, timeout=120.0, headers={"Authorization": f"Bearer {trainer}"}
    ) as http:

        def post(model: str, body: dict[str, Any]) -> Any:
            return http.post(f"/v1/models/{model}/snapshots", json=body)

        results = concurrent_posts(post, threads=6, per_thread=6)
    statuses = [status for _, status, _ in results]
    assert set(statuses) <= {200, 201}, results
    state = check_store(database_url, columns_per_sample=3)
    promoted = sum(1 for _, d in state.verdict_of.values() if d == "promote")
    record(
        f"workers-{backend(database_url)}",
        {
            "workers": 3,
            "client_threads": 6,
            "posts": len(results),
            "created": statuses.count(201),
            "retries_answered_200": statuses.count(200),
            "stored": state.snapshots,
            "promotions": state.promotions,
            "promoted": promoted,
        },
    )
    assert state.snapshots == 36 and state.promotions == promoted >= 1
