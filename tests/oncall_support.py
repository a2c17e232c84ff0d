"""Helpers of the on-call tests: a small generated history of the demo bookshop's models, an
app on a temporary SQLite file with a fixed clock, and the real service in a subprocess.

The history (seeded, generated; demo data, not reference data) of ``shelf-ranker``:

====  =======================================================================
s01   first snapshot, promoted
s02   promoted
s03   promoted
s04   held: every score shifted up (PSI far over its limit) and AUC down
====  =======================================================================

and of ``also-read``: a01 and a02, both promoted.
"""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import httpx
import numpy as np
from fastapi import FastAPI
from fastapi.testclient import TestClient

from service.app import create_app
from service.gate.policy import Policy, parse_policy
from service.settings import Settings
from service.store import db

ROOT = Path(__file__).resolve().parent.parent
START = datetime(2026, 12, 1, 2, 0, tzinfo=UTC)
ROWS = 400

POLICY = """\
models = ["shelf-ranker*", "also-read"]
first_snapshot = "promote-if-healthy"

[sample]
min_rows = 100

[[checks]]
name = "score-psi"
kind = "drift"
statistic = "psi"
max = 0.10

[[checks]]
name = "reported-auc"
kind = "metric"
metric = "auc"
direction = "higher"
max_drop = 0.01
floor = 0.60
"""


def policies() -> list[Policy]:
    return [parse_policy(POLICY, name="bookshop", path="bookshop.toml")]


def _holdout(seed: int) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    base = rng.beta(2.0, 5.0, ROWS)
    return {
        "base": base,
        "label": (rng.random(ROWS) < base).astype(int),
        "device": np.where(rng.random(ROWS) < 0.6, "app", "web"),
        "tenure": np.where(rng.random(ROWS) < 0.3, "new", "returning"),
    }


def snapshot_body(
    key: str,
    step: int,
    *,
    shifted: bool = False,
    seed: int = 7,
    at: datetime = START,
    auc: float | None = None,
) -> dict[str, Any]:
    """One post: the same holdout rows every time, scores near the holdout's own unless
    *shifted* (then moved up by 0.3, capped below 1)."""
    h = _holdout(seed)
    noise = np.random.default_rng(1000 + step).normal(0.0, 0.004, ROWS)
    score = np.clip(h["base"] + noise, 0.0005, 0.9995)
    if shifted:
        score = np.clip(score + 0.3, 0.0005, 0.9995)
    return {
        "key": key,
        "trained_until": (at + timedelta(minutes=15 * step)).isoformat().replace("+00:00", "Z"),
        "code_version": "b7e41d2",
        "rows_trained": 1_800_000 + 1000 * step,
        "metrics": {"auc": auc if auc is not None else (0.70 if shifted else 0.75 + 0.001 * step)},
        "sample": {
            "score": [round(float(s), 6) for s in score],
            "label": h["label"].tolist(),
            "baseline_score": [round(float(s), 6) for s in h["base"]],
            "segment.device": h["device"].tolist(),
            "segment.reader_tenure": h["tenure"].tolist(),
        },
    }


SCENARIO: list[tuple[str, str, bool]] = [
    ("shelf-ranker", "s01", False),
    ("also-read", "a01", False),
    ("shelf-ranker", "s02", False),
    ("shelf-ranker", "s03", False),
    ("also-read", "a02", False),
    ("shelf-ranker", "s04", True),
]


def load(
    post: Callable[[str, dict[str, Any]], dict[str, Any]], *, at: datetime = START
) -> dict[str, dict[str, Any]]:
    """Post the scenario in order; returns each snapshot key's verdict."""
    verdicts = {}
    for step, (model, key, shifted) in enumerate(SCENARIO, start=1):
        verdicts[key] = post(model, snapshot_body(key, step, shifted=shifted, at=at))
    return verdicts


@dataclass
class Clock:
    """A clock a test moves by hand."""

    now: datetime = START

    def __call__(self) -> datetime:
        return self.now

    def advance(self, **kwargs: float) -> None:
        self.now += timedelta(**kwargs)


@dataclass
class Harness:
    app: FastAPI
    http: TestClient
    clock: Clock
    verdicts: dict[str, dict[str, Any]] = field(default_factory=dict)


def migrated_settings(folder: Path) -> Settings:
    settings = Settings(
        database_url=f"sqlite:///{folder / 'tidegate.db'}", auth="open", policy_dir=folder
    )
    db.upgrade(settings)
    return settings


@contextmanager
def harness(folder: Path) -> Iterator[Harness]:
    """The app on a fresh SQLite file with the scenario loaded, one post every 15 minutes."""
    clock = Clock()
    app = create_app(migrated_settings(folder), policies=policies(), clock=clock)
    with TestClient(app) as http:

        def post(model: str, body: dict[str, Any]) -> dict[str, Any]:
            clock.advance(minutes=15)
            response = http.post(f"/v1/models/{model}/snapshots", json=body)
            assert response.status_code == 201, response.text
            return response.json()  # type: ignore[no-any-return]

        verdicts = load(post)
        clock.advance(minutes=5)
        yield Harness(app, http, clock, verdicts)


# --- the real service in a subprocess -------------------------------------------------------


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@dataclass
class LiveService:
    url: str
    verdicts: dict[str, dict[str, Any]]
    log: Path


@contextmanager
def running_service(folder: Path, *, database_url: str, policy_dir: Path) -> Iterator[str]:
    """uvicorn serving the app on a free 127.0.0.1 port over *database_url* (open mode);
    yields its base URL. Stopped (by its process id) on exit."""
    port = free_port()
    env = {
        **os.environ,
        "TIDEGATE_DATABASE_URL": database_url,
        "TIDEGATE_POLICY_DIR": str(policy_dir),
        "TIDEGATE_AUTH": "open",
        "PYTHONPATH": str(ROOT),
    }
    log = folder / "service.log"
    with log.open("wb") as out:
        process = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "uvicorn",
                "--factory",
                "service.app:create_app",
                "--host",
                "127.0.0.1",
                "--port",
                str(port),
                "--log-level",
                "warning",
            ],
            cwd=ROOT,
            env=env,
            stdout=out,
            stderr=subprocess.STDOUT,
        )
    url = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 120  # a busy 2-core machine starts slowly
        while True:
            try:
                if httpx.get(url + "/healthz", timeout=1).status_code == 200:
                    break
            except httpx.HTTPError:
                pass
            if process.poll() is not None or time.monotonic() > deadline:
                raise RuntimeError("the service did not start:\n" + log.read_text())
            time.sleep(0.2)
        yield url
    finally:
        process.terminate()
        try:
            process.wait(timeout=30)
        except subprocess.TimeoutExpired:
            process.kill()


@contextmanager
def live_service(folder: Path) -> Iterator[LiveService]:
    """uvicorn serving the app on a free 127.0.0.1 port, on a temporary SQLite file with the
    scenario posted through the HTTP API. Stopped (by its process id) on exit."""
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "bookshop.toml").write_text(POLICY, encoding="utf-8")
    settings = migrated_settings(folder)
    with running_service(folder, database_url=settings.database_url, policy_dir=folder) as url:
        with httpx.Client(base_url=url, timeout=30) as http:

            def post(model: str, body: dict[str, Any]) -> dict[str, Any]:
                response = http.post(f"/v1/models/{model}/snapshots", json=body)
                assert response.status_code == 201, response.text
                return response.json()  # type: ignore[no-any-return]

            verdicts = load(post, at=datetime.now(UTC) - timedelta(hours=3))
        yield LiveService(url, verdicts, log=folder / "service.log")


# --- the demo scenario in a file ------------------------------------------------------------

#: End of the demo scenario the on-call tests load (12 hours of it, seeded).
DEMO_END = datetime(2026, 12, 1, 12, 0, tzinfo=UTC)


@dataclass
class DemoData:
    """The demo loaded into a SQLite file: each post's note and verdict, keyed by snapshot."""

    settings: Settings
    verdicts: dict[tuple[str, str], dict[str, Any]]
    notes: dict[tuple[str, str], str]
    now: datetime

    def keys(self, model: str, note: str) -> list[str]:
        return [k for (m, k), n in self.notes.items() if m == model and n == note]


def load_demo(folder: Path, *, hours: int = 12) -> DemoData:
    """Load *hours* of the demo (``service.demo``, the policies in ``config/policies``) into
    a fresh SQLite file through the API, the clock following the posts."""
    from service import demo

    folder.mkdir(parents=True, exist_ok=True)
    settings = Settings(
        database_url=f"sqlite:///{folder / 'demo.db'}",
        auth="open",
        policy_dir=ROOT / "config" / "policies",
    )
    db.upgrade(settings)
    clock = Clock(DEMO_END)
    verdicts: dict[tuple[str, str], dict[str, Any]] = {}
    notes: dict[tuple[str, str], str] = {}
    with TestClient(create_app(settings, clock=clock)) as http:
        for event in demo.scenario(DEMO_END, hours=hours):
            clock.now = event.at + timedelta(seconds=40)
            response = http.post(f"/v1/models/{event.model}/snapshots", json=event.body)
            assert response.status_code == 201, response.text
            event.settle(response.json())
            verdicts[(event.model, event.body["key"])] = response.json()
            notes[(event.model, event.body["key"])] = event.note
    return DemoData(settings, verdicts, notes, DEMO_END + timedelta(minutes=5))
