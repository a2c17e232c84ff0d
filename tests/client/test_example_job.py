"""The example retraining job (examples/retraining_job.py) and its ten-line shell twin
(examples/retrain.sh) run end to end against the live service (issue 11)."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

from tests.client.live import Live
from tests.databases import make_token, settings_for
from tidegate_client import Client

ROOT = Path(__file__).resolve().parents[2]


def test_the_example_job_promotes_holds_a_broken_join_and_deploys_what_serves(
    live: Live, tmp_path: Path
) -> None:
    # a trainer token scoped to the job's model alone
    token = make_token(
        settings_for(live.database_url), "trainer", ("shelf-ranker-job",), label="job"
    ).secret
    state = tmp_path / "state"
    run = subprocess.run(
        [
            sys.executable,
            str(ROOT / "examples" / "retraining_job.py"),
            "--model",
            "shelf-ranker-job",
            "--steps",
            "4",
            "--break-step",
            "3",
            "--state",
            str(state),
        ],
        env={**os.environ, "TIDEGATE_URL": live.url, "TIDEGATE_TOKEN": token},
        capture_output=True,
        text=True,
        timeout=600,
        cwd=ROOT,
    )
    assert run.returncode == 0, run.stderr
    lines = run.stdout.splitlines()
    assert [line.split(":")[0] for line in lines] == [
        "step 1 2026-12-01T00",
        "step 2 2026-12-01T00",
        "step 3 2026-12-01T00",
        "step 4 2026-12-01T01",
    ]
    assert "promote; deployed 2026-12-01T00:15Z" in lines[0]
    assert "promote; deployed 2026-12-01T00:30Z" in lines[1]
    # the broken join moved every score: held, and the deploy step kept the serving snapshot
    assert "hold (score PSI" in lines[2] and "still serving 2026-12-01T00:30Z" in lines[2]
    assert "promote; deployed 2026-12-01T01:00Z" in lines[3]
    deployed = (state / "deployed.log").read_text().split()
    assert deployed == [
        "2026-12-01T00:15Z",
        "2026-12-01T00:30Z",
        "2026-12-01T00:30Z",
        "2026-12-01T01:00Z",
    ]
    with Client(live.url, token=live.viewer) as reader:
        step4 = reader.snapshot("shelf-ranker-job", "2026-12-01T01:00Z")
        verdict = reader.verdict(step4["verdict_id"])
    # the job built step 4 on what served (step 2), not on the held step 3, and paired it
    assert verdict["baseline"] == "2026-12-01T00:30Z"
    assert "baseline_score" in step4["columns"]


def test_the_shell_job_deploys_what_serves_after_a_promote_and_after_a_hold(
    live: Live, tmp_path: Path
) -> None:
    import json

    import pyarrow as pa
    import pyarrow.parquet as pq

    from tests.client.live import frame_columns, watermark

    env = {
        **os.environ,
        "PATH": f"{Path(sys.executable).parent}{os.pathsep}{os.environ['PATH']}",
        "TIDEGATE_URL": live.url,
        "TIDEGATE_TOKEN": live.trainer,
        "MODEL": "shelf-ranker-sh",
        "META": str(tmp_path / "meta.json"),
        "SAMPLE": str(tmp_path / "sample.parquet"),
        "DEPLOY": "echo deploying",
    }
    outcomes = []
    for step, shift in ((1, 0.0), (2, 0.35)):  # the second one is held
        (tmp_path / "meta.json").write_text(
            json.dumps({"key": f"sh{step}", "trained_until": watermark(step)})
        )
        pq.write_table(pa.table(frame_columns(20 + step, shift=shift)), tmp_path / "sample.parquet")
        run = subprocess.run(
            ["sh", str(ROOT / "examples" / "retrain.sh")],
            env=env,
            capture_output=True,
            text=True,
            timeout=600,
        )
        outcomes.append((run.returncode, run.stdout.strip()))
    assert outcomes == [(0, "deploying sh1"), (0, "deploying sh1")]
    env["TIDEGATE_TOKEN"] = "tg_" + "x" * 43  # an unknown token: 401, a rejected post
    run = subprocess.run(
        ["sh", str(ROOT / "examples" / "retrain.sh")],
        env=env,
        capture_output=True,
        text=True,
        timeout=600,
    )
    assert run.returncode == 4 and "post rejected" in run.stderr
