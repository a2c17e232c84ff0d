"""Benchmark of history reads and of a post's cost as the stored history grows, in one run.

Run: ``python bench/history.py`` (or ``--sizes 1000,10000`` for a shorter run).

A fresh SQLite database gets one model, ``bench-shelf``, with a small paired policy (PSI with a
learned limit, KS, paired AUC by DeLong with a segment column and Holm, paired mean change).
The first verdicts are real posts over HTTP; the database is then filled in bulk to each size
by copying those verdicts' stored rows (snapshot, verdict with its findings, promotion, the
gate's audit entry, and the compact per-check values) under new keys, as if the model had been
posting for months. At each size the real service (``tidegate serve`` in a subprocess, one
worker, keep-alive HTTP client) answers, each timed from the client:

- ``GET /healthz`` (the reference every other time is divided by);
- a tiny post (50 rows) and a 2,000-row post: p50 and the ratio to the same post at the first
  size (target: within 1.2 from 10 to 100,000 verdicts) and to ``/healthz``;
- ``GET /v1/models/{m}/verdicts`` first page and a deep page (cursor near the oldest verdict),
  ``GET /v1/models``, ``GET /v1/verdicts/{id}`` (random ids), the model page
  ``/ui/models/{m}``: p50 and p99 (target: p99 <= 20 ms at 100,000 verdicts).

Timings are wall-clock on a machine shared with other work: the load average is printed at the
start and end of each size, and ratios are taken within the run. Nothing is asserted.
"""

from __future__ import annotations

import argparse
import json
import os
import random
import statistics
import sys
import tempfile
import time
from collections.abc import Callable
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import httpx
import numpy as np
from sqlalchemy import create_engine, func, insert, inspect, select

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from service.settings import Settings  # noqa: E402
from service.store import db as store_db  # noqa: E402
from service.store.tables import (  # noqa: E402
    AuditRow,
    ModelRow,
    PromotionRow,
    SnapshotRow,
    VerdictRow,
)
from tests.serverproc import Server  # noqa: E402

MODEL = "bench-shelf"
OTHER_MODELS = ("bench-also", "bench-search")

POLICY = """
models = ["bench-*"]
description = "history benchmark: paired shelf checks"
first_snapshot = "promote-if-healthy"
on_inconclusive = "promote"

[sample]
min_rows = 20

[[checks]]
name = "score-psi"
kind = "drift"
statistic = "psi"
bins = 10
max = 0.25
[checks.adaptive]
method = "robust-z"
transform = "log"
window = 50
min_history = 20
min_limit = 0.02
max_limit = 0.25

[[checks]]
name = "score-ks"
kind = "drift"
statistic = "ks"
max = 0.3

[[checks]]
name = "auc-vs-baseline"
kind = "quality"
metric = "auc"
rule = "non-inferiority"
margin = 0.2
confidence = 0.95
segments = ["reader_tenure"]
min_segment_rows = 10
correction = "holm"

[[checks]]
name = "score-change"
kind = "paired"
statistic = "mean_abs_change"
max = 0.5
"""

START = datetime(2026, 6, 1, tzinfo=UTC)


def shelf_body(key: str, step: int, rows: int, seed: int) -> dict[str, Any]:
    """A post of the demo bookshop's home shelf: scores, labels, the baseline's scores on the
    same rows and the reader's tenure (invented, seeded)."""
    rng = np.random.default_rng(seed)
    appeal = rng.normal(size=rows)
    label = rng.random(rows) < 1 / (1 + np.exp(-(appeal - 1.0)))
    shared = 0.8 * rng.normal(size=rows)
    cand = 1 / (1 + np.exp(-(appeal - 1.0 + shared + 0.3 * rng.normal(size=rows))))
    base = 1 / (1 + np.exp(-(appeal - 1.0 + shared + 0.3 * rng.normal(size=rows))))
    return {
        "key": key,
        "trained_until": (START + timedelta(minutes=step)).isoformat(),
        "rows_trained": 1_000_000 + step,
        "metrics": {"auc": 0.78},
        "sample": {
            "score": [round(float(x), 6) for x in cand],
            "label": [int(x) for x in label],
            "baseline_score": [round(float(x), 6) for x in base],
            "segment.reader_tenure": ["new" if x < 0.3 else "returning" for x in rng.random(rows)],
        },
    }


class Bench:
    def __init__(self, folder: Path) -> None:
        self.url = f"sqlite:///{folder / 'history.db'}"
        store_db.upgrade(Settings(database_url=self.url))
        self.engine = create_engine(self.url)
        policies = folder / "bench-policies"
        policies.mkdir()
        (policies / "bench.toml").write_text(POLICY, "utf-8")
        self.server = Server(
            self.url,
            folder,
            env={"TIDEGATE_AUTH": "open", "TIDEGATE_POLICY_DIR": str(policies)},
        )
        self.step = 0
        self.templates: list[dict[str, Any]] = []
        self.client: httpx.Client | None = None

    def start(self) -> None:
        self.server.start(timeout=180)
        self.client = httpx.Client(base_url=self.server.url, timeout=120)

    def stop(self) -> None:
        if self.client is not None:
            self.client.close()
        self.server.stop()

    def post(self, model: str, rows: int) -> float:
        assert self.client is not None
        self.step += 1
        body = shelf_body(f"s{self.step:07d}", self.step, rows, seed=self.step)
        data = json.dumps(body).encode()
        start = time.perf_counter()
        answer = self.client.post(
            f"/v1/models/{model}/snapshots",
            content=data,
            headers={"content-type": "application/json"},
        )
        took = time.perf_counter() - start
        if answer.status_code != 201:
            raise SystemExit(f"post failed: {answer.status_code} {answer.text[:300]}")
        return took

    def get(self, path: str) -> float:
        assert self.client is not None
        start = time.perf_counter()
        answer = self.client.get(path)
        took = time.perf_counter() - start
        if answer.status_code != 200:
            raise SystemExit(f"GET {path}: {answer.status_code} {answer.text[:300]}")
        return took

    def count(self) -> int:
        with self.engine.connect() as conn:
            return int(conn.scalar(select(func.count(VerdictRow.id))) or 0)

    def keep_templates(self) -> None:
        """The stored rows of the real verdicts so far, to copy in bulk."""
        with self.engine.connect() as conn:
            model_id = conn.scalar(select(ModelRow.id).where(ModelRow.name == MODEL))
            rows = conn.execute(
                select(VerdictRow, SnapshotRow)
                .join(SnapshotRow, SnapshotRow.id == VerdictRow.snapshot_id)
                .where(VerdictRow.model_id == model_id)
                .order_by(VerdictRow.id)
            ).all()
        self.templates = [dict(r._mapping) for r in rows]

    def bulk_fill(self, target: int) -> float:
        """Copy the template verdicts under new keys until the database holds *target*."""
        started = time.perf_counter()
        need = target - self.count()
        if need <= 0:
            return 0.0
        compact = "finding_values" in inspect(self.engine).get_table_names()
        if compact:
            from service.store import history_values
            from service.store.tables import FindingValueRow
        with self.engine.begin() as conn:
            model_id = conn.scalar(select(ModelRow.id).where(ModelRow.name == MODEL))
            snap_id = int(conn.scalar(select(func.max(SnapshotRow.id))) or 0)
            verdict_id = int(conn.scalar(select(func.max(VerdictRow.id))) or 0)
            now = datetime.now(UTC)
            batch = 5000
            for first in range(0, need, batch):
                snaps, verdicts, promos, audits, values = [], [], [], [], []
                for i in range(first, min(need, first + batch)):
                    t = self.templates[i % len(self.templates)]
                    snap_id += 1
                    verdict_id += 1
                    at = now - timedelta(microseconds=need - i)
                    snaps.append(
                        {
                            "id": snap_id,
                            "model_id": model_id,
                            "key": f"bulk-{snap_id:08d}",
                            "parent_key": None,
                            "trained_until": t["trained_until"],
                            "code_version": None,
                            "rows_trained": t["rows_trained"],
                            "metrics": t["metrics"],
                            "tags": {},
                            "content_digest": f"sha256:bulk{snap_id}",
                            "sample_rows": t["sample_rows"],
                            "summary": t["summary"],
                            "sample_pruned_at": at,
                            "created_at": at,
                        }
                    )
                    verdicts.append(
                        {
                            "id": verdict_id,
                            "model_id": model_id,
                            "snapshot_id": snap_id,
                            "baseline_id": None,
                            "reference_id": None,
                            "decision": t["decision"],
                            "reasons": t["reasons"],
                            "findings": t["findings"],
                            "policy_name": t["policy_name"],
                            "policy_digest": t["policy_digest"],
                            "error": None,
                            "moved_baseline": t["decision"] == "promote",
                            "duration_ms": t["duration_ms"],
                            "created_at": at,
                        }
                    )
                    if t["decision"] == "promote":
                        promos.append(
                            {
                                "model_id": model_id,
                                "snapshot_id": snap_id,
                                "previous_id": None,
                                "cause": "verdict",
                                "verdict_id": verdict_id,
                                "actor": "gate",
                                "reason": "promoted by verdict",
                                "created_at": at,
                            }
                        )
                        audits.append(
                            {
                                "at": at,
                                "actor": "gate",
                                "action": "baseline.verdict",
                                "model": MODEL,
                                "target": f"bulk-{snap_id:08d}",
                                "before": None,
                                "after": {"verdict_id": verdict_id},
                                "reason": "promoted by verdict",
                            }
                        )
                    if compact:
                        values.extend(
                            history_values.rows_for(
                                verdict_id=verdict_id,
                                model_id=model_id,
                                findings=t["findings"],
                            )
                        )
                conn.execute(insert(SnapshotRow), snaps)
                conn.execute(insert(VerdictRow), verdicts)
                if promos:
                    conn.execute(insert(PromotionRow), promos)
                    conn.execute(insert(AuditRow), audits)
                if values:
                    conn.execute(insert(FindingValueRow), values)
        return time.perf_counter() - started


def pct(values: list[float], q: float) -> float:
    return float(np.percentile(np.asarray(values), q))


def timed(fn: Callable[[], float], n: int) -> list[float]:
    fn()  # warm
    return [fn() for _ in range(n)]


def measure(bench: Bench, reads: int, posts: int) -> dict[str, list[float]]:
    assert bench.client is not None
    with bench.engine.connect() as conn:
        model_id = conn.scalar(select(ModelRow.id).where(ModelRow.name == MODEL))
        ids = conn.scalars(
            select(VerdictRow.id).where(VerdictRow.model_id == model_id).order_by(VerdictRow.id)
        ).all()
    deep = bench.client.get(f"/v1/models/{MODEL}/verdicts").json()
    # A cursor near the oldest verdict: the page a person reaches after paging far back.
    from service.store.repo import encode_cursor

    deep_cursor = encode_cursor(ids[max(0, len(ids) // 20)])
    rng = random.Random(len(ids))
    assert deep["data"]
    out: dict[str, list[float]] = {}
    out["GET /healthz"] = timed(lambda: bench.get("/healthz"), reads)
    out["GET verdicts, first page"] = timed(
        lambda: bench.get(f"/v1/models/{MODEL}/verdicts"), reads
    )
    out["GET verdicts, deep page"] = timed(
        lambda: bench.get(f"/v1/models/{MODEL}/verdicts?cursor={deep_cursor}"), reads
    )
    out["GET /v1/models"] = timed(lambda: bench.get("/v1/models"), reads)
    out["GET /v1/verdicts/{id}"] = timed(
        lambda: bench.get(f"/v1/verdicts/{rng.choice(ids)}"), reads
    )
    out["GET /ui/models/{m}"] = timed(lambda: bench.get(f"/ui/models/{MODEL}"), reads)
    out["POST 50 rows"] = timed(lambda: bench.post(MODEL, 50), posts)
    out["POST 2,000 rows"] = timed(lambda: bench.post(MODEL, 2000), posts)
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=(__doc__ or "").split("\n\n")[0])
    parser.add_argument("--sizes", default="10,1000,10000,100000")
    parser.add_argument("--reads", type=int, default=200, help="Requests per read per size.")
    parser.add_argument("--posts", type=int, default=30, help="Posts of each size per size.")
    args = parser.parse_args()
    sizes = [int(s) for s in args.sizes.split(",")]
    print(
        f"tidegate history benchmark: SQLite, {os.cpu_count()} CPUs, load average "
        f"{os.getloadavg()[0]:.2f} at start"
    )
    results: dict[int, dict[str, list[float]]] = {}
    counts: dict[int, int] = {}
    with tempfile.TemporaryDirectory(prefix="tg-history-") as tmp:
        bench = Bench(Path(tmp))
        bench.start()
        try:
            for other in OTHER_MODELS:
                for _ in range(3):
                    bench.post(other, 200)
            while bench.count() < min(sizes[0], 30) + len(OTHER_MODELS) * 3:
                bench.post(MODEL, 500)
            bench.keep_templates()
            for size in sizes:
                took = bench.bulk_fill(size)
                held = bench.count()
                load = os.getloadavg()[0]
                counts[size] = held
                results[size] = measure(bench, args.reads, args.posts)
                print(
                    f"  {held:,} verdicts stored (bulk fill {took:.1f} s); load average "
                    f"{load:.2f} before, {os.getloadavg()[0]:.2f} after",
                    flush=True,
                )
        finally:
            bench.stop()
    first = sizes[0]
    width = max(len(name) for name in results[first])
    print()
    print("p50 / p99 in ms at each number of stored verdicts")
    print(" " * width + "".join(f"{counts[s]:>20,}" for s in sizes))
    for name in results[first]:
        cells = "".join(
            f"{pct(results[s][name], 50) * 1000:>10.1f} /{pct(results[s][name], 99) * 1000:>7.1f}"
            for s in sizes
        )
        print(f"{name:<{width}}{cells}")
    print()
    print("ratios within the run (p50)")

    def healthz(size: int) -> float:
        return statistics.median(results[size]["GET /healthz"])

    for name in ("POST 50 rows", "POST 2,000 rows"):
        base = statistics.median(results[first][name])
        grow = "  ".join(
            f"{counts[size]:,}: {statistics.median(results[size][name]) / base:.2f}"
            for size in sizes
        )
        print(f"{name} / same post at {counts[first]:,} verdicts: {grow}")
        health = "  ".join(
            f"{counts[size]:,}: {statistics.median(results[size][name]) / healthz(size):.1f}"
            for size in sizes
        )
        print(f"{name} / GET /healthz: {health}")
    last = sizes[-1]
    worst = max(
        (pct(results[last][name], 99), name)
        for name in results[last]
        if name.startswith("GET") and name != "GET /healthz"
    )
    print(
        f"slowest read at {counts[last]:,} verdicts: {worst[1]} p99 {worst[0] * 1000:.1f} ms "
        "(target <= 20 ms)"
    )
    print(f"load average {os.getloadavg()[0]:.2f} at end")


if __name__ == "__main__":
    main()
