"""Writers on one model of one SQLite server process: how many posts fail, how long they take.

Run: ``python bench/contention.py`` (defaults: 8 writers x 50 posts of 5,000 rows, one worker).
Options: ``--writers``, ``--posts``, ``--rows``, ``--database-url`` (e.g. a PostgreSQL URL).

It starts ``tidegate serve`` in a subprocess on a fresh database, posts from *writers* threads
at once to one model (each post a new snapshot; watermarks interleave), and meanwhile asks
``/healthz`` every 50 ms. It prints the answers by status, the post latency (p50, p99, max),
the ``/healthz`` latency (p50, p99, max), and the load average. Reference measured in the same
run: one writer posting the same number of posts alone (its p50 is the cost of one post without
waiting). Nothing is asserted; figures depend on the machine's other load.
"""

from __future__ import annotations

import argparse
import os
import socket
import subprocess
import sys
import tempfile
import threading
import time
from collections import Counter
from concurrent.futures import ThreadPoolExecutor
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import httpx
import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from service.settings import Settings  # noqa: E402
from service.store import db as store_db  # noqa: E402
from service.store import tokens  # noqa: E402

POLICY = """\
models = ["*"]
first_snapshot = "promote-if-healthy"
[sample]
min_rows = 20
[[checks]]
name = "score-psi"
kind = "drift"
statistic = "psi"
bins = 10
max = 0.25
"""


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def body(key: str, step: int, rows: int) -> dict[str, Any]:
    rng = np.random.default_rng(step)
    start = datetime(2026, 12, 1, tzinfo=UTC)
    return {
        "key": key,
        "trained_until": (start + timedelta(minutes=step)).isoformat(),
        "metrics": {"auc": 0.75},
        "sample": {
            "score": [round(float(v), 6) for v in rng.beta(2.0, 5.0, rows)],
            "label": [int(v) for v in rng.integers(0, 2, rows)],
        },
    }


def percentiles(values: list[float]) -> str:
    if not values:
        return "-"
    a = np.asarray(values) * 1000.0
    return (
        f"p50 {np.percentile(a, 50):.0f} ms, p99 {np.percentile(a, 99):.0f} ms, "
        f"max {a.max():.0f} ms (n={len(a)})"
    )


def run(url: str, token: str, *, writers: int, posts: int, rows: int, tag: str) -> None:
    bodies = [
        [body(f"{tag}w{w}-{i}", i * writers + w, rows) for i in range(posts)]
        for w in range(writers)
    ]
    statuses: Counter[int] = Counter()
    latencies: list[float] = []
    health: list[float] = []
    lock = threading.Lock()
    done = threading.Event()

    def writer(mine: list[dict[str, Any]]) -> None:
        with httpx.Client(
            base_url=url, timeout=600.0, headers={"Authorization": f"Bearer {token}"}
        ) as http:
            for b in mine:
                started = time.perf_counter()
                response = http.post("/v1/models/shelf-ranker/snapshots", json=b)
                took = time.perf_counter() - started
                with lock:
                    statuses[response.status_code] += 1
                    latencies.append(took)

    def prober() -> None:
        with httpx.Client(base_url=url, timeout=60.0) as http:
            while not done.is_set():
                started = time.perf_counter()
                http.get("/healthz")
                health.append(time.perf_counter() - started)
                time.sleep(0.05)

    probe = threading.Thread(target=prober)
    probe.start()
    started = time.perf_counter()
    with ThreadPoolExecutor(writers) as pool:
        list(pool.map(writer, bodies))
    wall = time.perf_counter() - started
    done.set()
    probe.join()
    print(f"{tag}: {writers} writers x {posts} posts of {rows} rows in {wall:.1f} s")
    print(f"  answers: {dict(sorted(statuses.items()))}")
    print(f"  failures (not 201): {sum(n for s, n in statuses.items() if s != 201)}")
    print(f"  post latency: {percentiles(latencies)}")
    print(f"  /healthz latency: {percentiles(health)}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--writers", type=int, default=8)
    parser.add_argument("--posts", type=int, default=50)
    parser.add_argument("--rows", type=int, default=5000)
    parser.add_argument("--database-url", default=None)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as folder:
        url = args.database_url or f"sqlite:///{folder}/bench.db"
        settings = Settings(database_url=url)
        store_db.upgrade(settings)
        engine = store_db.make_engine(settings)
        with store_db.transaction(store_db.make_sessionmaker(engine)) as session:
            token = tokens.create_token(
                session,
                role="trainer",
                models=("*",),
                label="bench",
                actor="bench",
                now=datetime.now(UTC),
            ).secret
        engine.dispose()
        (Path(folder) / "policies").mkdir()
        (Path(folder) / "policies" / "bench.toml").write_text(POLICY)
        port = free_port()
        env = {
            **{k: v for k, v in os.environ.items() if not k.startswith("TIDEGATE_")},
            "TIDEGATE_DATABASE_URL": url,
            "TIDEGATE_POLICY_DIR": f"{folder}/policies",
            "TIDEGATE_LOG_LEVEL": "WARNING",
        }
        server = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "service.cli",
                "serve",
                "--host",
                "127.0.0.1",
                "--port",
                str(port),
            ],
            cwd=ROOT,
            env=env,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        base = f"http://127.0.0.1:{port}"
        try:
            deadline = time.monotonic() + 300
            while time.monotonic() < deadline:
                try:
                    if httpx.get(f"{base}/readyz", timeout=2).status_code == 200:
                        break
                except httpx.HTTPError:
                    time.sleep(0.2)
            print(f"load average at start: {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")
            run(base, token, writers=1, posts=args.posts, rows=args.rows, tag="reference")
            run(
                base, token, writers=args.writers, posts=args.posts, rows=args.rows, tag="contended"
            )
            print(f"load average at end: {os.getloadavg()[0]:.2f}")
        finally:
            server.terminate()
            server.wait(timeout=60)


if __name__ == "__main__":
    main()
