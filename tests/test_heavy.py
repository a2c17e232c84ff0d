"""Heavy work is bounded and off the event loop (issue 10, item 7): at most
``heavy_concurrency`` parses or evaluations run at once, and while posts wait for a slot the
service still answers ``/healthz`` and its read routes. No timed assertions: waits are on
events, with generous limits for a busy machine."""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from typing import Any

import anyio
import pytest

from service.heavy import Heavy
from tests.databases import Api, snapshot_body

WAIT = 120.0  # seconds; generous for a loaded 2-core machine


def wait_until(condition: Callable[[], bool], what: str) -> None:
    deadline = time.monotonic() + WAIT
    while not condition():
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out waiting for {what}")
        time.sleep(0.01)


@pytest.mark.parametrize("slots", [1, 2, 3])
def test_no_more_than_slots_jobs_run_at_once(slots: int) -> None:
    heavy = Heavy(slots=slots)
    lock = threading.Lock()
    running = 0
    most = 0
    release = threading.Event()

    def job() -> int:
        nonlocal running, most
        with lock:
            running += 1
            most = max(most, running)
        release.wait(WAIT)
        with lock:
            running -= 1
        return 1

    async def main() -> int:
        results: list[int] = []

        async def one() -> None:
            results.append(await heavy.run(job))

        async with anyio.create_task_group() as group:
            for _ in range(3 * slots + 1):
                group.start_soon(one)
            # every slot fills and the rest wait; then let them all through
            await anyio.to_thread.run_sync(
                wait_until, lambda: heavy.running == slots and most == slots, "slots to fill"
            )
            release.set()
        return len(results)

    assert anyio.run(main) == 3 * slots + 1
    assert most == slots and heavy.running == 0 and heavy.waiting == 0


def test_a_thread_slot_and_the_async_limiter_share_the_bound() -> None:
    heavy = Heavy(slots=1)
    held, release, entered = threading.Event(), threading.Event(), threading.Event()

    def holder() -> None:
        with heavy.slot():  # a sync route's heavy work, in its own thread
            held.set()
            release.wait(WAIT)

    thread = threading.Thread(target=holder)
    thread.start()
    held.wait(WAIT)

    async def main() -> str:
        async with anyio.create_task_group() as group:
            result: list[str] = []

            async def run() -> None:
                result.append(await heavy.run(lambda: (entered.set(), "done")[1]))

            group.start_soon(run)
            await anyio.to_thread.run_sync(wait_until, lambda: heavy.waiting == 1, "a waiter")
            assert not entered.is_set()  # the one slot is held by the other thread
            release.set()
        return result[0]

    assert anyio.run(main) == "done"
    thread.join(WAIT)
    assert heavy.running == 0 and heavy.waiting == 0


def test_health_and_reads_answer_while_posts_wait_for_heavy_slots(
    make_api: Callable[..., Api],
) -> None:
    api = make_api(heavy_concurrency=1)
    heavy: Heavy = api.app.state.heavy
    assert api.post("shelf-ranker", snapshot_body("s0", step=0)).status_code == 201
    answers: dict[str, Any] = {}

    def post(key: str, step: int) -> None:
        answers[key] = api.post("shelf-ranker", snapshot_body(key, step=step))

    with api.client:
        with heavy.slot():  # a heavy job that does not end until we say so
            posts = [threading.Thread(target=post, args=(f"s{i}", i)) for i in range(1, 4)]
            for thread in posts:
                thread.start()
            wait_until(lambda: heavy.waiting == 3, "the three posts to wait for a slot")
            # the event loop is free: health, a list and a page answer meanwhile
            assert api.client.get("/healthz").status_code == 200
            listing = api.client.get("/v1/models/shelf-ranker/verdicts", headers=api.headers())
            assert listing.status_code == 200 and listing.json()["count"] == 1
            assert not answers  # no post got past its slot
        for thread in posts:
            thread.join(WAIT)
    assert sorted(answers) == ["s1", "s2", "s3"]
    assert {r.status_code for r in answers.values()} == {201}
