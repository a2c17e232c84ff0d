"""A live tidegate service for the client's tests: ``tidegate serve`` in a subprocess on a
migrated SQLite file, with API tokens, the test policy for every model and a metrics-only
policy for ``shelf-metrics``."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np

from tests.databases import make_token, new_sqlite_url, settings_for
from tests.serverproc import Server

#: Judged on the trainer's reported AUC alone; posts may come without a sample.
METRICS_ONLY_POLICY = """\
models = ["shelf-metrics"]
description = "reported metrics only"

[sample]
required = false

[[checks]]
name = "reported-auc"
kind = "metric"
metric = "auc"
direction = "higher"
max_drop = 0.01
floor = 0.60
"""

START = datetime(2026, 12, 1, 2, 0, tzinfo=UTC)


@dataclass
class Live:
    server: Server
    url: str
    database_url: str
    trainer: str  # role trainer, scope shelf-*
    operator: str  # role operator, scope *
    viewer: str


@contextmanager
def live_service(folder: Path, template: Path) -> Iterator[Live]:
    url = new_sqlite_url(template, folder)
    settings = settings_for(url)
    trainer = make_token(settings, "trainer", ("shelf-*",), label="bramble-trainer").secret
    operator = make_token(settings, "operator", label="on-call-ana").secret
    viewer = make_token(settings, "viewer", label="deploy-step").secret
    server = Server(url, folder)
    (server.policy_dir / "metrics-only.toml").write_text(METRICS_ONLY_POLICY, "utf-8")
    server.start(timeout=300.0)  # a busy 2-core machine: generous
    try:
        yield Live(server, server.url, url, trainer, operator, viewer)
    finally:
        server.stop()


def frame_columns(seed: int, *, rows: int = 400, shift: float = 0.0) -> dict[str, Any]:
    """Generated scores of one holdout (seeded; test data, not reference data): the candidate's
    score, the baseline's score on the same rows, labels and a device segment."""
    rng = np.random.default_rng(seed)
    base = rng.beta(2.0, 5.0, rows)
    return {
        "score": np.clip(base + rng.normal(0.0, 0.01, rows) + shift, 0.0, 1.0),
        "baseline_score": base,
        "label": (rng.random(rows) < base).astype(np.int64),
        "segment.device": np.where(rng.random(rows) < 0.6, "app", "web"),
    }


def watermark(step: int) -> str:
    return (START + timedelta(minutes=15 * step)).isoformat()
