"""Bounded cost of the heavy work a caller can ask for: bootstrap resamples, replays.

* **Resamples** are capped by the ``max_resamples`` setting: a policy asking for more is
  refused (a policy file at start, an inline policy of a replay with 422).
* **A replay's work** is estimated before anything is computed, from stored counts only:
  the sum over the replayed snapshots of their sample rows (candidate and baseline) times the
  policy's passes over them (one per check, plus its resamples). Above ``replay_max_work`` the
  answer is 422 ``replay_over_budget``; nothing runs. The estimate is in row-passes, which is
  what a bootstrap costs (each resample draws every row once).
* **A replay's wall clock** is limited by ``replay_max_seconds``: checked between snapshots;
  past it the replay stops with 422 ``replay_time_limit`` (it stores nothing in any case).
* **Concurrency**: at most ``replay_slots`` replays run at once in a process; one more is
  answered 429 ``busy`` with ``Retry-After`` at once (it does not queue, holding a thread).
* **Priority**: a replay runs in a thread of its own with a lower CPU priority (Linux: the
  thread's nice value +10), so that on a busy machine the operating system gives the event
  loop (``/healthz``, the pages) the processor first.
"""

from __future__ import annotations

import os
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import TypeVar

from service.errors import Busy, InvalidInput
from service.gate.policy import Policy


def resamples_of(policy: Policy) -> list[tuple[str, int]]:
    """(check name, resamples) of each check of *policy* that resamples."""
    out = []
    for check in policy.checks:
        value = getattr(check, "resamples", None)
        if isinstance(value, int):
            out.append((str(getattr(check, "name", "?")), value))
    return out


def over_resample_cap(policy: Policy, cap: int) -> str | None:
    """A sentence naming the first check of *policy* above *cap* resamples, or None."""
    for name, value in resamples_of(policy):
        if value > cap:
            return (
                f"check {name!r} asks for {value} bootstrap resamples; the service allows at "
                f"most {cap} (setting TIDEGATE_MAX_RESAMPLES)"
            )
    return None


def passes_per_row(policy: Policy) -> int:
    """How many times judging one snapshot under *policy* goes over each row, at most: once
    per check, and once per resample of each resampling check."""
    return len(policy.checks) + sum(value for _, value in resamples_of(policy)) + 1


def replay_work(policy: Policy, rows: Sequence[int]) -> int:
    """Estimated row-passes of replaying snapshots with *rows* sample rows each (candidate and
    baseline rows added per snapshot)."""
    return passes_per_row(policy) * sum(rows)


@dataclass
class ReplayBudget:
    """The limits of one replay (see the module doc)."""

    max_work: int
    max_seconds: float
    clock: Callable[[], float] = time.monotonic
    started: float = field(default=0.0)

    def check_estimate(self, policy: Policy, rows: Sequence[int]) -> int:
        work = replay_work(policy, rows)
        if work > self.max_work:
            raise InvalidInput(
                f"this replay would take about {work:,} row-passes ({len(rows)} snapshots, "
                f"{sum(rows):,} sample rows, {passes_per_row(policy)} passes per row under this "
                f"policy); the limit is {self.max_work:,} (setting TIDEGATE_REPLAY_MAX_WORK). "
                "Replay fewer snapshots (limit) or use fewer resamples",
                field="limit",
                code="replay_over_budget",
            )
        self.started = self.clock()
        return work

    def check_time(self, done: int, total: int) -> None:
        spent = self.clock() - self.started
        if spent > self.max_seconds:
            raise InvalidInput(
                f"the replay stopped after {spent:.0f} s, past its limit of {self.max_seconds:g} s "
                f"(setting TIDEGATE_REPLAY_MAX_SECONDS), with {done} of {total} snapshots "
                "judged; replay fewer snapshots (limit)",
                field="limit",
                code="replay_time_limit",
            )


class Slots:
    """At most *size* holders at once; one more is refused at once (429 ``busy``)."""

    def __init__(self, size: int, what: str) -> None:
        self._semaphore = threading.BoundedSemaphore(size)
        self.size = size
        self.what = what

    @contextmanager
    def hold(self) -> Iterator[None]:
        if not self._semaphore.acquire(blocking=False):
            raise Busy(
                f"{self.size} {self.what} already running in this process; retry later",
                retry_after=10,
            )
        try:
            yield
        finally:
            self._semaphore.release()


T = TypeVar("T")

#: How much lower the CPU priority of a background job's thread is (nice value increment).
BACKGROUND_NICENESS = 10


def in_background(fn: Callable[[], T]) -> T:
    """Run *fn* in a new thread with a lower CPU priority (where the system allows it), wait
    for it and return its result (or raise its exception). The thread ends with *fn*, so no
    pooled thread keeps the lower priority."""
    out: list[T] = []
    failure: list[BaseException] = []

    def run() -> None:
        try:
            if hasattr(os, "setpriority"):
                try:
                    os.setpriority(os.PRIO_PROCESS, threading.get_native_id(), BACKGROUND_NICENESS)
                except OSError:  # not allowed here: run at the normal priority
                    pass
            out.append(fn())
        except BaseException as exc:  # handed to the caller
            failure.append(exc)

    thread = threading.Thread(target=run, name="tidegate-background")
    thread.start()
    thread.join()
    if failure:
        raise failure[0]
    return out[0]
