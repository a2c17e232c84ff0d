"""Two computations at once give the same results as one after the other, nested too."""

from __future__ import annotations

import numpy as np
import pytest

from service.stats import parallel
from service.stats.auc import delong_paired
from service.stats.parallel import MIN_ROWS, both


def test_both_returns_in_order_and_nests_without_waiting_on_itself() -> None:
    def inner() -> tuple[int, int]:
        return both(lambda: 1, lambda: 2, rows=MIN_ROWS)

    assert both(inner, lambda: 3, rows=MIN_ROWS) == ((1, 2), 3)


def test_parallel_delong_equals_serial(monkeypatch: pytest.MonkeyPatch) -> None:
    rng = np.random.default_rng(1)
    n = MIN_ROWS + 10  # large enough to take the threaded path
    y = (rng.random(n) < 0.3).astype(float)
    a = rng.normal(size=n) + y
    b = a + rng.normal(0, 0.5, n)
    threaded = delong_paired(y, a, b)
    monkeypatch.setattr(parallel, "MIN_ROWS", 10**12)  # everything inline
    serial = delong_paired(y, a, b)
    assert threaded == serial
