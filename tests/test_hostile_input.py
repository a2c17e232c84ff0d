"""Hostile and broken input (issue 6): every bad input gets a 4xx JSON error with a stable code
and the field path, stores nothing, and no answer is ever a 500 or non-strict JSON.

The README's "Security and reliability" section lists these cases; a test checks that every
label below appears there.
"""

from __future__ import annotations

import asyncio
import json
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import func, select

from service.api.middleware import BodyLimit
from service.store import db as store_db
from service.store.tables import Base
from service.text import has_control
from tests.databases import Api, snapshot_body

ROOT = Path(__file__).resolve().parent.parent
MAX_BODY = 64 * 1024
MAX_ROWS = 100
MAX_COLUMNS = 8


def strict_json(text: str) -> Any:
    """Parse as strict JSON (RFC 8259): NaN, Infinity and -Infinity are not JSON."""

    def refuse(constant: str) -> Any:
        raise ValueError(f"non-standard JSON constant {constant}")

    return json.loads(text, parse_constant=refuse)


def row_counts(api: Api) -> dict[str, int]:
    engine = store_db.make_engine(api.settings)
    with store_db.read_transaction(store_db.make_sessionmaker(engine)) as session:
        out = {
            t.name: int(session.scalar(select(func.count()).select_from(t)) or 0)
            for t in Base.metadata.sorted_tables
        }
    engine.dispose()
    return out


Mutation = Callable[[dict[str, Any]], None]


@dataclass(frozen=True)
class Bad:
    """A bad request and what it must get."""

    label: str
    status: int
    code: str
    field: str | None
    mutate: Mutation | None = None
    raw: bytes | None = None
    content_type: str = "application/json"
    path: str = "/v1/models/shelf-ranker/snapshots"
    method: str = "POST"


def setter(*path: str | int, value: Any) -> Mutation:
    def mutate(body: dict[str, Any]) -> None:
        target: Any = body
        for part in path[:-1]:
            target = target[part]
        target[path[-1]] = value

    return mutate


def remover(*path: str) -> Mutation:
    def mutate(body: dict[str, Any]) -> None:
        target: Any = body
        for part in path[:-1]:
            target = target[part]
        del target[path[-1]]

    return mutate


def chain(*mutations: Mutation) -> Mutation:
    def mutate(body: dict[str, Any]) -> None:
        for m in mutations:
            m(body)

    return mutate


NAN, INF = float("nan"), float("inf")
ROWS = 40

BAD_INPUTS = [
    # the body itself
    Bad("body is not JSON", 422, "invalid_json", None, raw=b'{"key": '),
    Bad("body is not UTF-8", 422, "invalid_json", None, raw=b'{"key": "\xff\xfe"}'),
    Bad("body is a JSON array", 422, "invalid_request", None, raw=b"[]"),
    Bad("body is JSON null", 422, "invalid_request", None, raw=b"null"),
    Bad(
        "Content-Type is not JSON",
        415,
        "unsupported_media_type",
        None,
        raw=json.dumps(snapshot_body("ct")).encode(),
        content_type="text/plain",
    ),
    Bad(
        "body larger than the limit",
        413,
        "payload_too_large",
        None,
        raw=b'{"key": "' + b"x" * (MAX_BODY + 10) + b'"}',
    ),
    Bad(
        "JSON nested 5,000 deep",
        422,
        "invalid_json",
        None,
        raw=b'{"key": "d", "sample": {"score": ' + b"[" * 5000 + b"]" * 5000 + b"}}",
    ),
    # fields
    Bad("unknown field", 422, "invalid_request", "colour", setter("colour", value="blue")),
    Bad("key missing", 422, "invalid_request", "key", remover("key")),
    Bad("key with a slash", 422, "invalid_request", "key", setter("key", value="a/b")),
    Bad("key with a control character", 422, "invalid_request", "key", setter("key", value="a\nb")),
    Bad("key .", 422, "invalid_request", "key", setter("key", value=".")),
    Bad("key ..", 422, "invalid_request", "key", setter("key", value="..")),
    Bad("key with U+0085 (NEL)", 422, "invalid_request", "key", setter("key", value="a\x85b")),
    Bad(
        "tag name with a C1 control character",
        422,
        "invalid_request",
        "tags.te\\x9bam.[key]",
        setter("tags", value={"te\x9bam": "x"}),
    ),
    Bad(
        "metric name with NUL",
        422,
        "invalid_request",
        "metrics.a\\x00uc.[key]",
        setter("metrics", value={"a\x00uc": 0.5}),
    ),
    Bad(
        "tag name of 300 characters with control characters",
        422,
        "invalid_request",
        "tags." + "\\x01" * 40 + "....[key]",
        setter("tags", value={"\x01" * 300: "x"}),
    ),
    Bad(
        "key longer than 200 characters",
        422,
        "invalid_request",
        "key",
        setter("key", value="k" * 201),
    ),
    Bad(
        "text with a lone surrogate",
        422,
        "invalid_request",
        "parent",
        setter("parent", value="\ud800"),
    ),
    Bad(
        "trained_until without a time zone",
        422,
        "invalid_request",
        "trained_until",
        setter("trained_until", value="2026-12-01T02:44:00"),
    ),
    Bad(
        "trained_until not a time",
        422,
        "invalid_request",
        "trained_until",
        setter("trained_until", value="yesterday"),
    ),
    Bad(
        "trained_until NaN",
        422,
        "invalid_request",
        "trained_until",
        setter("trained_until", value=NAN),
    ),
    Bad(
        "rows_trained negative",
        422,
        "invalid_request",
        "rows_trained",
        setter("rows_trained", value=-1),
    ),
    Bad(
        "rows_trained above 2^63 - 1",
        422,
        "invalid_request",
        "rows_trained",
        setter("rows_trained", value=2**63),
    ),
    Bad(
        "rows_trained as text",
        422,
        "invalid_request",
        "rows_trained",
        setter("rows_trained", value="5"),
    ),
    Bad("metric NaN", 422, "invalid_request", "metrics.auc", setter("metrics", "auc", value=NAN)),
    Bad(
        "metric Infinity",
        422,
        "invalid_request",
        "metrics.auc",
        setter("metrics", "auc", value=INF),
    ),
    Bad(
        "metric as text",
        422,
        "invalid_request",
        "metrics.auc",
        setter("metrics", "auc", value="0.7"),
    ),
    Bad("metric true", 422, "invalid_request", "metrics.auc", setter("metrics", "auc", value=True)),
    Bad(
        "tag value with NUL",
        422,
        "invalid_request",
        "tags.team",
        setter("tags", value={"team": "a\x00b"}),
    ),
    Bad(
        "tag value not text", 422, "invalid_request", "tags.team", setter("tags", value={"team": 3})
    ),
    Bad(
        "code_version longer than 200 characters",
        422,
        "invalid_request",
        "code_version",
        setter("code_version", value="c" * 201),
    ),
    # the sample
    Bad("score missing", 422, "invalid_request", "sample.score", remover("sample", "score")),
    Bad(
        "score not an array",
        422,
        "invalid_request",
        "sample.score",
        setter("sample", "score", value="0.5"),
    ),
    Bad(
        "score value as text",
        422,
        "invalid_request",
        "sample.score[3]",
        setter("sample", "score", 3, value="0.5"),
    ),
    Bad(
        "score value true",
        422,
        "invalid_request",
        "sample.score[3]",
        setter("sample", "score", 3, value=True),
    ),
    Bad(
        "score value an array",
        422,
        "invalid_request",
        "sample.score[3]",
        setter("sample", "score", 3, value=[0.5]),
    ),
    Bad(
        "score integer beyond the float range",
        422,
        "invalid_request",
        "sample.score[3]",
        setter("sample", "score", 3, value=10**400),
    ),
    Bad(
        "columns of different lengths",
        422,
        "invalid_request",
        "sample.label",
        setter("sample", "label", value=[0] * (ROWS - 1)),
    ),
    Bad(
        "duplicate row ids",
        422,
        "duplicate_row_id",
        "sample.row_id[39]",
        setter("sample", "row_id", value=[f"r{i}" for i in range(ROWS - 1)] + ["r7"]),
    ),
    Bad(
        "label NaN",
        422,
        "invalid_request",
        "sample.label[2]",
        setter("sample", "label", 2, value=NAN),
    ),
    Bad(
        "label Infinity",
        422,
        "invalid_request",
        "sample.label[2]",
        setter("sample", "label", 2, value=INF),
    ),
    Bad(
        "rank 0",
        422,
        "invalid_request",
        "sample.rank[0]",
        setter("sample", "rank", value=[0] * ROWS),
    ),
    Bad(
        "rank 10^30",
        422,
        "invalid_request",
        "sample.rank[0]",
        setter("sample", "rank", value=[10**30] * ROWS),
    ),
    Bad(
        "unknown sample column",
        422,
        "invalid_request",
        "sample.colour",
        setter("sample", "colour", value=["red"] * ROWS),
    ),
    Bad(
        "segment column name with a space",
        422,
        "invalid_request",
        "sample.segment.a b",
        setter("sample", "segment.a b", value=["x"] * ROWS),
    ),
    Bad(
        "segment column not an array",
        422,
        "invalid_request",
        "sample.segment.device",
        setter("sample", "segment.device", value="app"),
    ),
    Bad(
        "segment value a number with a fraction",
        422,
        "invalid_request",
        "sample.segment.device[0]",
        setter("sample", "segment.device", 0, value=1.5),
    ),
    Bad(
        "segment value null",
        422,
        "invalid_request",
        "sample.segment.device[0]",
        setter("sample", "segment.device", 0, value=None),
    ),
    Bad(
        "segment value with a lone surrogate",
        422,
        "invalid_request",
        "sample.segment.device[0]",
        setter("sample", "segment.device", 0, value="\udfff"),
    ),
    Bad(
        "segment value with NUL",
        422,
        "invalid_request",
        "sample.segment.device[0]",
        setter("sample", "segment.device", 0, value="a\x00pp"),
    ),
    Bad(
        "segment value with U+0085 (NEL)",
        422,
        "invalid_request",
        "sample.segment.device[0]",
        setter("sample", "segment.device", 0, value="a\x85pp"),
    ),
    Bad(
        "segment value longer than 200 characters",
        422,
        "invalid_request",
        "sample.segment.device[0]",
        setter("sample", "segment.device", 0, value="w" * 201),
    ),
    Bad(
        "more rows than TIDEGATE_MAX_ROWS",
        422,
        "too_many_rows",
        "sample.score",
        chain(
            setter("sample", "score", value=[0.5] * (MAX_ROWS + 1)),
            setter("sample", "label", value=[0] * (MAX_ROWS + 1)),
            setter("sample", "segment.device", value=["app"] * (MAX_ROWS + 1)),
        ),
    ),
    Bad(
        "more columns than TIDEGATE_MAX_COLUMNS",
        422,
        "too_many_columns",
        "sample",
        lambda b: b["sample"].update({f"segment.s{i}": ["a"] * ROWS for i in range(MAX_COLUMNS)}),
    ),
    # the path and the query
    Bad(
        "model name with a space",
        422,
        "invalid_request",
        "model",
        None,
        path="/v1/models/shelf%20ranker/snapshots",
    ),
    Bad(
        "verdict id beyond 64 bits",
        422,
        "invalid_request",
        "path.verdict_id",
        path="/v1/verdicts/99999999999999999999999",
        method="GET",
    ),
    Bad(
        "verdict id beyond 32 bits",
        422,
        "invalid_request",
        "path.verdict_id",
        path="/v1/verdicts/2147483648",
        method="GET",
    ),
    Bad(
        "forged cursor",
        422,
        "invalid_request",
        "query.cursor",
        path="/v1/models/shelf-ranker/verdicts?cursor=bm90LW91cnM",
        method="GET",
    ),
    Bad(
        "cursor beyond 32 bits",
        422,
        "invalid_request",
        "query.cursor",
        path="/v1/models/shelf-ranker/verdicts?cursor=djE6MjE0NzQ4MzY0OA",
        method="GET",
    ),
    Bad(
        "since without a time zone",
        422,
        "invalid_request",
        "query.since",
        path="/v1/models/shelf-ranker/verdicts?since=2026-12-01T00:00:00",
        method="GET",
    ),
    Bad(
        "limit 0",
        422,
        "invalid_request",
        "query.limit",
        path="/v1/models/shelf-ranker/verdicts?limit=0",
        method="GET",
    ),
    Bad(
        "baseline reason empty",
        422,
        "invalid_request",
        "reason",
        method="PUT",
        raw=b'{"snapshot": "first", "reason": ""}',
        path="/v1/models/shelf-ranker/baseline",
    ),
    Bad(
        "baseline reason with NUL",
        422,
        "invalid_request",
        "reason",
        method="PUT",
        raw=b'{"snapshot": "first", "reason": "a\\u0000"}',
        path="/v1/models/shelf-ranker/baseline",
    ),
]


@pytest.fixture
def limited(make_api: Callable[..., Api]) -> Api:
    api = make_api(max_body_bytes=MAX_BODY, max_rows=MAX_ROWS, max_columns=MAX_COLUMNS)
    first = api.post("shelf-ranker", snapshot_body("first", step=1, rows=ROWS))
    assert first.status_code == 201
    return api


def send(api: Api, case: Bad) -> Any:
    if case.raw is not None:
        content = case.raw
    elif case.mutate is not None:
        body = snapshot_body("bad", step=2, rows=ROWS)
        body["sample"]["row_id"] = [f"r{i}" for i in range(ROWS)]
        case.mutate(body)
        content = json.dumps(body, allow_nan=True).encode("utf-8", "surrogatepass")
    else:
        content = b"" if case.method == "GET" else json.dumps(snapshot_body("p")).encode()
    headers = {**api.headers(), "content-type": case.content_type}
    return api.client.request(case.method, case.path, content=content or None, headers=headers)


def test_every_bad_input_gets_its_error_and_stores_nothing(limited: Api) -> None:
    api = limited
    before = row_counts(api)
    wrong = []
    for case in BAD_INPUTS:
        response = send(api, case)
        body = strict_json(response.text)
        error = body.get("error") or {}
        got = (response.status_code, error.get("code"), error.get("field"))
        if got != (case.status, case.code, case.field):
            wrong.append(
                f"{case.label}: expected {(case.status, case.code, case.field)}, "
                f"got {got}: {response.text[:200]}"
            )
        assert error.get("message"), case.label
        assert all("input" not in d for d in error.get("details", [])), case.label
        # errors quote input only as a short escaped prefix: no control character comes back,
        # and no field path is longer than a short prefix of a name would make it
        echoed = [error.get("message") or "", error.get("field") or ""] + [
            str(d.get(k) or "") for d in error.get("details", []) for k in ("field", "message")
        ]
        assert not any(has_control(text) for text in echoed), case.label
        assert len(error.get("field") or "") <= 200, case.label
    assert not wrong, "\n".join(wrong)
    assert row_counts(api) == before  # not a row more, for any of them


def test_a_reused_key_with_other_content_is_a_conflict(limited: Api) -> None:
    api = limited
    before = row_counts(api)
    response = api.post("shelf-ranker", snapshot_body("first", step=1, rows=ROWS, shift=0.1))
    assert (response.status_code, response.json()["error"]["code"]) == (409, "conflict")
    assert response.json()["error"]["field"] == "key"
    assert row_counts(api) == before
    retry = api.post("shelf-ranker", snapshot_body("first", step=1, rows=ROWS))
    assert retry.status_code == 200 and row_counts(api) == before


@pytest.mark.parametrize(
    ("label", "score", "finding"),
    [
        ("score NaN, Infinity or null", [NAN, INF, None], "health.non-finite"),
        ("score 1e308", [1e308, -1e308, 1e308], "health.range"),
    ],
)
def test_scores_the_model_produced_are_judged_not_rejected(
    limited: Api, label: str, score: list[Any], finding: str
) -> None:
    api = limited
    body = snapshot_body("odd", step=3, rows=ROWS)
    body["sample"]["score"][: len(score)] = score
    response = api.client.post(
        "/v1/models/shelf-ranker/snapshots",
        headers={**api.headers(), "content-type": "application/json"},
        content=json.dumps(body, allow_nan=True),
    )
    assert response.status_code == 201, response.text
    verdict = strict_json(response.text)
    assert verdict["decision"] == "hold"
    breached = {f["check"] for f in verdict["findings"] if f["outcome"] == "breach"}
    assert finding in breached
    stored = api.client.get("/v1/models/shelf-ranker/snapshots/odd", headers=api.headers())
    strict_json(stored.text)
    assert stored.json()["sample_rows"] == ROWS


def test_a_streamed_body_past_the_limit_is_refused(limited: Api) -> None:
    api = limited
    before = row_counts(api)

    def chunks() -> Any:
        yield b'{"key": "stream", "tags": {"t": "'
        for _ in range(MAX_BODY // 1024 + 2):
            yield b"x" * 1024
        yield b'"}}'

    response = api.client.post(
        "/v1/models/shelf-ranker/snapshots",
        content=chunks(),
        headers={**api.headers(), "content-type": "application/json"},
    )
    assert response.status_code == 413
    assert strict_json(response.text)["error"]["code"] == "payload_too_large"
    assert row_counts(api) == before


def test_the_body_limit_answers_before_reading_the_body() -> None:
    """Pure ASGI: a declared Content-Length over the limit is refused without a single read;
    a streamed body stops being read at the chunk that passes the limit."""
    reads = 0
    sent: list[dict[str, Any]] = []

    async def app(scope: Any, receive: Any, send: Any) -> None:
        while True:
            message = await receive()
            if not message.get("more_body"):
                break
        await send({"type": "http.response.start", "status": 200, "headers": []})
        await send({"type": "http.response.body", "body": b"{}"})

    async def receive() -> dict[str, Any]:
        nonlocal reads
        reads += 1
        return {"type": "http.request", "body": b"x" * 600, "more_body": reads < 100}

    async def capture(message: dict[str, Any]) -> None:
        sent.append(message)

    limit = BodyLimit(app, limit=1024)
    scope = {
        "type": "http",
        "method": "POST",
        "path": "/",
        "headers": [(b"content-length", b"60000")],
    }
    asyncio.run(limit(scope, receive, capture))
    assert reads == 0 and sent[0]["status"] == 413

    sent.clear()
    scope["headers"] = []
    asyncio.run(limit(scope, receive, capture))
    assert reads == 2 and sent[0]["status"] == 413  # 600 + 600 > 1024: stopped at the second


def test_the_readme_lists_every_bad_input() -> None:
    readme = (ROOT / "README.md").read_text("utf-8")
    section = readme.split("## Security and reliability", 1)[-1]
    missing = [case.label for case in BAD_INPUTS if case.label not in section]
    assert not missing, f"add these to the README's bad-input table: {missing}"
