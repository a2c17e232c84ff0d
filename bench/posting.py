"""Shared parts of the post benchmarks (bench/ingest.py, bench/throughput.py): the service in a
subprocess on a fresh database, the invented bookshop sample, and its encodings.

Not a benchmark itself. Everything runs on 127.0.0.1 only.
"""

from __future__ import annotations

import gzip
import io
import json
import os
import signal
import socket
import subprocess
import sys
import tempfile
import time
import uuid
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import zstandard

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

#: The paired evaluation of bench/stats.py (health, paired AUC with two segment columns and
#: Holm, log loss, paired change, PSI and KS drift), for every model.
POLICY = """
models = ["*"]
[sample]
min_rows = 1000

[[checks]]
name = "auc-vs-baseline"
kind = "quality"
metric = "auc"
rule = "non-inferiority"
margin = 0.002
confidence = 0.99
max_gain = 0.03
segments = ["reader_tenure", "device"]
min_segment_rows = 1000

[[checks]]
name = "logloss-vs-baseline"
kind = "quality"
metric = "logloss"
rule = "non-inferiority"
margin = 0.001
confidence = 0.99

[[checks]]
name = "score-change"
kind = "paired"
statistic = "mean_abs_change"
max = 0.05

[[checks]]
name = "score-psi"
kind = "drift"
statistic = "psi"
max = 0.1
alpha = 0.001

[[checks]]
name = "score-ks"
kind = "drift"
statistic = "ks"
max = 0.05
"""

ENCODINGS = ("json", "arrow", "parquet")
COMPRESSIONS = ("none", "gzip", "zstd")
ARROW_STREAM = "application/vnd.apache.arrow.stream"
PARQUET = "application/vnd.apache.parquet"


def load_average() -> str:
    one, five, fifteen = os.getloadavg()
    return f"{one:.2f} {five:.2f} {fifteen:.2f} (1/5/15 min, {os.cpu_count()} cores)"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def shelf_columns(n: int, seed: int) -> dict[str, np.ndarray]:
    """Invented home-shelf clicks of the demo bookshop (as bench/stats.py): five columns."""
    rng = np.random.default_rng(seed)
    appeal = rng.normal(size=n)
    label = (rng.random(n) < 1 / (1 + np.exp(-(appeal - 1.5)))).astype(np.float64)
    shared = 0.8 * rng.normal(size=n)
    cand = 1 / (1 + np.exp(-(appeal - 1.5 + shared + 0.3 * rng.normal(size=n))))
    base = 1 / (1 + np.exp(-(appeal - 1.5 + shared + 0.3 * rng.normal(size=n))))
    tenure = np.where(rng.random(n) < 0.3, "new", "returning").astype(object)
    device = np.where(rng.random(n) < 0.6, "app", "web").astype(object)
    return {
        "score": np.round(cand, 6),
        "label": label,
        "baseline_score": np.round(base, 6),
        "segment.reader_tenure": tenure,
        "segment.device": device,
    }


def raw_bytes(columns: dict[str, np.ndarray]) -> int:
    """The raw column bytes: 8 bytes per value of every column (float64, or a pointer/code)."""
    return sum(8 * len(v) for v in columns.values())


def meta(key: str, step: int) -> dict[str, Any]:
    minute = 15 * (step + 1)
    return {
        "key": key,
        "trained_until": f"2026-12-{1 + minute // 1440:02d}T{minute // 60 % 24:02d}:"
        f"{minute % 60:02d}:00Z",
        "metrics": {"auc": 0.78},
        "rows_trained": 1_840_000,
    }


def arrow_table(columns: dict[str, np.ndarray]) -> pa.Table:
    arrays: dict[str, Any] = {}
    for name, values in columns.items():
        if values.dtype == object:
            uniques, codes = np.unique(values.astype(str), return_inverse=True)
            arrays[name] = pa.DictionaryArray.from_arrays(
                pa.array(codes.astype(np.int32)), pa.array(uniques.tolist())
            )
        else:
            arrays[name] = pa.array(values)
    return pa.table(arrays)


def arrow_stream(columns: dict[str, np.ndarray]) -> bytes:
    table = arrow_table(columns)
    sink = io.BytesIO()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue()


def parquet_file(columns: dict[str, np.ndarray]) -> bytes:
    sink = io.BytesIO()
    pq.write_table(arrow_table(columns), sink)
    return sink.getvalue()


def multipart(fields: dict[str, Any], sample: bytes, media_type: str) -> tuple[bytes, str]:
    boundary = uuid.uuid4().hex
    head = (
        f"--{boundary}\r\n"
        'Content-Disposition: form-data; name="snapshot"\r\n'
        "Content-Type: application/json\r\n\r\n"
        f"{json.dumps(fields)}\r\n"
        f"--{boundary}\r\n"
        'Content-Disposition: form-data; name="sample"; filename="sample"\r\n'
        f"Content-Type: {media_type}\r\n\r\n"
    ).encode()
    tail = f"\r\n--{boundary}--\r\n".encode()
    return head + sample + tail, f"multipart/form-data; boundary={boundary}"


def encode(
    fields: dict[str, Any], columns: dict[str, np.ndarray], encoding: str, compression: str
) -> tuple[bytes, dict[str, str]]:
    """The body and headers of one post."""
    if encoding == "json":
        sample = {name: values.tolist() for name, values in columns.items()}
        body = json.dumps({**fields, "sample": sample}).encode()
        content_type = "application/json"
    elif encoding == "arrow":
        body, content_type = multipart(fields, arrow_stream(columns), ARROW_STREAM)
    else:
        body, content_type = multipart(fields, parquet_file(columns), PARQUET)
    headers = {"content-type": content_type}
    if compression == "gzip":
        body = gzip.compress(body, 6)
        headers["content-encoding"] = "gzip"
    elif compression == "zstd":
        body = zstandard.ZstdCompressor(level=3).compress(body)
        headers["content-encoding"] = "zstd"
    return body, headers


@dataclass
class Database:
    url: str
    drop: Any = None


def sqlite_database(folder: Path) -> Database:
    return Database(f"sqlite:///{folder / 'bench.db'}")


def postgres_database(base_url: str) -> Database:
    from sqlalchemy import create_engine, text
    from sqlalchemy.engine import make_url

    name = "tidegate_bench_" + uuid.uuid4().hex[:10]
    admin = create_engine(base_url, isolation_level="AUTOCOMMIT")
    with admin.connect() as conn:
        conn.execute(text(f'CREATE DATABASE "{name}"'))

    def drop() -> None:
        with admin.connect() as conn:
            conn.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()

    url = make_url(base_url).set(database=name).render_as_string(hide_password=False)
    return Database(url, drop)


class Server:
    """``tidegate serve`` (open mode) in a subprocess, from *source* (a checkout of the
    project; this one by default, another to measure an earlier version)."""

    def __init__(
        self,
        database: Database,
        *,
        workers: int = 1,
        source: Path = ROOT,
        env: dict[str, str] | None = None,
    ) -> None:
        self.database = database
        self.workers = workers
        self.source = source
        self.folder = Path(tempfile.mkdtemp(prefix="tidegate-bench-"))
        (self.folder / "policies").mkdir()
        (self.folder / "policies" / "bench.toml").write_text(POLICY, "utf-8")
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.env = {
            **{k: v for k, v in os.environ.items() if not k.startswith("TIDEGATE_")},
            "TIDEGATE_DATABASE_URL": database.url,
            "TIDEGATE_POLICY_DIR": str(self.folder / "policies"),
            "TIDEGATE_AUTH": "open",
            "TIDEGATE_LOG_LEVEL": "WARNING",
            "TIDEGATE_MAX_BODY_BYTES": str(1 << 30),
            "TIDEGATE_MAX_ROWS": str(4_000_000),
            "PYTHONPATH": str(source),
            **(env or {}),
        }
        self.proc: subprocess.Popen[bytes] | None = None

    def start(self, timeout: float = 180.0) -> Server:
        cli = [sys.executable, "-m", "service.cli"]
        subprocess.run([*cli, "db", "upgrade"], cwd=self.source, env=self.env, check=True)
        log = (self.folder / "server.log").open("wb")
        self.proc = subprocess.Popen(
            [*cli, "serve", "--host", "127.0.0.1", "--port", str(self.port)]
            + ["--workers", str(self.workers)],
            cwd=self.source,
            env=self.env,
            stdout=log,
            stderr=subprocess.STDOUT,
            start_new_session=True,
        )
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError((self.folder / "server.log").read_text())
            try:
                if httpx.get(f"{self.url}/healthz", timeout=2.0).status_code == 200:
                    return self
            except httpx.HTTPError:
                pass
            time.sleep(0.2)
        self.stop()
        raise RuntimeError("the service did not start")

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            os.killpg(self.proc.pid, signal.SIGTERM)
            try:
                self.proc.wait(timeout=60)
            except subprocess.TimeoutExpired:
                os.killpg(self.proc.pid, signal.SIGKILL)
                self.proc.wait(timeout=60)
        if self.database.drop is not None:
            self.database.drop()
            self.database.drop = None

    # memory of the (single) server process
    def _status(self, field: str) -> int:
        assert self.proc is not None
        for line in Path(f"/proc/{self.proc.pid}/status").read_text().splitlines():
            if line.startswith(field + ":"):
                return int(line.split()[1]) * 1024
        raise RuntimeError(f"no {field} in /proc status")

    def rss(self) -> int:
        return self._status("VmRSS")

    def reset_peak(self) -> None:
        """Start a new peak-memory measurement (Linux: clear_refs 5 resets VmHWM)."""
        assert self.proc is not None
        Path(f"/proc/{self.proc.pid}/clear_refs").write_text("5")

    def peak(self) -> int:
        return self._status("VmHWM")

    def __enter__(self) -> Server:
        return self.start()

    def __exit__(self, *exc: Any) -> None:
        self.stop()
