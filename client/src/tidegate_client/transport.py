"""Sending one request with retries: which failures are retried, how long to wait between
attempts, and the total timeout.

Retried: network errors, 5xx answers (500, 502, 503, 504), 408 and 429. The wait before the
next attempt is the answer's ``Retry-After`` when it gives one, else an exponential backoff
with jitter: attempt *n* waits a random time between half and all of
``min(max_backoff, backoff * 2**(n-1))`` ("equal jitter", so retries of many jobs spread out
yet never bunch at zero). Nothing is retried past the total timeout.

A request that is not idempotent by itself (an override, a baseline change) is retried only
when it certainly did nothing: the connection was never made, or the service answered a 5xx,
408 or 429 (the service stores nothing then). A post of a snapshot is idempotent: a retry with
the same key answers the stored verdict.
"""

from __future__ import annotations

import random
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from email.utils import parsedate_to_datetime
from typing import Any

import httpx

from tidegate_client.errors import Unreachable

__all__ = ["RETRY_STATUSES", "RetryPolicy", "retry_after_seconds", "send"]

RETRY_STATUSES = frozenset({408, 429, 500, 502, 503, 504})
#: Transport errors after which the request certainly never reached the service.
_NOT_SENT = (httpx.ConnectError, httpx.ConnectTimeout)


@dataclass
class RetryPolicy:
    """How often and how long to retry.

    Parameters
    ----------
    retries : int
        Attempts after the first (0: no retry).
    timeout : float
        Seconds for one call, all attempts and waits included.
    backoff : float
        Seconds of the first wait; doubles with each attempt.
    max_backoff : float
        Longest wait between two attempts (a longer ``Retry-After`` is honoured, within the
        total timeout).
    sleep : callable
        ``sleep(seconds)``; tests pass a recorder.
    rng : random.Random
        Source of the jitter.
    """

    retries: int = 5
    timeout: float = 120.0
    backoff: float = 0.5
    max_backoff: float = 30.0
    sleep: Callable[[float], None] = time.sleep
    rng: random.Random = field(default_factory=random.Random)
    clock: Callable[[], float] = time.monotonic

    def wait(self, attempt: int) -> float:
        """Seconds to wait after failed attempt number *attempt* (1-based)."""
        cap = min(self.max_backoff, self.backoff * 2.0 ** (attempt - 1))
        return cap / 2.0 + self.rng.uniform(0.0, cap / 2.0)


def retry_after_seconds(value: str | None, *, now: datetime | None = None) -> float | None:
    """Seconds a ``Retry-After`` header asks to wait (a number of seconds or an HTTP date,
    RFC 9110 §10.2.3); None when absent or unreadable."""
    if not value:
        return None
    value = value.strip()
    try:
        return max(0.0, float(value))
    except ValueError:
        pass
    try:
        when = parsedate_to_datetime(value)
    except (TypeError, ValueError):
        return None
    if when.tzinfo is None:
        when = when.replace(tzinfo=UTC)
    return max(0.0, (when - (now or datetime.now(UTC))).total_seconds())


def send(
    http: httpx.Client,
    method: str,
    url: str,
    *,
    policy: RetryPolicy,
    idempotent: bool = True,
    timeout: float | None = None,
    **kwargs: Any,
) -> httpx.Response:
    """Send a request with retries; the last answer that is not retried is returned.

    Raises
    ------
    Unreachable
        No answer that could be returned within ``policy.retries`` retries and the total
        timeout (*timeout*, else ``policy.timeout``).
    """
    total = policy.timeout if timeout is None else timeout
    deadline = policy.clock() + total
    attempt = 0
    last_status: int | None = None
    last_problem = ""
    while True:
        attempt += 1
        remaining = deadline - policy.clock()
        if remaining <= 0:
            raise Unreachable(
                f"{http.base_url}: no answer within the total timeout of {total:g} s "
                f"({attempt - 1} attempts; last: {last_problem or 'none'})",
                url=str(http.base_url),
                attempts=attempt - 1,
                last_status=last_status,
            )
        pause: float | None = None
        try:
            response = http.request(method, url, timeout=remaining, **kwargs)
        except httpx.TransportError as exc:
            last_status = None
            last_problem = f"{type(exc).__name__}: {exc}" if str(exc) else type(exc).__name__
            if not idempotent and not isinstance(exc, _NOT_SENT):
                raise Unreachable(
                    f"{http.base_url}: {last_problem}; not retried, since the request may have "
                    "been carried out (check before repeating it)",
                    url=str(http.base_url),
                    attempts=attempt,
                ) from exc
        else:
            if response.status_code not in RETRY_STATUSES:
                return response
            last_status = response.status_code
            last_problem = f"HTTP {response.status_code}"
            pause = retry_after_seconds(response.headers.get("retry-after"))
            response.close()
        if attempt > policy.retries:
            raise Unreachable(
                f"{http.base_url}: {last_problem} after {attempt} attempts",
                url=str(http.base_url),
                attempts=attempt,
                last_status=last_status,
            )
        pause = policy.wait(attempt) if pause is None else pause
        if policy.clock() + pause >= deadline:
            raise Unreachable(
                f"{http.base_url}: {last_problem}; the next attempt (in {pause:.1f} s) would pass "
                f"the total timeout of {total:g} s ({attempt} attempts)",
                url=str(http.base_url),
                attempts=attempt,
                last_status=last_status,
            )
        policy.sleep(pause)
