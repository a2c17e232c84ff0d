"""The real service in a subprocess (``python -m service.cli serve``), for the crash, shutdown,
logging and multi-worker tests."""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import httpx

from tests.databases import TEST_POLICY_TEXT

ROOT = Path(__file__).resolve().parent.parent
#: How long a server may take to start, stop or exit, in seconds (readiness is polled; this is
#: only the limit, reached only when something is wrong).
START_TIMEOUT = float(os.environ.get("TIDEGATE_TEST_START_TIMEOUT", "300"))


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class Server:
    """``tidegate serve`` on 127.0.0.1, its standard error kept in a file."""

    def __init__(
        self,
        database_url: str,
        folder: Path,
        *,
        workers: int = 1,
        env: dict[str, str] | None = None,
    ) -> None:
        self.database_url = database_url
        self.folder = folder
        self.workers = workers
        self.extra_env = env or {}
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.proc: subprocess.Popen[bytes] | None = None
        self.starts = 0
        policies = folder / "policies"
        policies.mkdir(parents=True, exist_ok=True)
        (policies / "test.toml").write_text(TEST_POLICY_TEXT, "utf-8")
        self.policy_dir = policies

    @property
    def log_path(self) -> Path:
        return self.folder / f"server-{self.port}-{self.starts}.log"

    def start(self, timeout: float = START_TIMEOUT) -> Server:
        """Start the server and wait until it is ready (``/readyz`` answers 200: the database
        answers and is migrated), at most *timeout* seconds. Generous: on a loaded 2-core
        machine three workers importing numpy and scipy take a minute or more."""
        self.starts += 1
        env = {
            **{k: v for k, v in os.environ.items() if not k.startswith("TIDEGATE_")},
            "TIDEGATE_DATABASE_URL": self.database_url,
            "TIDEGATE_POLICY_DIR": str(self.policy_dir),
            "TIDEGATE_AUTH": "tokens",
            "TIDEGATE_LOG_LEVEL": "INFO",
            "PYTHONUNBUFFERED": "1",
            **self.extra_env,
        }
        args = [
            sys.executable,
            "-m",
            "service.cli",
            "serve",
            "--host",
            "127.0.0.1",
            "--port",
            str(self.port),
            "--workers",
            str(self.workers),
        ]
        log = self.log_path.open("wb")
        self.proc = subprocess.Popen(
            args, cwd=ROOT, env=env, stdout=log, stderr=subprocess.STDOUT, start_new_session=True
        )
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(f"server exited with {self.proc.returncode}:\n{self.log()}")
            try:
                if httpx.get(f"{self.url}/readyz", timeout=10.0).status_code == 200:
                    return self
            except httpx.HTTPError:
                pass
            time.sleep(0.2)
        self.kill()
        raise RuntimeError(f"server did not answer within {timeout} s:\n{self.log()}")

    def log(self) -> str:
        return self.log_path.read_text("utf-8", errors="replace")

    def signal(self, sig: int) -> None:
        """Send *sig* to the server (and, with several workers, to its whole process group,
        as a container runtime or a crash of the machine would)."""
        assert self.proc is not None
        if sig == signal.SIGKILL:
            os.killpg(self.proc.pid, sig)
        else:
            self.proc.send_signal(sig)

    def kill(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.signal(signal.SIGKILL)
            self.proc.wait(timeout=30)

    def wait(self, timeout: float = START_TIMEOUT) -> int:
        assert self.proc is not None
        return self.proc.wait(timeout=timeout)

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=START_TIMEOUT)
            except subprocess.TimeoutExpired:
                self.kill()

    def __enter__(self) -> Server:
        return self.start()

    def __exit__(self, *exc: Any) -> None:
        self.stop()
