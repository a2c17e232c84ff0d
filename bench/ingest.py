"""Benchmark of one snapshot post over HTTP against the evaluation alone, in one run.

Run: ``python bench/ingest.py`` (about 5-10 minutes on a quiet 2-core machine). Options:
``--sizes 10000,100000`` ``--encodings json,arrow,parquet`` ``--compressions none,gzip,zstd``
``--source PATH`` (serve another checkout of tidegate, e.g. an earlier commit, to compare).

The service runs in a subprocess (``tidegate serve``, one worker, SQLite) under the paired
policy of bench/stats.py (health, paired AUC with two segment columns, log loss, paired change,
PSI, KS). Each post carries the five columns of the invented bookshop sample (score, label,
baseline_score, segment.reader_tenure, segment.device) against a stored baseline of the same
size. For each size, encoding (JSON, Arrow IPC stream, Parquet) and compression (none, gzip,
zstd) it prints:

- ``http ms``: median wall time of the post, client side, from the first byte sent to the
  verdict read (the body is built before);
- ``eval ms``: the same evaluation in this process (``service.gate.evaluate.evaluate`` on the
  same columns against a baseline of the same columns), best of a few;
- ``http/eval``: their ratio (target: at most 1.5 at 100k rows over Arrow);
- ``peak/raw``: the server's peak resident memory during the post above its resident memory
  before it, divided by the raw column bytes (8 bytes per value; target: at most 4 for 2M rows
  of 5 columns), for sizes of 1M rows and more (Linux ``/proc``: VmHWM reset by clear_refs);
- during the largest post of each size from 1M rows on: ``/healthz`` latency p50 / p99 / max
  (target p99 at most 100 ms), polled every 20 ms, and the slowest ``GET /v1/models``.

Timings are wall clock on a shared machine; the load average is printed before and after.
Nothing is asserted.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import threading
import time
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import httpx
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from bench.posting import (  # noqa: E402
    COMPRESSIONS,
    ENCODINGS,
    POLICY,
    Server,
    encode,
    load_average,
    meta,
    raw_bytes,
    shelf_columns,
    sqlite_database,
)
from service.gate.evaluate import evaluate  # noqa: E402
from service.gate.policy import parse_policy  # noqa: E402
from service.gate.types import GateInput, Sample, Snapshot  # noqa: E402

BIG = 1_000_000


def evaluation_ms(columns: dict[str, np.ndarray], repeats: int) -> float:
    policy = parse_policy(POLICY, name="bench")
    now = datetime(2026, 12, 2, tzinfo=UTC)
    best = float("inf")
    for _ in range(repeats):
        cand = Sample({k: v.copy() for k, v in columns.items()})
        base = Sample({k: v.copy() for k, v in columns.items()})
        inp = GateInput(
            candidate=Snapshot(model="shelf-ranker", key="c", sample=cand),
            baseline=Snapshot(model="shelf-ranker", key="b", sample=base),
            now=now,
        )
        start = time.perf_counter()
        evaluate(inp, policy)
        best = min(best, time.perf_counter() - start)
    return best * 1000.0


class Poller:
    """GET /healthz every 20 ms (and /v1/models every 500 ms) while a post runs."""

    def __init__(self, url: str) -> None:
        self.url = url
        self.health: list[float] = []
        self.pages: list[float] = []
        self.failures = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _run(self) -> None:
        with httpx.Client(timeout=60.0) as client:
            last_page = 0.0
            while not self._stop.is_set():
                start = time.perf_counter()
                try:
                    client.get(f"{self.url}/healthz").raise_for_status()
                    self.health.append(time.perf_counter() - start)
                except httpx.HTTPError:
                    self.failures += 1
                if start - last_page > 0.5:
                    last_page = start
                    t0 = time.perf_counter()
                    try:
                        client.get(f"{self.url}/v1/models").raise_for_status()
                        self.pages.append(time.perf_counter() - t0)
                    except httpx.HTTPError:
                        self.failures += 1
                self._stop.wait(0.02)

    def __enter__(self) -> Poller:
        self._thread.start()
        return self

    def __exit__(self, *exc: Any) -> None:
        self._stop.set()
        self._thread.join()

    def summary(self) -> str:
        if not self.health:
            return "no /healthz answer"
        ms = np.array(self.health) * 1000.0
        page = max(self.pages) * 1000.0 if self.pages else float("nan")
        return (
            f"/healthz p50 {np.percentile(ms, 50):.1f} ms, p99 {np.percentile(ms, 99):.1f} ms, "
            f"max {ms.max():.1f} ms ({ms.size} polls, {self.failures} failures); "
            f"slowest GET /v1/models {page:.0f} ms ({len(self.pages)} loads)"
        )


def combos(n: int, encodings: list[str], compressions: list[str]) -> list[tuple[str, str]]:
    """Every pair up to 100k rows; from 1M rows the uncompressed ones and Arrow+zstd."""
    out = []
    for enc in encodings:
        for comp in compressions:
            if n < BIG or comp == "none" or (enc == "arrow" and comp == "zstd"):
                out.append((enc, comp))
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--sizes", default="10000,100000,1000000,2000000")
    parser.add_argument("--encodings", default=",".join(ENCODINGS))
    parser.add_argument("--compressions", default=",".join(COMPRESSIONS))
    parser.add_argument("--source", type=Path, default=Path(__file__).resolve().parent.parent)
    args = parser.parse_args()
    sizes = [int(s) for s in args.sizes.split(",")]
    encodings = args.encodings.split(",")
    compressions = args.compressions.split(",")
    print(f"load average before: {load_average()}")
    print(f"serving: {args.source}")
    folder = Path(__import__("tempfile").mkdtemp(prefix="tidegate-ingest-"))
    rows: list[str] = []
    with Server(sqlite_database(folder), source=args.source) as server:
        client = httpx.Client(base_url=server.url, timeout=600.0)
        step = 0
        for n in sizes:
            columns = shelf_columns(n, seed=n % 1000 + 1)
            raw = raw_bytes(columns)
            eval_ms = evaluation_ms(columns, repeats=5 if n <= 100_000 else 2)
            # the baseline: the first post of this size's model promotes
            model = f"shelf-{n}"
            base_body, base_headers = encode(meta("base", step), columns, "json", "none")
            r = client.post(
                f"/v1/models/{model}/snapshots", content=base_body, headers=base_headers
            )
            if r.status_code != 201:
                raise SystemExit(f"baseline post failed: {r.status_code} {r.text[:300]}")
            del base_body
            repeats = 5 if n <= 10_000 else 3 if n <= 100_000 else 1
            for enc, comp in combos(n, encodings, compressions):
                times: list[float] = []
                peak_ratio = float("nan")
                poll_text = ""
                status = 0
                for rep in range(repeats):
                    step += 1
                    body, headers = encode(meta(f"{enc}-{comp}-{rep}", step), columns, enc, comp)
                    big = n >= BIG
                    before = server.rss() if big else 0
                    if big:
                        server.reset_peak()
                    poller = Poller(server.url) if big else None
                    if poller is not None:
                        poller.__enter__()
                    start = time.perf_counter()
                    r = client.post(f"/v1/models/{model}/snapshots", content=body, headers=headers)
                    elapsed = time.perf_counter() - start
                    if poller is not None:
                        poller.__exit__()
                        poll_text = poller.summary()
                    status = r.status_code
                    if status != 201:
                        break
                    times.append(elapsed)
                    if big:
                        peak_ratio = (server.peak() - before) / raw
                    body_mb = len(body) / 1e6
                    del body
                if status != 201:
                    code = r.json().get("error", {}).get("code") if r.content else ""
                    line = f"{n:>9,} {enc:>8} {comp:>5}   not accepted: {status} {code}"
                    rows.append(line)
                    print(line, flush=True)
                    continue
                http_ms = statistics.median(times) * 1000.0
                line = (
                    f"{n:>9,} {enc:>8} {comp:>5} {body_mb:>9.1f} {http_ms:>9.0f} {eval_ms:>8.0f}"
                    f" {http_ms / eval_ms:>9.2f} {peak_ratio:>8.2f}"
                )
                rows.append(line)
                print(line, flush=True)
                if poll_text:
                    print(f"{'':>26}during this post: {poll_text}", flush=True)
                    rows.append(f"{'':>26}during this post: {poll_text}")
        client.close()
    print()
    print(
        f"{'rows':>9} {'encoding':>8} {'comp':>5} {'body MB':>9} {'http ms':>9} "
        f"{'eval ms':>8} {'http/eval':>9} {'peak/raw':>8}"
    )
    for line in rows:
        print(line)
    print(f"load average after: {load_average()}")


if __name__ == "__main__":
    main()
