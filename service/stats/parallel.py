"""Two independent numpy computations at once, on the machine's second core.

numpy releases the GIL inside sorts, gathers, scatters and ufunc loops, so two independent
array computations (the candidate's and the baseline's half of a paired test) run in parallel
on two threads. Only worth it for large arrays; :func:`both` runs small work inline. Results
do not depend on the thread schedule.
"""

from __future__ import annotations

import os
import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import TypeVar

A = TypeVar("A")
B = TypeVar("B")

#: Below this many rows the thread hand-off costs more than it saves.
MIN_ROWS = 200_000

_POOL: ThreadPoolExecutor | None = None
_PREFIX = "tidegate-stats"


def _pool() -> ThreadPoolExecutor:
    global _POOL
    if _POOL is None:
        _POOL = ThreadPoolExecutor(max_workers=1, thread_name_prefix=_PREFIX)
    return _POOL


def both(first: Callable[[], A], second: Callable[[], B], *, rows: int) -> tuple[A, B]:
    """``(first(), second())``; in parallel when *rows* is large and there is a second core."""
    nested = threading.current_thread().name.startswith(_PREFIX)  # never wait on ourselves
    if rows < MIN_ROWS or nested or (os.cpu_count() or 1) < 2:
        return first(), second()
    future = _pool().submit(first)
    other = second()
    return future.result(), other
