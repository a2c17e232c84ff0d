"""Benchmark: verdicts per second of 10k-row posts over HTTP, against the evaluation rate in
process, in one run.

Run: ``python bench/throughput.py`` (a few minutes). Options: ``--rows 10000``
``--posts 30`` (per client) ``--encodings arrow,json`` ``--postgres URL`` (default: the
``TIDEGATE_TEST_POSTGRES_URL`` environment variable; without one PostgreSQL is left out)
``--source PATH`` (serve another checkout, e.g. an earlier commit).

Set-ups: SQLite with one worker process, SQLite with two, PostgreSQL with two; each with 1 and
4 clients posting at once, each client to its own model (a fleet), under the paired policy of
bench/stats.py. Each post is judged against its model's baseline (the previous post). It prints
verdicts/s and their ratio to the in-process rate of ``evaluate`` on the same rows in one
thread (target: at least 100 verdicts/s with 4 clients on SQLite on a 2-core machine), and the
load average before and after. Nothing is asserted.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import threading
import time
from datetime import UTC, datetime
from pathlib import Path

import httpx

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from bench.posting import (  # noqa: E402
    POLICY,
    Server,
    encode,
    load_average,
    meta,
    postgres_database,
    shelf_columns,
    sqlite_database,
)
from service.gate.evaluate import evaluate  # noqa: E402
from service.gate.policy import parse_policy  # noqa: E402
from service.gate.types import GateInput, Sample, Snapshot  # noqa: E402


def evaluation_rate(rows: int, seconds: float = 3.0) -> float:
    """Evaluations per second in this process, one thread, same policy and rows."""
    columns = shelf_columns(rows, seed=11)
    policy = parse_policy(POLICY, name="bench")
    now = datetime(2026, 12, 2, tzinfo=UTC)
    done = 0
    start = time.perf_counter()
    while time.perf_counter() - start < seconds:
        inp = GateInput(
            candidate=Snapshot(model="m", key="c", sample=Sample(dict(columns))),
            baseline=Snapshot(model="m", key="b", sample=Sample(dict(columns))),
            now=now,
        )
        evaluate(inp, policy)
        done += 1
    return done / (time.perf_counter() - start)


def run_clients(url: str, clients: int, posts: int, rows: int, encoding: str, tag: str) -> float:
    """Verdicts per second of *clients* threads each posting *posts* snapshots."""
    columns = shelf_columns(rows, seed=11)
    bodies = {
        c: [encode(meta(f"{tag}-{i}", i), columns, encoding, "none") for i in range(posts + 1)]
        for c in range(clients)
    }
    failures: list[str] = []

    def client(c: int, items: list[tuple[bytes, dict[str, str]]]) -> None:
        with httpx.Client(base_url=url, timeout=600.0) as http:
            for body, headers in items:
                r = http.post(f"/v1/models/{tag}-c{c}/snapshots", content=body, headers=headers)
                if r.status_code not in (200, 201):
                    failures.append(f"{r.status_code} {r.text[:200]}")

    # each model's first snapshot (its baseline), untimed
    warm = [threading.Thread(target=client, args=(c, bodies[c][:1])) for c in range(clients)]
    for t in warm:
        t.start()
    for t in warm:
        t.join()
    threads = [threading.Thread(target=client, args=(c, bodies[c][1:])) for c in range(clients)]
    start = time.perf_counter()
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    elapsed = time.perf_counter() - start
    if failures:
        raise SystemExit(f"{len(failures)} posts failed, e.g. {failures[0]}")
    return clients * posts / elapsed


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--rows", type=int, default=10_000)
    parser.add_argument("--posts", type=int, default=30, help="posts per client")
    parser.add_argument("--encodings", default="arrow,json")
    parser.add_argument("--postgres", default=os.environ.get("TIDEGATE_TEST_POSTGRES_URL", ""))
    parser.add_argument("--source", type=Path, default=Path(__file__).resolve().parent.parent)
    args = parser.parse_args()
    print(f"load average before: {load_average()}")
    print(f"serving: {args.source}")
    rate = evaluation_rate(args.rows)
    print(f"in-process evaluate of {args.rows:,} rows: {rate:.1f}/s (one thread)")
    setups: list[tuple[str, int]] = [("sqlite", 1), ("sqlite", 2)]
    if args.postgres:
        setups.append(("postgresql", 2))
    else:
        print("PostgreSQL left out: no --postgres URL and no TIDEGATE_TEST_POSTGRES_URL")
    lines = []
    for backend, workers in setups:
        folder = Path(tempfile.mkdtemp(prefix="tidegate-throughput-"))
        database = (
            sqlite_database(folder) if backend == "sqlite" else postgres_database(args.postgres)
        )
        with Server(database, workers=workers, source=args.source) as server:
            for encoding in args.encodings.split(","):
                for clients in (1, 4):
                    tag = f"{encoding}-{clients}"
                    per_s = run_clients(server.url, clients, args.posts, args.rows, encoding, tag)
                    line = (
                        f"{backend:>10} {workers:>7} {encoding:>8} {clients:>7} "
                        f"{per_s:>10.1f} {per_s / rate:>10.2f}"
                    )
                    lines.append(line)
                    print(line, flush=True)
    print()
    print(f"{args.rows:,}-row posts; in-process evaluate {rate:.1f}/s")
    print(
        f"{'database':>10} {'workers':>7} {'encoding':>8} {'clients':>7} {'verdicts/s':>10} "
        f"{'vs eval':>10}"
    )
    for line in lines:
        print(line)
    print(f"load average after: {load_average()}")


if __name__ == "__main__":
    main()
