"""Writers of one process queue for SQLite (issue 12): in arrival order, before their
transaction begins; none fails on "database is locked"; a write whose turn does not come in
time gets 503 with Retry-After and stores nothing."""

from __future__ import annotations

import threading
import time
from concurrent.futures import ThreadPoolExecutor

import pytest

from service.store import db as store_db
from tests.databases import Api, snapshot_body


def test_turns_are_given_in_arrival_order() -> None:
    queue = store_db.WriteQueue()
    order: list[int] = []
    assert queue.acquire(1.0)  # the first writer holds the turn

    def writer(n: int) -> None:
        with queue.turn(60.0):
            order.append(n)

    threads = []
    for n in range(6):
        thread = threading.Thread(target=writer, args=(n,))
        thread.start()
        threads.append(thread)
        while queue.waiting < n + 1:  # wait until it queues, so arrival order is known
            time.sleep(0.001)
    queue.release()
    for thread in threads:
        thread.join()
    assert order == list(range(6))


def test_a_turn_that_does_not_come_in_time_is_refused_and_the_queue_goes_on() -> None:
    queue = store_db.WriteQueue()
    assert queue.acquire(1.0)  # this thread holds the turn
    refused: list[BaseException] = []

    def late() -> None:
        try:
            with queue.turn(0.05):
                pass  # pragma: no cover - never reached
        except store_db.StorageBusy as exc:
            refused.append(exc)

    thread = threading.Thread(target=late)
    thread.start()
    thread.join()
    assert len(refused) == 1 and "retry later" in str(refused[0])
    assert queue.waiting == 0  # the one that gave up left the queue
    queue.release()
    thread = threading.Thread(target=late)  # free again: this one gets its turn
    thread.start()
    thread.join()
    assert len(refused) == 1


def test_a_write_inside_a_write_on_the_same_thread_goes_on() -> None:
    queue = store_db.WriteQueue()
    with queue.turn(0.05), queue.turn(0.05):
        pass
    with queue.turn(0.05):
        pass


@pytest.mark.parametrize("database_url", ["sqlite"], indirect=True)
def test_engines_on_one_file_share_its_queue(api: Api) -> None:
    ours = store_db.engine_write_queue(api.app.state.engine)
    other = store_db.make_engine(api.settings)
    try:
        theirs = store_db.engine_write_queue(other)
        assert ours is not None and theirs is not None and ours[0] is theirs[0]
    finally:
        other.dispose()


@pytest.mark.parametrize("database_url", ["sqlite"], indirect=True)
def test_a_write_that_waits_too_long_gets_503_with_retry_after(make_api: object) -> None:
    api = make_api(sqlite_write_wait_seconds=0.2)  # type: ignore[operator]
    queue, _ = store_db.engine_write_queue(api.app.state.engine)  # type: ignore[misc]
    assert queue.acquire(1.0)  # another writer of this process holds the turn
    try:
        answer = api.post("m", snapshot_body("late", step=1))
    finally:
        queue.release()
    assert answer.status_code == 503
    assert answer.json()["error"]["code"] == "storage_busy"
    assert int(answer.headers["retry-after"]) >= 1
    assert api.client.get("/v1/models/m", headers=api.headers()).status_code == 404  # nothing
    assert api.post("m", snapshot_body("late", step=1)).status_code == 201


@pytest.mark.parametrize("database_url", ["sqlite"], indirect=True)
def test_eight_writers_on_one_model_never_fail(api: Api) -> None:
    """8 threads x 10 posts of 2,000 rows at once on one model, with SQLite's busy timeout cut
    to 50 ms: were the writers waiting in SQLite's busy handler, many would fail with
    "database is locked"; queued in the process, none does. (bench/contention.py measures
    8 x 50 posts against a real server.)"""
    engine = api.app.state.engine
    from sqlalchemy import event

    @event.listens_for(engine, "connect")
    def short_timeout(dbapi_conn: object, _record: object) -> None:
        dbapi_conn.execute("PRAGMA busy_timeout=50")  # type: ignore[attr-defined]

    engine.dispose()  # new connections take the short timeout
    bodies = [
        [snapshot_body(f"w{w}-{i}", step=i * 8 + w, seed=w, rows=2000) for i in range(10)]
        for w in range(8)
    ]

    def writer(mine: list[dict[str, object]]) -> list[int]:
        return [api.post("m", body).status_code for body in mine]

    with ThreadPoolExecutor(8) as pool:
        statuses = [s for chunk in pool.map(writer, bodies) for s in chunk]
    assert statuses == [201] * 80
