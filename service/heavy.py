"""Heavy CPU work (decoding a body, parsing a sample, judging it) runs in worker threads, a
bounded number at a time, so the event loop keeps answering ``/healthz`` and the pages while a
large post is being parsed or judged.

One limiter per app (``app.state.heavy``), sized by the ``heavy_concurrency`` setting. Work
that waits for a slot waits in the event loop without holding a thread. numpy, pyarrow,
zstandard, zlib and hashlib release the GIL for their large loops, so a second slot helps on a
machine with two or more cores; more slots than cores only add memory.

Usage::

    heavy = Heavy(slots=2)
    result = await heavy.run(parse, body)        # from async code
    with heavy.slot():                           # from a sync route already in a worker thread
        verdict = judge(...)
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import ParamSpec, TypeVar

import anyio
import anyio.to_thread

P = ParamSpec("P")
T = TypeVar("T")


class Heavy:
    """A bound on concurrent heavy work: ``slots`` at a time, the rest wait their turn."""

    def __init__(self, *, slots: int) -> None:
        if slots < 1:
            raise ValueError("heavy work needs at least one slot")
        self.slots = slots
        # Every heavy job takes its slot from this one semaphore, in its worker thread. (An
        # anyio limiter is bound to the event loop that first used it; the service may run
        # several loops, e.g. one per test-client request, so the bound is a thread semaphore.)
        self._threads = threading.BoundedSemaphore(slots)
        self._lock = threading.Lock()
        self._running = 0
        self._waiting = 0

    @property
    def running(self) -> int:
        """Heavy jobs running now."""
        return self._running

    @property
    def waiting(self) -> int:
        """Heavy jobs waiting for a slot."""
        return self._waiting

    def _count(self, running: int = 0, waiting: int = 0) -> None:
        with self._lock:
            self._running += running
            self._waiting += waiting

    @contextmanager
    def slot(self) -> Iterator[None]:
        """Hold one slot in the current (worker) thread; blocks until one is free."""
        self._count(waiting=1)
        self._threads.acquire()
        self._count(running=1, waiting=-1)
        try:
            yield
        finally:
            self._count(running=-1)
            self._threads.release()

    async def run(self, fn: Callable[P, T], *args: P.args, **kwargs: P.kwargs) -> T:
        """Run ``fn(*args, **kwargs)`` in a worker thread holding one slot."""
        self._count(waiting=1)
        entered = False

        def call() -> T:
            nonlocal entered
            self._threads.acquire()
            self._count(running=1, waiting=-1)
            entered = True
            try:
                return fn(*args, **kwargs)
            finally:
                self._count(running=-1)
                self._threads.release()

        try:
            return await anyio.to_thread.run_sync(call)
        finally:
            if not entered:
                self._count(waiting=-1)
