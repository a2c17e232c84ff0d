"""tidegate_client against the real service in a subprocess (issue 11): a DataFrame posted with
a trainer token, retries answered with the stored verdict, typed errors, what serves, waiting
for an override, and the ``tidegate submit / serving / wait`` exit codes."""

from __future__ import annotations

import json
from pathlib import Path

import httpx
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pa_csv
import pyarrow.feather as feather
import pyarrow.parquet as pq
import pytest

from service import cli
from tests.client.live import Live, frame_columns, watermark
from tests.serverproc import free_port
from tidegate_client import (
    Client,
    Conflict,
    Forbidden,
    NotFound,
    Rejected,
    Unauthorised,
    Unreachable,
)


def trainer(live: Live, **kwargs: object) -> Client:
    return Client(live.url, token=live.trainer, **kwargs)  # type: ignore[arg-type]


def run_cli(
    capsys: pytest.CaptureFixture[str], live: Live, token: str, *argv: str
) -> tuple[int, str, str]:
    code = cli.main([*argv, "--url", live.url, "--token", token])
    out, err = capsys.readouterr()
    return code, out, err


def test_a_dataframe_is_posted_and_a_retry_answers_the_stored_verdict(live: Live) -> None:
    frame = pd.DataFrame(frame_columns(1))
    with trainer(live) as gate:
        first = gate.submit(
            "shelf-ranker", "s01", sample=frame, metrics={"auc": 0.74}, trained_until=watermark(1)
        )
        again = gate.submit(
            "shelf-ranker", "s01", sample=frame, metrics={"auc": 0.74}, trained_until=watermark(1)
        )
        serving = gate.serving("shelf-ranker")
        stored = gate.snapshot("shelf-ranker", "s01")
    assert first.decision == first.effective_decision == "promote"
    assert first.serves_now and first.created and first.promoted
    assert first.link == f"{live.url}/ui/verdicts/{first.verdict_id}"
    assert {f.check for f in first.findings} >= {"health.rows", "score-psi"}
    assert (again.verdict_id, again.created) == (first.verdict_id, False)
    assert stored["sample_rows"] == 400
    assert set(stored["columns"]) == {"score", "baseline_score", "label", "segment.device"}
    # what serves: the key, since when, by what (the gate's verdict and its audit entry)
    assert serving.snapshot == "s01" and serving.cause == "gate" and serving.actor == "gate"
    assert serving.verdict_id == first.verdict_id and serving.audit_id is not None
    assert serving.since is not None and serving.etag is not None


def test_a_held_snapshot_serves_after_an_override_and_submit_then_exits_0(
    live: Live, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    with trainer(live) as gate:
        gate.submit("shelf-ranker-b", "b01", sample=frame_columns(2), trained_until=watermark(1))
    post = {
        "key": "b02",
        "trained_until": watermark(2),
        "sample": {k: v.tolist() for k, v in frame_columns(3, shift=0.35).items()},
    }
    path = tmp_path / "b02.json"
    path.write_text(json.dumps(post))
    code, out, _ = run_cli(
        capsys, live, live.trainer, "submit", str(path), "--model", "shelf-ranker-b"
    )
    assert code == cli.EXIT_HOLD == 3
    assert "b02 does not serve (exit 3)" in out
    with Client(live.url, token=live.viewer, sleep=lambda _s: None) as deploy:
        waited = deploy.wait("shelf-ranker-b", "b02", timeout=0.5, interval=0.1)
        assert waited.state == "timeout" and waited.serving is not None
        assert waited.serving.asked_state == "waiting" and waited.serving.snapshot == "b01"
    with Client(live.url, token=live.operator) as oncall:
        verdict_id = oncall.latest_verdict("shelf-ranker-b")["verdict_id"]
        oncall.override(verdict_id, "promote", "planned catalogue relaunch")
    # the job's retry of the same post learns that its snapshot serves now: exit 0
    code, out, _ = run_cli(
        capsys, live, live.trainer, "submit", str(path), "--model", "shelf-ranker-b"
    )
    assert code == cli.EXIT_OK == 0
    assert "b02 serves now (exit 0)" in out
    with Client(live.url, token=live.viewer) as deploy:
        serving = deploy.serving("shelf-ranker-b")
        assert deploy.wait("shelf-ranker-b", "b02", timeout=60).state == "serves"
    assert serving.snapshot == "b02" and serving.cause == "override"
    assert serving.actor == "on-call-ana" and serving.reason == "planned catalogue relaunch"
    assert serving.verdict_id == verdict_id and serving.audit_id is not None
    code, out, _ = run_cli(capsys, live, live.viewer, "serving", "shelf-ranker-b")
    assert (code, out) == (0, "b02\n")
    code, out, _ = run_cli(
        capsys, live, live.viewer, "wait", "shelf-ranker-b", "b02", "--timeout", "60"
    )
    assert (code, out) == (0, "b02\n")


def test_a_snapshot_overtaken_by_a_newer_one_can_no_longer_serve(
    live: Live, capsys: pytest.CaptureFixture[str]
) -> None:
    with trainer(live) as gate:
        gate.submit("shelf-ranker-c", "c01", sample=frame_columns(4), trained_until=watermark(1))
        held = gate.submit(
            "shelf-ranker-c", "c02", sample=frame_columns(5, shift=0.35), trained_until=watermark(2)
        )
        newer = gate.submit(
            "shelf-ranker-c", "c03", sample=frame_columns(6), trained_until=watermark(3)
        )
        assert held.decision == "hold" and not held.serves_now
        assert newer.serves_now
        result = gate.wait("shelf-ranker-c", "c02", timeout=60)
    assert result.state == "superseded" and result.serving is not None
    assert result.serving.snapshot == "c03" and result.polls == 1
    code, _, err = run_cli(
        capsys, live, live.viewer, "wait", "shelf-ranker-c", "c02", "--timeout", "60"
    )
    assert code == 3 and "c02 can no longer serve: c03 serves" in err
    code, _, err = run_cli(
        capsys, live, live.viewer, "wait", "shelf-ranker-c", "nope", "--timeout", "60"
    )
    assert code == 4 and "404 not_found" in err


def test_serving_is_cheap_to_poll_with_an_entity_tag(live: Live) -> None:
    with trainer(live) as gate:
        gate.submit("shelf-ranker-d", "d01", sample=frame_columns(7), trained_until=watermark(1))
    headers = {"Authorization": f"Bearer {live.viewer}"}
    url = f"{live.url}/v1/models/shelf-ranker-d/serving"
    first = httpx.get(url, headers=headers, timeout=60)
    tag = first.headers["etag"]
    again = httpx.get(url, headers={**headers, "If-None-Match": tag}, timeout=60)
    # RFC 9110 §13.1.2: a matching If-None-Match on GET answers 304 with no content
    assert first.status_code == 200 and again.status_code == 304 and again.content == b""
    with trainer(live) as gate:
        gate.submit("shelf-ranker-d", "d02", sample=frame_columns(8), trained_until=watermark(2))
    changed = httpx.get(url, headers={**headers, "If-None-Match": tag}, timeout=60)
    assert changed.status_code == 200 and changed.json()["snapshot"] == "d02"
    assert changed.headers["etag"] != tag


def test_errors_are_typed_and_nothing_is_stored(
    live: Live, capsys: pytest.CaptureFixture[str], tmp_path: Path
) -> None:
    columns = frame_columns(9)
    with trainer(live) as gate:
        with pytest.raises(Rejected) as bad:
            gate.submit("shelf-ranker-e", "e01", sample={**columns, "label": [1, 0]})
        assert bad.value.status == 422 and bad.value.code == "invalid_request"
        assert bad.value.field is not None and bad.value.field.startswith("sample")
        with pytest.raises(Rejected) as missing:
            gate.submit("shelf-ranker-e", "e01", metrics={"auc": 0.7})
        assert (missing.value.status, missing.value.field) == (422, "sample")
        with pytest.raises(Rejected) as no_score:
            gate.submit("shelf-ranker-e", "e01", sample={"label": [0, 1]})
        assert no_score.value.field == "sample.score"
        with pytest.raises(Rejected) as empty:
            gate.submit("shelf-ranker-e", "e01", sample={"score": []})
        assert empty.value.field == "sample.score"
        with pytest.raises(Forbidden):  # the trainer token's scope is shelf-*
            gate.submit("also-read", "a01", sample=columns)
        gate.submit("shelf-ranker-e", "e02", sample=columns, trained_until=watermark(1))
        with pytest.raises(Conflict):
            gate.submit(
                "shelf-ranker-e", "e02", sample=frame_columns(10), trained_until=watermark(1)
            )
        with pytest.raises(NotFound):
            gate.serving("shelf-ranker-e", snapshot="nope")
        with pytest.raises(NotFound):
            gate.snapshot("shelf-ranker-e", "e01")  # none of the rejected posts was stored
    with Client(live.url, token="tg_" + "x" * 43) as stranger, pytest.raises(Unauthorised):
        stranger.serving("shelf-ranker-e")
    path = tmp_path / "empty.json"
    path.write_text('{"key": "x"}')
    code, _, err = run_cli(
        capsys, live, live.trainer, "submit", str(path), "--model", "shelf-ranker-x"
    )
    assert code == 4 and "(field sample)" in err
    with Client(live.url, token=live.viewer) as reader, pytest.raises(NotFound):
        reader.model("shelf-ranker-x")  # the model was not even created


def test_a_metrics_only_policy_takes_posts_without_a_sample(live: Live) -> None:
    with trainer(live) as gate:
        first = gate.submit(
            "shelf-metrics", "m01", metrics={"auc": 0.74}, trained_until=watermark(1)
        )
        worse = gate.submit(
            "shelf-metrics", "m02", metrics={"auc": 0.70}, trained_until=watermark(2)
        )
    rows = next(f for f in first.findings if f.check == "health.rows")
    assert rows.outcome == "skipped" and "reported metrics only" in rows.message
    assert first.decision == "promote" and first.serves_now
    assert worse.decision == "hold" and any("auc" in r for r in worse.reasons)


def test_unreachable_after_retries_is_exit_5(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    url = f"http://127.0.0.1:{free_port()}"  # nothing listens there
    slept: list[float] = []
    with (
        Client(url, retries=2, backoff=0.01, sleep=slept.append) as gate,
        pytest.raises(Unreachable) as gone,
    ):
        gate.submit("shelf-ranker", "s01", sample={"score": [0.1]})
    assert gone.value.attempts == 3 and gone.value.last_status is None and len(slept) == 2
    path = tmp_path / "s.json"
    path.write_text('{"key": "s01", "sample": {"score": [0.1]}}')
    code = cli.main(["submit", str(path), "--model", "m", "--url", url, "--retries", "1"])
    assert code == cli.EXIT_UNREACHABLE == 5
    assert "unreachable" in capsys.readouterr().err


@pytest.mark.parametrize("suffix", [".parquet", ".arrows", ".feather", ".csv"])
def test_submit_reads_the_sample_from_a_file(
    live: Live, tmp_path: Path, capsys: pytest.CaptureFixture[str], suffix: str
) -> None:
    model = f"shelf-ranker-file{suffix.replace('.', '-')}"
    table = pa.table(frame_columns(11))
    path = tmp_path / f"sample{suffix}"
    if suffix == ".parquet":
        pq.write_table(table, path)
    elif suffix == ".arrows":
        with pa.OSFile(str(path), "wb") as sink, pa.ipc.new_stream(sink, table.schema) as writer:
            writer.write_table(table)
    elif suffix == ".feather":
        feather.write_feather(table, path)
    else:
        pa_csv.write_csv(table, path)
    meta = tmp_path / "meta.json"
    meta.write_text(
        json.dumps({"key": "f01", "trained_until": watermark(1), "metrics": {"auc": 0.7}})
    )
    code, out, err = run_cli(
        capsys, live, live.trainer, "submit", str(meta), "--model", model, "--sample", str(path)
    )
    assert code == 0, err
    with Client(live.url, token=live.viewer) as reader:
        stored = reader.snapshot(model, "f01")
    assert stored["sample_rows"] == 400 and stored["metrics"] == {"auc": 0.7}
    assert set(stored["columns"]) == {"score", "baseline_score", "label", "segment.device"}


@pytest.mark.parametrize("compression", ["gzip", "zstd"])
def test_a_large_sample_goes_as_compressed_arrow_and_a_json_retry_matches_it(
    live: Live, compression: str
) -> None:
    model = f"shelf-ranker-{compression}"
    columns = frame_columns(12)
    sent: list[httpx.Request] = []
    hooks = {"request": [sent.append]}
    with trainer(live, compression=compression, compress_min_bytes=0, binary_min_rows=10) as gate:
        gate._http.event_hooks = hooks  # look at what went over the wire
        binary = gate.submit(
            "shelf-ranker-" + compression, "g01", sample=columns, trained_until=watermark(1)
        )
        assert gate.encoded_bodies_ok
    assert sent[0].headers["content-type"].startswith("multipart/form-data; boundary=")
    assert sent[0].headers["content-encoding"] == compression
    assert binary.decision == "promote" and binary.created
    # the same snapshot posted again as plain JSON is a retry of it: the stored verdict (200)
    with trainer(live, upload="json", compression="none") as gate:
        again = gate.submit(model, "g01", sample=columns, trained_until=watermark(1))
    assert (again.verdict_id, again.created) == (binary.verdict_id, False)
    with Client(live.url, token=live.viewer) as reader:
        stored = reader.snapshot(model, "g01")
    assert stored["sample_rows"] == 400
    assert set(stored["columns"]) == {"score", "baseline_score", "label", "segment.device"}


def test_open_mode_names_the_actor_from_the_command_line(
    tmp_path: Path, sqlite_template: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from tests.databases import new_sqlite_url
    from tests.serverproc import Server

    server = Server(
        new_sqlite_url(sqlite_template, tmp_path), tmp_path, env={"TIDEGATE_AUTH": "open"}
    )
    server.start(timeout=300.0)  # (not `with server:`, which would start a second one)
    try:
        with Client(server.url) as gate:
            gate.submit("m", "k1", sample=frame_columns(13), trained_until=watermark(1))
            gate.submit("m", "k2", sample=frame_columns(14), trained_until=watermark(2))
        code = cli.main(
            [
                "rollback",
                "m",
                "k1",
                "--reason",
                "test",
                "--url",
                server.url,
                "--actor",
                "ana@bramble",
            ]
        )
        assert code == 0
        capsys.readouterr()
        assert cli.main(["audit", "--url", server.url, "--limit", "1"]) == 0
        out = capsys.readouterr().out
    finally:
        server.stop()
    assert "ana@bramble" in out.splitlines()[1] and "baseline.rollback" in out


def _closed_pipe(argv: list[str], env: dict[str, str] | None = None) -> tuple[int, str]:
    """Run ``tidegate ARGV`` with standard output a pipe whose reader is already gone (as
    ``tidegate why ... | head`` after head exits); its exit code and standard error."""
    import os
    import subprocess
    import sys

    proc = subprocess.Popen(
        [sys.executable, "-m", "service.cli", *argv],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        env={**os.environ, **(env or {})},
    )
    assert proc.stdout is not None and proc.stderr is not None
    proc.stdout.close()
    err = proc.stderr.read().decode()
    return proc.wait(timeout=300), err


def test_output_into_a_closed_pipe_ends_quietly(live: Live) -> None:
    with trainer(live) as gate:
        gate.submit("shelf-ranker-p", "p01", sample=frame_columns(15), trained_until=watermark(1))
        held = gate.submit(
            "shelf-ranker-p",
            "p02",
            sample=frame_columns(16, shift=0.35),
            trained_until=watermark(2),
        )
    remote = ["--url", live.url, "--token", live.viewer]
    for argv in (
        ["why", "shelf-ranker-p", *remote],
        ["history", "shelf-ranker-p", *remote],
        ["--help"],
    ):
        code, err = _closed_pipe(argv)
        assert (code, err) == (0, ""), argv
    # submit keeps its exit code: a held snapshot is 3 even when nobody reads the text
    post = json.dumps(
        {
            "key": "p02",
            "trained_until": watermark(2),
            "sample": {k: v.tolist() for k, v in frame_columns(16, shift=0.35).items()},
        }
    )
    meta = Path(live.server.folder) / "p02.json"
    meta.write_text(post)
    code, err = _closed_pipe(
        [
            "submit",
            str(meta),
            "--model",
            "shelf-ranker-p",
            "--url",
            live.url,
            "--token",
            live.trainer,
        ]
    )
    assert held.decision == "hold" and (code, err) == (3, "")


def test_help_is_plain_text(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit):
        cli.main(["--help"])
    text = capsys.readouterr().out
    assert "``" not in text and text.startswith("usage: tidegate")
    assert "Exit codes. submit: 0 the snapshot serves now" in text
    for command in ("submit", "serving", "wait", "why", "history"):
        assert f"    {command} " in text
