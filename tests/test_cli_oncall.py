"""``tidegate why / override / rollback / audit`` against the real service over HTTP."""

from __future__ import annotations

import html
import json
from collections.abc import Iterator

import httpx
import pytest

from service import cli
from tests.oncall_support import LiveService, live_service


@pytest.fixture(scope="module")
def service(tmp_path_factory: pytest.TempPathFactory) -> Iterator[LiveService]:
    with live_service(tmp_path_factory.mktemp("cli")) as running:
        yield running


def run(
    capsys: pytest.CaptureFixture[str], service: LiveService, *argv: str
) -> tuple[int, str, str]:
    code = cli.main([*argv, "--url", service.url])
    out, err = capsys.readouterr()
    return code, out, err


def test_why_prints_the_page_explanation_and_both_distributions(
    service: LiveService, capsys: pytest.CaptureFixture[str]
) -> None:
    code, out, _ = run(capsys, service, "why", "shelf-ranker", "s04")
    assert code == cli.EXIT_OK
    lines = out.splitlines()
    assert lines[0].startswith("shelf-ranker s04: HOLD")
    for title in ("why:", "how sure:", "what changed:", "what you can do:", "findings:"):
        assert title in lines
    cand = next(line for line in lines if line.strip().startswith("candidate s04"))
    base = next(line for line in lines if line.strip().startswith("baseline s03"))
    assert len(cand.split("|")[1]) == len(base.split("|")[1]) == 30  # one character per bin
    assert "device=app" in out
    # parity: every sentence of the four answers is on the verdict page too
    page = html.unescape(httpx.get(service.url + "/ui/models/shelf-ranker/snapshots/s04").text)
    start = lines.index("why:")
    end = next(i for i, line in enumerate(lines) if line.startswith("score distribution"))
    sentences = [line[4:] for line in lines[start:end] if line.startswith("  - ")]
    assert len(sentences) >= 6
    for sentence in sentences:
        assert sentence in page, sentence


def test_why_json_and_errors(service: LiveService, capsys: pytest.CaptureFixture[str]) -> None:
    code, out, _ = run(capsys, service, "why", "shelf-ranker", "s04", "--json")
    data = json.loads(out)
    assert code == 0 and data["verdict"]["snapshot"] == "s04"
    assert data["evidence"]["distribution"]["candidate"]["rows"] == 400
    code, _, err = run(capsys, service, "why", "shelf-ranker", "nope")
    assert code == cli.EXIT_ERROR and "404 not_found" in err


def test_override_rollback_and_audit(
    service: LiveService, capsys: pytest.CaptureFixture[str]
) -> None:
    vid = str(service.verdicts["s04"]["verdict_id"])
    code, out, _ = run(
        capsys,
        service,
        "override",
        vid,
        "--decision",
        "promote",
        "--reason",
        "planned catalogue relaunch",
    )
    assert code == 0
    assert "s04 (verdict " in out and "hold -> promote" in out
    assert "baseline: s03 -> s04" in out and "s04 becomes the baseline, replacing s03" in out

    code, _, err = run(capsys, service, "override", vid, "--decision", "promote", "--reason", "x")
    assert code == cli.EXIT_ERROR and "409 conflict" in err

    code, out, _ = run(
        capsys, service, "rollback", "shelf-ranker", "s02", "--reason", "broken join since s03"
    )
    assert code == 0
    assert out.strip() == "shelf-ranker: baseline is now s02 (was s04; rollback)"

    code, out, _ = run(capsys, service, "audit", "--model", "shelf-ranker", "--limit", "2")
    assert code == 0
    header, *lines = out.splitlines()
    assert header.split() == ["ID", "AT", "ACTOR", "ACTION", "MODEL", "TARGET"]
    assert "baseline.rollback" in lines[0] and "shelf-ranker" in lines[0]
    assert lines[1].strip() == "baseline s04 -> baseline s02; reason: broken join since s03"
    assert "verdict.override" in lines[2]
    assert "decision hold, baseline s03 -> decision promote, baseline s04" in lines[3]
    assert lines[-1].startswith("more: tidegate audit --cursor ")
    cursor = lines[-1].split()[4]
    code, out, _ = run(
        capsys, service, "audit", "--model", "shelf-ranker", "--cursor", cursor, "--json"
    )
    rest = json.loads(out)
    assert [e["action"] for e in rest["data"]] == ["baseline.verdict"] * 3


def test_reason_is_required_on_the_command_line(capsys: pytest.CaptureFixture[str]) -> None:
    for argv in (
        ["override", "6", "--decision", "promote"],
        ["rollback", "shelf-ranker", "s01"],
        ["override", "6", "--decision", "maybe", "--reason", "x"],
    ):
        with pytest.raises(SystemExit) as exc:
            cli.main(argv)
        assert exc.value.code == 2
    assert "--reason" in capsys.readouterr().err


def test_unreachable_service_is_exit_5(capsys: pytest.CaptureFixture[str]) -> None:
    # nothing listens on port 9 (discard) here: connection refused on every attempt
    code = cli.main(["audit", "--url", "http://127.0.0.1:9", "--retries", "1"])
    assert code == cli.EXIT_UNREACHABLE == 5
    err = capsys.readouterr().err
    assert err.startswith("error: unreachable: ") and "after 2 attempts" in err
