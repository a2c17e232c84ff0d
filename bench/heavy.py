"""Does the service keep answering while it does the heaviest work it allows?

Run: ``python bench/heavy.py`` (options: ``--post-rows`` for the heavy post, default
``TIDEGATE_MAX_ROWS``' default of 2,000,000; ``--snapshots`` and ``--rows`` for the stored
history the replay goes over; ``--database-url``).

It starts ``tidegate serve`` (one worker) on a fresh database, stores ``--snapshots`` snapshots
of ``--rows`` rows, then asks ``/healthz`` and a page (``/ui/sign-in``) every 50 ms during four
phases: idle (the reference, same run), the largest replay the budget allows (two bootstrap
checks of 1,000 resamples, as many snapshots as fit ``TIDEGATE_REPLAY_MAX_WORK``), the heaviest
post (``--post-rows`` rows in JSON), and both at once. It prints per phase the p50 / p99 / max
latency of each probe and how long the work took, and the load average. Nothing is asserted:
the figures depend on the machine's other load.
"""

from __future__ import annotations

import argparse
import json
import os
import socket
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable
from datetime import UTC, datetime, timedelta
from pathlib import Path

import httpx
import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from service.budget import passes_per_row  # noqa: E402
from service.gate.policy import parse_policy  # noqa: E402
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

REPLAY_POLICY = 'models = ["*"]\n[sample]\nmin_rows = 20\n' + "".join(
    f"""
[[checks]]
name = "calibration-{i}"
kind = "quality"
metric = "calibration_ratio"
rule = "limit"
margin = 0.02
floor = 0.5
ceiling = 2.0
method = "bootstrap"
resamples = 1000
"""
    for i in (1, 2)
)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def body(key: str, step: int, rows: int) -> bytes:
    rng = np.random.default_rng(step)
    start = datetime(2026, 12, 1, tzinfo=UTC)
    score = np.round(rng.beta(2.0, 5.0, rows), 6)
    label = (rng.random(rows) < score).astype(int)
    return json.dumps(
        {
            "key": key,
            "trained_until": (start + timedelta(minutes=step)).isoformat(),
            "sample": {"score": score.tolist(), "label": label.tolist()},
        }
    ).encode()


def stats(values: list[float]) -> str:
    if not values:
        return "-"
    a = np.asarray(values) * 1000.0
    return (
        f"p50 {np.percentile(a, 50):6.0f} ms  p99 {np.percentile(a, 99):6.0f} ms  "
        f"max {a.max():6.0f} ms  (n={len(a)})"
    )


def probe(url: str, done: threading.Event) -> dict[str, list[float]]:
    out: dict[str, list[float]] = {"/healthz": [], "/ui/sign-in": []}

    def loop(path: str) -> None:
        with httpx.Client(base_url=url, timeout=120.0) as http:
            while not done.is_set():
                started = time.perf_counter()
                http.get(path)
                out[path].append(time.perf_counter() - started)
                time.sleep(0.05)

    threads = [threading.Thread(target=loop, args=(p,)) for p in out]
    for t in threads:
        t.start()
    out["_threads"] = threads  # type: ignore[assignment]
    return out


def phase(url: str, name: str, jobs: list[Callable[[], str]], idle_seconds: float = 5.0) -> None:
    done = threading.Event()
    seen = probe(url, done)
    results: list[str] = []
    started = time.perf_counter()
    if jobs:
        workers = [threading.Thread(target=lambda j=j: results.append(j())) for j in jobs]
        for w in workers:
            w.start()
        for w in workers:
            w.join()
    else:
        time.sleep(idle_seconds)
    wall = time.perf_counter() - started
    done.set()
    for t in seen.pop("_threads"):  # type: ignore[union-attr]
        t.join()  # type: ignore[union-attr]
    print(f"{name}: {wall:.1f} s  {'; '.join(results)}")
    for path, values in seen.items():
        print(f"  {path:<12} {stats(values)}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--post-rows", type=int, default=Settings().max_rows)
    parser.add_argument("--snapshots", type=int, default=8)
    parser.add_argument("--rows", type=int, default=50_000)
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
                role="admin",
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
        command = [sys.executable, "-m", "service.cli", "serve", "--port", str(port)]
        server = subprocess.Popen(
            command, cwd=ROOT, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL
        )
        base = f"http://127.0.0.1:{port}"
        headers = {"Authorization": f"Bearer {token}", "Content-Type": "application/json"}
        try:
            deadline = time.monotonic() + 300
            while time.monotonic() < deadline:
                try:
                    if httpx.get(f"{base}/readyz", timeout=2).status_code == 200:
                        break
                except httpx.HTTPError:
                    time.sleep(0.2)
            with httpx.Client(base_url=base, timeout=600.0, headers=headers) as http:
                for i in range(args.snapshots):
                    r = http.post("/v1/models/m/snapshots", content=body(f"s{i}", i, args.rows))
                    assert r.status_code == 201, r.text
            passes = passes_per_row(parse_policy(REPLAY_POLICY, name="bench"))
            per_snapshot = 2 * args.rows
            fit = max(1, min(args.snapshots, Settings().replay_max_work // (passes * per_snapshot)))
            heavy_post = body("heavy", 10_000, args.post_rows)
            print(f"load average at start: {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")
            print(
                f"replay: {fit} snapshots x ~{per_snapshot:,} rows x {passes} passes = "
                f"~{fit * per_snapshot * passes:,} row-passes; heavy post: {args.post_rows:,} "
                f"rows, {len(heavy_post) / 1e6:.0f} MB of JSON"
            )

            def replay() -> str:
                with httpx.Client(base_url=base, timeout=600.0, headers=headers) as http:
                    t = time.perf_counter()
                    r = http.post(
                        "/v1/models/m/replay", json={"policy": REPLAY_POLICY, "limit": fit}
                    )
                    return f"replay {r.status_code} in {time.perf_counter() - t:.1f} s"

            def post(key: str) -> Callable[[], str]:
                def run() -> str:
                    with httpx.Client(base_url=base, timeout=600.0, headers=headers) as http:
                        t = time.perf_counter()
                        content = heavy_post.replace(b'"heavy"', f'"{key}"'.encode(), 1)
                        r = http.post("/v1/models/h/snapshots", content=content)
                        return f"post {r.status_code} in {time.perf_counter() - t:.1f} s"

                return run

            phase(base, "idle (reference)", [])
            phase(base, "largest replay", [replay])
            phase(base, "heaviest post", [post("heavy-1")])
            phase(base, "both at once", [replay, post("heavy-2")])
            print(f"load average at end: {os.getloadavg()[0]:.2f}")
        finally:
            server.terminate()
            server.wait(timeout=120)


if __name__ == "__main__":
    main()
