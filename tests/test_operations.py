"""Operations (issue 6): /metrics in the Prometheus text format, request ids, JSON logs."""

from __future__ import annotations

import json
import logging
from typing import Any

import pytest
from prometheus_client.parser import text_string_to_metric_families

from service import logs
from service.metrics import Metrics, escape_label
from tests.databases import Api, snapshot_body


def families(text: str) -> dict[str, Any]:
    # the reference parser of the format: prometheus_client (test-only dependency)
    return {f.name: f for f in text_string_to_metric_families(text)}


def samples(text: str, name: str) -> dict[tuple[tuple[str, str], ...], float]:
    out = {}
    for family in text_string_to_metric_families(text):
        for sample in family.samples:
            if sample.name == name:
                out[tuple(sorted(sample.labels.items()))] = sample.value
    return out


def test_metrics_count_verdicts_latency_and_errors(api: Api) -> None:
    assert api.post("shelf-ranker", snapshot_body("a", step=1)).json()["decision"] == "promote"
    assert (
        api.post("shelf-ranker", snapshot_body("b", step=2, shift=0.5)).json()["decision"] == "hold"
    )
    assert api.post("shelf-ranker", snapshot_body("b", step=2, shift=0.5)).status_code == 200
    assert api.post("also-read", snapshot_body("x", step=1)).status_code == 201
    assert api.client.get("/v1/models/nope", headers=api.headers()).status_code == 404
    assert api.client.get("/v1/models").status_code == 401
    response = api.client.get("/metrics", headers=api.headers())
    assert response.status_code == 200
    assert response.headers["content-type"].startswith("text/plain; version=0.0.4")
    text = response.text
    found = families(text)
    assert found["tidegate_verdicts"].type == "counter"
    assert found["tidegate_evaluation_seconds"].type == "histogram"
    verdicts = samples(text, "tidegate_verdicts_total")
    assert verdicts == {
        (("decision", "promote"), ("model", "shelf-ranker")): 1.0,
        (("decision", "hold"), ("model", "shelf-ranker")): 1.0,
        (("decision", "promote"), ("model", "also-read")): 1.0,
    }  # the retry answered 200 and is not a new verdict
    counts = samples(text, "tidegate_evaluation_seconds_count")
    assert counts[(("model", "shelf-ranker"),)] == 2.0
    buckets = samples(text, "tidegate_evaluation_seconds_bucket")
    assert buckets[(("le", "+Inf"), ("model", "shelf-ranker"))] == 2.0
    errors = samples(text, "tidegate_http_request_errors_total")
    assert errors[(("code", "not_found"), ("route", "/v1/models/{model}"))] == 1.0
    assert errors[(("code", "unauthorized"), ("route", "unmatched"))] >= 1.0
    requests = samples(text, "tidegate_http_requests_total")
    key = (("method", "POST"), ("route", "/v1/models/{model}/snapshots"), ("status", "201"))
    assert requests[key] == 3.0

    # a token scoped to also-read sees no series of shelf-ranker
    scoped = api.token("viewer", ("also-read",))
    text = api.client.get("/metrics", headers=api.headers(scoped)).text
    assert "shelf-ranker" not in text and "also-read" in text


def test_histogram_buckets_are_cumulative_and_labels_escaped() -> None:
    metrics = Metrics()
    for seconds in (0.004, 0.02, 0.02, 3.0, 100.0):
        metrics.verdict(model='we"ird\\name\n', decision="hold", seconds=seconds)
    text = metrics.render()
    found = samples(text, "tidegate_evaluation_seconds_bucket")
    model = ("model", 'we"ird\\name\n')  # parsed back to the original value
    assert found[(("le", "0.005"), model)] == 1.0
    assert found[(("le", "0.025"), model)] == 3.0
    assert found[(("le", "5"), model)] == 4.0
    assert found[(("le", "+Inf"), model)] == 5.0
    total = samples(text, "tidegate_evaluation_seconds_sum")[(model,)]
    assert total == pytest.approx(0.004 + 0.02 + 0.02 + 3.0 + 100.0)
    assert escape_label('a"b\\c\nd') == 'a\\"b\\\\c\\nd'


def test_request_id_in_and_out(api: Api) -> None:
    given = api.client.get("/healthz", headers={"X-Request-ID": "job-7:step-3"})
    assert given.headers["x-request-id"] == "job-7:step-3"
    made = api.client.get("/healthz", headers={"X-Request-ID": "bad id with spaces"})
    assert made.headers["x-request-id"] != "bad id with spaces"
    assert len(made.headers["x-request-id"]) == 32
    assert api.client.get("/v1/models").headers["x-request-id"]  # on errors too


def test_log_lines_are_strict_json_with_the_request_id(
    api: Api, caplog: pytest.LogCaptureFixture
) -> None:
    formatter = logs.JsonFormatter()
    with caplog.at_level(logging.INFO, logger="tidegate"):
        api.client.get("/v1/models", headers={**api.headers(), "X-Request-ID": "abc"})
    lines = [formatter.format(r) for r in caplog.records if r.name == "tidegate.http"]
    record = json.loads(lines[-1])
    assert record["request_id"] == "abc" and record["status"] == 200
    assert record["route"] == "/v1/models" and record["actor"] == "test-admin"
    odd = logging.LogRecord("tidegate", logging.INFO, "", 0, "x", None, None)
    odd.fields = {"value": float("nan"), "nested": [float("inf")]}
    assert json.loads(formatter.format(odd))["value"] == "nan"  # strict JSON, no NaN literal
