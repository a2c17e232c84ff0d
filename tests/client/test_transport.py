"""Retries of the client against a scripted service (httpx.MockTransport, the test double of the
network): what is retried, how long it waits, the total timeout, and the fallback to plain JSON
for a service that cannot read encoded bodies. The live-service tests are in
test_client_live.py."""

from __future__ import annotations

import gzip
import json
import random
from collections.abc import Callable
from datetime import UTC, datetime, timedelta
from email.utils import format_datetime

import httpx
import pytest

from tidegate_client import Client, Rejected, Unreachable
from tidegate_client.transport import RetryPolicy, retry_after_seconds

VERDICT = {
    "verdict_id": 7,
    "model": "shelf-ranker",
    "snapshot": "s01",
    "decision": "hold",
    "effective_decision": "promote",
    "overridden": True,
    "serves_now": True,
    "reasons": ["score PSI 0.31 vs baseline exceeds 0.10"],
    "findings": [
        {
            "check": "score-psi",
            "kind": "drift",
            "outcome": "breach",
            "value": 0.31,
            "limit": 0.1,
            "message": "m",
        }
    ],
}


class Script:
    """Answers in order; records every request it saw."""

    def __init__(
        self, *answers: httpx.Response | Exception | Callable[[httpx.Request], httpx.Response]
    ) -> None:
        self.answers = list(answers)
        self.seen: list[httpx.Request] = []

    def __call__(self, request: httpx.Request) -> httpx.Response:
        self.seen.append(request)
        answer = self.answers.pop(0)
        if isinstance(answer, Exception):
            raise answer
        if callable(answer):
            return answer(request)
        return answer


def client(script: Script, slept: list[float], **kwargs: object) -> Client:
    return Client(
        "http://gate.test",
        transport=httpx.MockTransport(script),
        sleep=slept.append,
        seed=1,
        **kwargs,  # type: ignore[arg-type]
    )


def test_503_and_429_are_retried_as_retry_after_says_with_the_same_body() -> None:
    when = format_datetime(datetime.now(UTC) + timedelta(seconds=30), usegmt=True)
    script = Script(
        httpx.Response(
            503, headers={"Retry-After": "2"}, json={"error": {"code": "storage_unavailable"}}
        ),
        httpx.Response(429, headers={"Retry-After": when}),
        httpx.Response(201, json=VERDICT),
    )
    slept: list[float] = []
    with client(script, slept) as gate:
        verdict = gate.submit("shelf-ranker", "s01", sample={"score": [0.1, 0.2]})
    assert slept[0] == 2.0
    assert 28.0 <= slept[1] <= 30.0  # an HTTP date (RFC 9110 §10.2.3), less the time passed
    assert len({r.content for r in script.seen}) == 1  # every attempt the same post, same key
    assert json.loads(script.seen[0].content)["key"] == "s01"
    assert verdict.serves_now and verdict.overridden and verdict.effective_decision == "promote"
    assert verdict.findings[0].value == 0.31 and verdict.link == "http://gate.test/ui/verdicts/7"


def test_network_errors_and_5xx_back_off_exponentially_with_jitter() -> None:
    script = Script(
        httpx.ConnectError("refused"),
        httpx.ReadTimeout("slow"),
        httpx.Response(502),
        httpx.Response(500, json={"error": {"code": "internal"}}),
        httpx.Response(201, json=VERDICT),
    )
    slept: list[float] = []
    with client(script, slept, backoff=1.0, max_backoff=3.0) as gate:
        gate.submit("shelf-ranker", "s01", sample={"score": [0.1]})
    # equal jitter: attempt n waits in [cap/2, cap], cap = min(3, 1 * 2**(n-1))
    # (exponential backoff with jitter, AWS Architecture Blog 2015; from memory)
    caps = [1.0, 2.0, 3.0, 3.0]
    assert len(slept) == 4
    assert all(cap / 2 <= wait <= cap for wait, cap in zip(slept, caps, strict=True))
    assert len(set(slept)) == 4  # jittered, not a fixed schedule


def test_retries_stop_at_the_limit_and_say_how_it_ended() -> None:
    script = Script(*[httpx.Response(503) for _ in range(4)])
    slept: list[float] = []
    with client(script, slept, retries=3) as gate, pytest.raises(Unreachable) as gone:
        gate.serving("shelf-ranker")
    assert gone.value.attempts == 4 and gone.value.last_status == 503
    assert "HTTP 503 after 4 attempts" in str(gone.value) and len(slept) == 3


def test_a_wait_past_the_total_timeout_is_not_taken() -> None:
    script = Script(httpx.Response(503, headers={"Retry-After": "3600"}))
    slept: list[float] = []
    with client(script, slept, timeout=60.0) as gate, pytest.raises(Unreachable) as gone:
        gate.serving("shelf-ranker")
    assert slept == [] and "total timeout of 60 s" in str(gone.value)


def test_4xx_is_not_retried_and_carries_code_field_and_message() -> None:
    body = {
        "error": {
            "code": "invalid_request",
            "message": "sample.label: wrong length",
            "field": "sample.label",
            "details": [{"field": "sample.label"}],
        }
    }
    script = Script(httpx.Response(422, json=body, headers={"X-Request-ID": "r1"}))
    slept: list[float] = []
    with client(script, slept) as gate, pytest.raises(Rejected) as bad:
        gate.submit("shelf-ranker", "s01", sample={"score": [0.1], "label": [1, 0]})
    assert (bad.value.status, bad.value.code, bad.value.field) == (
        422,
        "invalid_request",
        "sample.label",
    )
    assert bad.value.request_id == "r1" and slept == [] and len(script.seen) == 1


def test_an_override_is_not_repeated_after_a_lost_answer() -> None:
    # the request may have been carried out: a second override would answer 409
    script = Script(httpx.ReadTimeout("lost"))
    slept: list[float] = []
    with client(script, slept) as gate, pytest.raises(Unreachable) as gone:
        gate.override(7, "promote", "checked")
    assert len(script.seen) == 1 and "not retried" in str(gone.value)
    # but a refused connection did nothing, so it is retried
    script = Script(httpx.ConnectError("refused"), httpx.Response(201, json={"ok": True}))
    with client(script, slept) as gate:
        assert gate.override(7, "promote", "checked") == {"ok": True}


def test_an_older_service_that_refuses_encoded_bodies_gets_plain_json() -> None:
    refused = httpx.Response(415, json={"error": {"code": "unsupported_media_type"}})
    script = Script(refused, httpx.Response(201, json=VERDICT), httpx.Response(201, json=VERDICT))
    slept: list[float] = []
    sample = {"score": [random.Random(3).random() for _ in range(50)]}
    with client(
        script, slept, binary_min_rows=10, compression="auto", compress_min_bytes=0
    ) as gate:
        gate.submit("shelf-ranker", "s01", sample=sample)
        assert gate.encoded_bodies_ok is False
        gate.submit("shelf-ranker", "s02", sample=sample)
    first, fallback, later = script.seen
    assert first.headers["content-type"].startswith("multipart/form-data")
    for plain in (fallback, later):
        assert plain.headers["content-type"] == "application/json"
        assert "content-encoding" not in plain.headers
    assert json.loads(fallback.content)["sample"]["score"] == sample["score"]


def test_gzip_bodies_decompress_to_the_json_post() -> None:
    script = Script(httpx.Response(201, json=VERDICT))
    slept: list[float] = []
    with client(script, slept, upload="json", compression="gzip", compress_min_bytes=0) as gate:
        gate.submit(
            "shelf-ranker", "s01", sample={"score": [0.5, float("nan")]}, metrics={"auc": 0.7}
        )
    sent = script.seen[0]
    assert sent.headers["content-encoding"] == "gzip"
    text = gzip.decompress(sent.content).decode()
    # NaN scores are sent as NaN: the service keeps them and holds on health
    assert '"score":[0.5,NaN]' in text and '"metrics":{"auc":0.7}' in text


@pytest.mark.parametrize(
    ("header", "expected"),
    [
        ("120", 120.0),
        ("0", 0.0),
        ("soon", None),
        (None, None),
        ("Wed, 02 Dec 2026 08:00:30 GMT", 30.0),
    ],
)
def test_retry_after_values(header: str | None, expected: float | None) -> None:
    # RFC 9110 §10.2.3: delay-seconds or an HTTP-date
    now = datetime(2026, 12, 2, 8, 0, 0, tzinfo=UTC)
    assert retry_after_seconds(header, now=now) == expected


def test_backoff_is_capped() -> None:
    policy = RetryPolicy(backoff=0.5, max_backoff=4.0, rng=random.Random(0))
    waits = [policy.wait(n) for n in range(1, 12)]
    assert max(waits) <= 4.0 and min(waits[5:]) >= 2.0
