"""Fresh installs (issue 11): the server with a plain ``pip install .`` (no extras) runs the
service and the CLI; the client distribution installed alone pulls httpx and numpy (no server
packages) and posts a pandas DataFrame to a live service. Each in a new virtual environment
(``python -m venv``), from copies of the local source folders. Slow: minutes on a busy machine.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import httpx
import pytest

from tests.client.live import Live, frame_columns, watermark
from tests.databases import TEST_POLICY_TEXT
from tests.serverproc import free_port

ROOT = Path(__file__).resolve().parents[2]
IGNORE = shutil.ignore_patterns("__pycache__", "*.egg-info", "build", "*.pyc")
#: What the server's packages are; none may come with the client.
SERVER_ONLY = {"fastapi", "sqlalchemy", "alembic", "scipy", "pandas", "uvicorn", "pyarrow"}

pytestmark = pytest.mark.slow


def venv(folder: Path) -> Path:
    subprocess.run([sys.executable, "-m", "venv", str(folder)], check=True, timeout=600)
    return folder / "bin"


def pip(bin_dir: Path, *args: str) -> None:
    run = subprocess.run(
        [str(bin_dir / "python"), "-m", "pip", "install", "--quiet", *args],
        capture_output=True,
        text=True,
        timeout=1800,
    )
    assert run.returncode == 0, run.stdout[-2000:] + run.stderr[-4000:]


def installed(bin_dir: Path) -> set[str]:
    out = subprocess.run(
        [str(bin_dir / "python"), "-m", "pip", "list", "--format=json"],
        capture_output=True,
        text=True,
        check=True,
        timeout=600,
    ).stdout
    return {p["name"].lower() for p in json.loads(out)} - {"pip", "setuptools", "wheel"}


def copy_sources(to: Path, *names: str) -> Path:
    to.mkdir()
    for name in names:
        source = ROOT / name
        if source.is_dir():
            shutil.copytree(source, to / name, ignore=IGNORE)
        else:
            shutil.copy2(source, to / name)
    return to


def test_a_plain_install_of_the_server_runs_the_service_and_the_cli(tmp_path: Path) -> None:
    src = copy_sources(
        tmp_path / "src", "pyproject.toml", "README.md", "service", "client", "migrations"
    )
    bin_dir = venv(tmp_path / "venv")
    pip(bin_dir, str(src))  # no extras
    packages = installed(bin_dir)
    print(f"\nserver install: {len(packages)} packages")
    work = tmp_path / "work"  # not the source tree: the installed package must be used
    (work / "policies").mkdir(parents=True)
    (work / "policies" / "test.toml").write_text(TEST_POLICY_TEXT)
    env = {
        **{k: v for k, v in os.environ.items() if not k.startswith("TIDEGATE_")},
        "TIDEGATE_DATABASE_URL": f"sqlite:///{work / 'gate.db'}",
        "TIDEGATE_POLICY_DIR": str(work / "policies"),
        "PYTHONPATH": "",
    }

    def tidegate(*argv: str, stdin: str | None = None) -> subprocess.CompletedProcess[str]:
        return subprocess.run(
            [str(bin_dir / "tidegate"), *argv],
            cwd=work,
            env=env,
            input=stdin,
            capture_output=True,
            text=True,
            timeout=600,
        )

    where = tidegate("policy", "check")
    assert where.returncode == 0, where.stderr
    assert tidegate("db", "upgrade").returncode == 0
    port = free_port()
    url = f"http://127.0.0.1:{port}"
    server = subprocess.Popen(
        [str(bin_dir / "tidegate"), "serve", "--open", "--port", str(port)],
        cwd=work,
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
        start_new_session=True,
    )
    try:
        deadline = time.monotonic() + 300.0  # a busy 2-core machine: generous
        while time.monotonic() < deadline:
            assert server.poll() is None, server.stderr.read().decode() if server.stderr else ""
            try:
                if httpx.get(f"{url}/readyz", timeout=2.0).status_code == 200:
                    break
            except httpx.HTTPError:
                pass
            time.sleep(0.2)
        env["TIDEGATE_URL"] = url
        post = {
            "key": "k1",
            "trained_until": watermark(1),
            "sample": {k: v.tolist() for k, v in frame_columns(31).items()},
        }
        submitted = tidegate("submit", "-", "--model", "shelf-ranker", stdin=json.dumps(post))
        assert submitted.returncode == 0, submitted.stderr
        for argv, expect in (
            (["serving", "shelf-ranker"], "k1\n"),
            (["wait", "shelf-ranker", "k1", "--timeout", "60"], "k1\n"),
        ):
            run = tidegate(*argv)
            assert (run.returncode, run.stdout) == (0, expect), run.stderr
        for argv in (
            ["why", "shelf-ranker"],
            ["history", "shelf-ranker"],
            ["models"],
            ["audit"],
            ["replay", "shelf-ranker"],
            ["--help"],
        ):
            run = tidegate(*argv)
            assert run.returncode == 0 and run.stderr == "", (argv, run.stderr)
    finally:
        server.terminate()
        server.wait(timeout=60)


def test_the_client_alone_installs_httpx_and_numpy_and_posts_a_dataframe(
    live: Live, tmp_path: Path
) -> None:
    src = copy_sources(tmp_path / "src", "client")
    bin_dir = venv(tmp_path / "venv")
    pip(bin_dir, str(src / "client"))
    plain = installed(bin_dir)
    print(f"\nclient install: {len(plain)} packages: {sorted(plain)}")
    assert {"tidegate-client", "httpx", "numpy"} <= plain and not plain & SERVER_ONLY
    pip(bin_dir, f"{src / 'client'}[pandas,polars]")
    script = f"""
import numpy as np, pandas as pd, polars as pl
from tidegate_client import Client
rng = np.random.default_rng(41)
base = rng.beta(2.0, 5.0, 400)
columns = {{"score": np.clip(base + rng.normal(0, 0.01, 400), 0, 1),
           "baseline_score": base, "label": (rng.random(400) < base).astype(int),
           "segment.device": np.where(rng.random(400) < 0.6, "app", "web")}}
with Client({live.url!r}, token={live.trainer!r}) as gate:
    v = gate.submit("shelf-ranker-venv", "v1", sample=pd.DataFrame(columns),
                    trained_until={watermark(1)!r})
    print(v.decision, v.serves_now, gate.serving("shelf-ranker-venv").snapshot)
    # polars, as JSON and as a compressed Arrow upload: the same post, so a retry (200)
    for upload in ("json", "arrow"):
        again = gate.submit("shelf-ranker-venv", "v1", sample=pl.DataFrame(columns),
                            trained_until={watermark(1)!r}, upload=upload)
        print(again.verdict_id == v.verdict_id, again.created)
"""
    run = subprocess.run(
        [str(bin_dir / "python"), "-c", script],
        cwd=tmp_path,  # not the repository: only the installed client is importable
        capture_output=True,
        text=True,
        timeout=600,
        env={**os.environ, "PYTHONPATH": ""},
    )
    assert run.returncode == 0, run.stderr
    assert run.stdout.split() == ["promote", "True", "v1", "True", "False", "True", "False"]
