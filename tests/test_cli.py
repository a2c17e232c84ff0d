"""The `tidegate` command against an in-process service."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest

from service import cli
from tests.api.test_snapshots import POLICY, body
from tests.conftest import Harness
from tidegate_client import Client as TidegateClient


@pytest.fixture
def h(make_harness, monkeypatch: pytest.MonkeyPatch) -> Harness:  # type: ignore[no-untyped-def]
    harness = make_harness({"p": POLICY})
    transport = harness.client._transport

    def client(_args: Any) -> TidegateClient:
        return TidegateClient("http://testserver", transport=transport)

    monkeypatch.setattr(cli, "_client", client)
    return harness


def write(tmp_path: Path, data: dict[str, Any]) -> str:
    path = tmp_path / f"{data['key']}.json"
    path.write_text(json.dumps(data))
    return str(path)


def test_submit_exit_codes(h: Harness, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert cli.main(["submit", write(tmp_path, body("s1", seed=1)), "--model", "m"]) == 0
    assert "m s1: PROMOTE" in capsys.readouterr().out
    held = body("s2", seed=2, shift=0.3, minute=15)
    assert cli.main(["submit", write(tmp_path, held), "--model", "m"]) == cli.EXIT_HOLD == 3
    out = capsys.readouterr().out
    assert "m s2: HOLD" in out and "score PSI" in out
    broken = body("s3", seed=3)
    broken["sample"]["label"] = [1]
    assert cli.main(["submit", write(tmp_path, broken), "--model", "m"]) == cli.EXIT_ERROR == 4
    assert "invalid_request" in capsys.readouterr().err
    missing = tmp_path / "nope.json"
    assert cli.main(["submit", str(missing), "--model", "m"]) == 4


def test_submit_reads_model_from_file(h: Harness, tmp_path: Path) -> None:
    data = body("s1", seed=1)
    data["model"] = "from-file"
    assert cli.main(["submit", write(tmp_path, data)]) == 0
    assert h.client.get("/v1/models/from-file").status_code == 200


def test_why_history_and_baseline(h: Harness, capsys: pytest.CaptureFixture[str]) -> None:
    h.post("m", body("s1", seed=1))
    h.post("m", body("s2", seed=2, shift=0.3, minute=15))
    assert cli.main(["why", "m"]) == 0
    out = capsys.readouterr().out
    assert out.startswith("m s2: HOLD")
    assert "why:\n  - score PSI" in out and "[x] score-psi (drift, breach)" in out
    assert cli.main(["why", "m", "s1"]) == 0
    assert capsys.readouterr().out.startswith("m s1: PROMOTE")
    assert cli.main(["why", "m", "nope"]) == 4
    capsys.readouterr()
    assert cli.main(["history", "m"]) == 0
    lines = capsys.readouterr().out.strip().splitlines()
    # a header row, then one row per verdict, times as `tidegate why` writes them (issue 14)
    assert lines[0].split() == [
        "VERDICT",
        "JUDGED",
        "AT",
        "SNAPSHOT",
        "DECISION",
        "FIRST",
        "REASON",
    ]
    assert len(lines) == 3 and "s2" in lines[1] and "hold" in lines[1]
    assert "2026-12-01 02:00 UTC" in lines[1]
    assert cli.main(["baseline", "set", "m", "s2", "--reason", "checked by hand"]) == 0
    assert "baseline is now s2" in capsys.readouterr().out


def test_policy_check(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert cli.main(["policy", "check", "config/policies"]) == 0
    bad = tmp_path / "bad.toml"
    bad.write_text('models = ["x"]\nnope = 1\n')
    assert cli.main(["policy", "check", str(tmp_path)]) == 4
    assert "bad.toml, key 'nope': unknown key" in capsys.readouterr().err


def test_explain_never_prints_nan() -> None:
    from service.explain import explain

    text = explain(
        {
            "model": "m",
            "snapshot": "k",
            "decision": "hold",
            "created_at": "t",
            "reasons": ["r"],
            "findings": [
                {
                    "check": "c",
                    "kind": "drift",
                    "outcome": "breach",
                    "value": None,
                    "pvalue": 1e-300,
                    "message": "msg",
                    "limit": 0.1,
                }
            ],
        }
    )
    assert "p < 1e-16" in text and "nan" not in text.lower()
