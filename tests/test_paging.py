"""Paging: per-model gauges read from the database, the alert rules, and the signed webhook
(issue 14, item 10), against a receiver on localhost."""

from __future__ import annotations

import json
import re
import shutil
import subprocess
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient

from service import paging
from tests.conftest import skip_or_fail
from tests.databases import Api, snapshot_body

ROOT = Path(__file__).resolve().parent.parent
ALERTS = ROOT / "config" / "alerts"
SECRET = "a-shared-secret-of-32-characters"


# --- signing and backoff --------------------------------------------------------------------


def test_mac_matches_rfc_4231_test_case_2() -> None:
    # RFC 4231 (2005), section 4.3, test case 2: key "Jefe", data "what do ya want for
    # nothing?", HMAC-SHA-256 = 5bdcc146...64ec3843.
    expected = "5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843"
    assert paging.mac("Jefe", b"what do ya want for nothing?") == expected


def test_signature_covers_timestamp_and_body() -> None:
    body = b'{"event":"hold"}'
    sig = paging.signature(SECRET, 1764554400, body)
    assert sig == "sha256=" + paging.mac(SECRET, b"1764554400." + body)
    assert paging.verify(SECRET, timestamp="1764554400", body=body, header=sig, now=1764554500)
    # another body, another timestamp, an old timestamp, another secret: refused
    assert not paging.verify(SECRET, timestamp="1764554400", body=b"{}", header=sig, now=1764554500)
    assert not paging.verify(SECRET, timestamp="1764554401", body=body, header=sig, now=1764554500)
    assert not paging.verify(SECRET, timestamp="1764554400", body=body, header=sig, now=1764564400)
    other = "x" * 32
    assert not paging.verify(other, timestamp="1764554400", body=body, header=sig, now=1764554500)
    assert not paging.verify(SECRET, timestamp="soon", body=body, header=sig, now=1764554500)


def test_backoff_is_exponential_with_full_jitter_and_capped() -> None:
    # Brooker (2015), "Exponential Backoff And Jitter": full jitter, uniform on [0, base * 2^n].
    top = [paging.backoff_seconds(n, 2.0, rand=lambda: 1.0) for n in (1, 2, 3, 4)]
    assert top == [2.0, 4.0, 8.0, 16.0]
    assert paging.backoff_seconds(3, 2.0, rand=lambda: 0.25) == 2.0
    assert paging.backoff_seconds(40, 2.0, rand=lambda: 1.0) == paging.MAX_BACKOFF_SECONDS


def test_settings_refuse_a_webhook_without_a_secret() -> None:
    from service.settings import Settings

    with pytest.raises(ValueError, match="webhook_secret"):
        Settings(webhook_url="http://127.0.0.1:9/hook")
    with pytest.raises(ValueError, match="unknown event"):
        Settings(webhook_events="hold,sneeze")
    assert Settings().webhook_event_set() == frozenset()


# --- a receiver on localhost ----------------------------------------------------------------


@dataclass
class Receiver:
    url: str
    got: list[dict[str, Any]] = field(default_factory=list)
    #: statuses to answer, in order; 204 once they run out
    script: list[int] = field(default_factory=list)
    lock: threading.Lock = field(default_factory=threading.Lock)

    def wait_for(self, predicate: Callable[[list[dict[str, Any]]], bool], timeout: float = 120):
        """Wait (generously: busy machines) until *predicate* holds for the requests seen."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            with self.lock:
                if predicate(list(self.got)):
                    return list(self.got)
            time.sleep(0.05)
        raise AssertionError(f"receiver saw {len(self.got)} request(s): {self.got!r}")


@pytest.fixture
def receiver() -> Iterator[Receiver]:
    state = Receiver(url="")

    class Handler(BaseHTTPRequestHandler):
        def do_POST(self) -> None:  # noqa: N802 (http.server's name)
            body = self.rfile.read(int(self.headers.get("content-length", "0")))
            with state.lock:
                status = state.script.pop(0) if state.script else 204
                state.got.append(
                    {
                        "headers": {k.lower(): v for k, v in self.headers.items()},
                        "body": body,
                        "status": status,
                    }
                )
            self.send_response(status)
            self.send_header("content-length", "0")
            self.end_headers()

        def log_message(self, *args: Any) -> None:
            pass

    server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    state.url = f"http://127.0.0.1:{server.server_address[1]}/tidegate"
    yield state
    server.shutdown()
    server.server_close()


def _webhook_api(make_api: Callable[..., Api], url: str, **extra: Any) -> tuple[Api, TestClient]:
    api = make_api(
        webhook_url=url,
        webhook_secret=SECRET,
        webhook_backoff_seconds=0.05,
        public_url="https://gate.example",
        **extra,
    )
    client = TestClient(api.app, raise_server_exceptions=False)
    client.__enter__()  # runs the lifespan: the dispatcher stops with the client
    return api, client


def _deliveries(api: Api, client: TestClient, model: str) -> list[dict[str, Any]]:
    response = client.get(f"/v1/models/{model}/deliveries", headers=api.headers())
    assert response.status_code == 200, response.text
    data: list[dict[str, Any]] = response.json()["data"]
    return data


def _wait_settled(api: Api, client: TestClient, model: str, n: int) -> list[dict[str, Any]]:
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        data = _deliveries(api, client, model)
        if len(data) >= n and all(d["state"] != "pending" for d in data):
            return data
        time.sleep(0.05)
    raise AssertionError(_deliveries(api, client, model))


def test_hold_stuck_and_override_are_posted_signed(
    make_api: Callable[..., Api], receiver: Receiver
) -> None:
    # open mode, so that the model page answers without a signed-in session
    api, client = _webhook_api(
        make_api, receiver.url, webhook_events="hold,stuck,override", auth="open"
    )
    try:
        headers = api.headers()
        post = client.post("/v1/models/m/snapshots", json=snapshot_body("s0"), headers=headers)
        assert post.json()["decision"] == "promote"
        # the test policy's PSI limit holds a shifted sample; the default stuck_after_holds is 4
        held = []
        for step in range(1, 5):
            body = snapshot_body(f"s{step}", step=step, shift=0.5)
            answer = client.post("/v1/models/m/snapshots", json=body, headers=headers)
            assert answer.json()["decision"] == "hold", answer.text
            held.append(answer.json()["verdict_id"])
        # a retry of a stored post queues nothing more
        again = client.post(
            "/v1/models/m/snapshots", json=snapshot_body("s4", step=4, shift=0.5), headers=headers
        )
        assert again.status_code == 200
        override = client.post(
            f"/v1/verdicts/{held[0]}/override",
            json={"decision": "promote", "reason": "checked by hand: the shift is expected"},
            headers=headers,
        )
        assert override.status_code == 201, override.text
        got = receiver.wait_for(lambda g: len(g) >= 6)
        time.sleep(0.3)  # nothing more may come: 4 holds, 1 stuck, 1 override
        assert len(receiver.got) == 6
        events = [r["headers"]["x-tidegate-event"] for r in got]
        assert sorted(events) == ["hold"] * 4 + ["override", "stuck"]
        for request in got:
            h = request["headers"]
            assert paging.verify(
                SECRET,
                timestamp=h["x-tidegate-timestamp"],
                body=request["body"],
                header=h["x-tidegate-signature"],
                now=time.time(),
            )
            payload = json.loads(request["body"])
            assert payload["event"] == h["x-tidegate-event"]
            assert payload["model"] == "m"
            assert payload["links"]["verdict_api"].startswith("https://gate.example/v1/verdicts/")
            assert payload["links"]["verdict_page"].startswith("https://gate.example/ui/models/m/")
        by_event = {r["headers"]["x-tidegate-event"]: json.loads(r["body"]) for r in got}
        stuck = by_event["stuck"]
        assert stuck["snapshot"] == "s4" and stuck["consecutive_holds"] == 4 and stuck["stuck"]
        over = next(
            json.loads(r["body"]) for r in got if r["headers"]["x-tidegate-event"] == "override"
        )
        assert over["verdict_id"] == held[0]
        assert over["decision"] == "hold" and over["decision_in_force"] == "promote"
        assert over["override"]["reason"] == "checked by hand: the shift is expected"
        data = _wait_settled(api, client, "m", 6)
        assert {d["state"] for d in data} == {"delivered"}
        assert all(d["attempts"] == 1 and d["last_status"] == 204 for d in data)
        page = client.get("/ui/models/m")
        assert page.status_code == 200
        section = page.text[page.text.index("Paging messages") :]
        assert section.count(">delivered<") == 6 and "<code>stuck</code>" in section
    finally:
        client.__exit__(None, None, None)


def test_failures_are_retried_with_the_same_id_then_delivered(
    make_api: Callable[..., Api], receiver: Receiver
) -> None:
    receiver.script = [500, 503, 429]
    api, client = _webhook_api(make_api, receiver.url, webhook_events="hold")
    try:
        headers = api.headers()
        client.post("/v1/models/m/snapshots", json=snapshot_body("s0"), headers=headers)
        body = snapshot_body("s1", step=1, shift=0.5)
        assert (
            client.post("/v1/models/m/snapshots", json=body, headers=headers).json()["decision"]
            == "hold"
        )
        got = receiver.wait_for(lambda g: len(g) >= 4)
        assert [r["status"] for r in got] == [500, 503, 429, 204]
        assert len({r["headers"]["x-tidegate-delivery"] for r in got}) == 1
        assert len({r["body"] for r in got}) == 1  # the same message each time
        (only,) = _wait_settled(api, client, "m", 1)
        assert only["state"] == "delivered" and only["attempts"] == 4
    finally:
        client.__exit__(None, None, None)


def test_a_refusal_fails_at_once_and_attempts_are_bounded(
    make_api: Callable[..., Api], receiver: Receiver
) -> None:
    receiver.script = [400]
    api, client = _webhook_api(make_api, receiver.url, webhook_events="hold")
    try:
        headers = api.headers()
        client.post("/v1/models/m/snapshots", json=snapshot_body("s0"), headers=headers)
        client.post(
            "/v1/models/m/snapshots", json=snapshot_body("s1", step=1, shift=0.5), headers=headers
        )
        (refused,) = _wait_settled(api, client, "m", 1)
        assert refused["state"] == "failed" and refused["attempts"] == 1
        assert refused["last_status"] == 400
    finally:
        client.__exit__(None, None, None)
    # nothing listens: every attempt fails to connect, up to webhook_max_attempts
    api2, client2 = _webhook_api(
        make_api, "http://127.0.0.1:9/closed", webhook_events="hold", webhook_max_attempts=3
    )
    try:
        headers = api2.headers()
        client2.post("/v1/models/n/snapshots", json=snapshot_body("s0"), headers=headers)
        client2.post(
            "/v1/models/n/snapshots", json=snapshot_body("s1", step=1, shift=0.5), headers=headers
        )
        (gone,) = _wait_settled(api2, client2, "n", 1)
        assert gone["state"] == "failed" and gone["attempts"] == 3
        assert gone["last_status"] is None and gone["last_error"]
    finally:
        client2.__exit__(None, None, None)


def test_a_rejected_post_queues_nothing(make_api: Callable[..., Api], receiver: Receiver) -> None:
    api, client = _webhook_api(make_api, receiver.url)
    try:
        headers = api.headers()
        client.post("/v1/models/m/snapshots", json=snapshot_body("s0"), headers=headers)
        bad = snapshot_body("s1", step=1, shift=0.5)
        bad["sample"]["label"] = bad["sample"]["label"][:-1]  # columns of different lengths
        assert client.post("/v1/models/m/snapshots", json=bad, headers=headers).status_code == 422
        assert _deliveries(api, client, "m") == []
        assert receiver.got == []
    finally:
        client.__exit__(None, None, None)


# --- gauges ---------------------------------------------------------------------------------


def _series(text: str, name: str) -> dict[str, float]:
    out = {}
    for line in text.splitlines():
        if line.startswith(name + "{"):
            labels, value = line.rsplit(" ", 1)
            out[labels[len(name) :]] = float(value)
    return out


def test_gauges_agree_with_the_model_api_and_respect_scope(api: Api) -> None:
    api.post("m", snapshot_body("s0"))
    for step in range(1, 6):
        assert (
            api.post("m", snapshot_body(f"s{step}", step=step, shift=0.5)).json()["decision"]
            == "hold"
        )
    api.post("other", snapshot_body("o0"))
    text = api.client.get("/metrics", headers=api.headers()).text
    model = api.client.get("/v1/models/m", headers=api.headers()).json()
    assert _series(text, "tidegate_model_stuck") == {'{model="m"}': 1.0, '{model="other"}': 0.0}
    holds = _series(text, "tidegate_model_consecutive_holds")
    assert holds['{model="m"}'] == model["consecutive_holds"] == 5
    assert _series(text, "tidegate_model_last_decision")['{model="m",decision="hold"}'] == 1.0
    assert _series(text, "tidegate_stored_verdicts_total") == {
        '{model="m",decision="promote"}': 1.0,
        '{model="m",decision="hold"}': 5.0,
        '{model="other",decision="promote"}': 1.0,
        '{model="other",decision="hold"}': 0.0,
    }
    age = _series(text, "tidegate_model_baseline_age_seconds")['{model="m"}']
    assert age >= 0
    assert "# TYPE tidegate_stored_verdicts_total counter" in text
    # a token scoped to "other" sees none of m's series
    scoped = api.token("viewer", ("other",))
    text_other = api.client.get("/metrics", headers=api.headers(scoped)).text
    assert 'model="m"' not in text_other and 'model="other"' in text_other


# --- the alert rules ------------------------------------------------------------------------


def _promtool() -> str:
    tool = shutil.which("promtool")
    if tool is None:
        skip_or_fail("promtool is not installed (Debian package prometheus)")
    assert tool is not None
    return tool


def test_alert_rules_are_valid_and_their_unit_tests_pass() -> None:
    tool = _promtool()
    check = subprocess.run(
        [tool, "check", "rules", str(ALERTS / "tidegate-rules.yml")],
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert check.returncode == 0, check.stdout + check.stderr
    assert "3 rules found" in check.stdout
    unit = subprocess.run(
        [tool, "test", "rules", "tidegate-rules.test.yml"],
        capture_output=True,
        text=True,
        timeout=300,
        cwd=ALERTS,
    )
    assert unit.returncode == 0, unit.stdout + unit.stderr


def test_alert_rules_name_only_series_the_service_exports() -> None:
    rules = (ALERTS / "tidegate-rules.yml").read_text(encoding="utf-8")
    exported = {name for name, _, _ in paging.GAUGES}
    used = set(re.findall(r"\b(tidegate_[a-z_]+)\b", rules))
    assert used and used <= exported, used - exported
