"""Binary and compressed posts (issue 10, items 1-3): a sample as an Arrow IPC stream or a
Parquet file in a multipart body, bodies compressed with gzip or zstd, and the content digest
that makes a retry in another encoding a retry. On SQLite and PostgreSQL.

References: the Arrow IPC streaming format and the Parquet file format are written here by
pyarrow itself (the reference implementation of both); gzip by the standard library (RFC
1952), zstd by the ``zstandard`` bindings of the reference zstd library (RFC 8878). The digest
is recomputed from its description in the README, independently of service/digest.py.
"""

from __future__ import annotations

import gzip
import hashlib
import io
import json
import math
import uuid
from collections.abc import Callable
from datetime import UTC, datetime
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import zstandard
from sqlalchemy import func, select

from service.store import db as store_db
from service.store import repo
from service.store.tables import Base, ModelRow, SnapshotRow
from tests.databases import Api, snapshot_body

ARROW = "application/vnd.apache.arrow.stream"
PARQUET = "application/vnd.apache.parquet"
ROWS = 60


# --- encoders, written as a client would -------------------------------------------------------


def table_of(sample: dict[str, list[Any]]) -> pa.Table:
    """An Arrow table of a JSON sample: floats stay floats, null stays null."""
    arrays = {}
    for name, values in sample.items():
        if name in {"score", "baseline_score", "served_score"}:
            arrays[name] = pa.array(values, type=pa.float64())
        elif name in {"label", "rank"}:
            arrays[name] = pa.array(values, type=pa.int64())
        else:
            arrays[name] = pa.array(values)
    return pa.table(arrays)


def arrow_bytes(table: pa.Table) -> bytes:
    sink = io.BytesIO()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue()


def parquet_bytes(table: pa.Table) -> bytes:
    sink = io.BytesIO()
    pq.write_table(table, sink)
    return sink.getvalue()


def multipart(
    parts: list[tuple[str, bytes, str]], boundary: str | None = None
) -> tuple[bytes, str]:
    """A multipart/form-data body of (name, content, content type) parts."""
    boundary = boundary or uuid.uuid4().hex
    out = b""
    for name, content, ctype in parts:
        out += (
            (
                f'--{boundary}\r\nContent-Disposition: form-data; name="{name}"; '
                f'filename="{name}"\r\nContent-Type: {ctype}\r\n\r\n'
            ).encode()
            + content
            + b"\r\n"
        )
    out += f"--{boundary}--\r\n".encode()
    return out, f"multipart/form-data; boundary={boundary}"


def encoded(
    body: dict[str, Any], encoding: str, compression: str = "none"
) -> tuple[bytes, dict[str, str]]:
    """*body* (a JSON post) as JSON, Arrow or Parquet, compressed or not."""
    if encoding == "json":
        content = json.dumps(body, allow_nan=True).encode()
        ctype = "application/json"
    else:
        meta = {k: v for k, v in body.items() if k != "sample"}
        table = table_of(body["sample"])
        sample = arrow_bytes(table) if encoding == "arrow" else parquet_bytes(table)
        content, ctype = multipart(
            [
                ("snapshot", json.dumps(meta).encode(), "application/json"),
                ("sample", sample, ARROW if encoding == "arrow" else PARQUET),
            ]
        )
    headers = {"content-type": ctype}
    if compression == "gzip":
        content = gzip.compress(content)
        headers["content-encoding"] = "gzip"
    elif compression == "zstd":
        content = zstandard.ZstdCompressor().compress(content)
        headers["content-encoding"] = "zstd"
    return content, headers


def send(api: Api, content: bytes, headers: dict[str, str], model: str = "shelf-ranker") -> Any:
    return api.client.post(
        f"/v1/models/{model}/snapshots", content=content, headers={**api.headers(), **headers}
    )


def rich_body(key: str, *, step: int, seed: int = 7, shift: float = 0.0) -> dict[str, Any]:
    """A post with every kind of column: scores with a null and a NaN, labels, baseline scores,
    integer row ids, ranks, a segment."""
    body = snapshot_body(key, step=step, rows=ROWS, seed=seed, shift=shift)
    rng = np.random.default_rng(seed + 100)
    sample = body["sample"]
    sample["score"][5] = None
    sample["score"][9] = math.nan
    sample["baseline_score"] = [round(float(v), 6) for v in rng.random(ROWS)]
    sample["row_id"] = list(range(1000, 1000 + ROWS))
    sample["rank"] = [int(v) for v in rng.integers(1, 11, ROWS)]
    return body


def row_counts(api: Api) -> dict[str, int]:
    engine = store_db.make_engine(api.settings)
    with store_db.read_transaction(store_db.make_sessionmaker(engine)) as session:
        out = {
            t.name: int(session.scalar(select(func.count()).select_from(t)) or 0)
            for t in Base.metadata.sorted_tables
        }
    engine.dispose()
    return out


def stored_sample(api: Api, model: str, key: str) -> dict[str, np.ndarray]:
    engine = store_db.make_engine(api.settings)
    with store_db.read_transaction(store_db.make_sessionmaker(engine)) as session:
        model_row = session.scalar(select(ModelRow).where(ModelRow.name == model))
        assert model_row is not None
        snap = repo.get_snapshot(session, model_id=model_row.id, key=key)
        assert snap is not None
        sample = repo.load_sample(session, snapshot_id=snap.id)
    engine.dispose()
    assert sample is not None
    return dict(sample.columns)


def comparable(verdict: dict[str, Any]) -> dict[str, Any]:
    """What must not depend on the encoding: the decision, reasons and every finding."""
    return {k: verdict[k] for k in ("decision", "reasons", "findings", "baseline", "policy")}


def readme_digest(body: dict[str, Any]) -> str:
    """The digest as the README's "Content digest" section describes it, from the JSON post."""
    trained = body.get("trained_until")
    if trained is not None:
        trained = (
            datetime.fromisoformat(trained.replace("Z", "+00:00"))
            .astimezone(UTC)
            .strftime("%Y-%m-%dT%H:%M:%S.%fZ")
        )
    meta = {
        "key": body["key"],
        "parent": body.get("parent"),
        "trained_until": trained,
        "code_version": body.get("code_version"),
        "rows_trained": body.get("rows_trained"),
        "metrics": body.get("metrics", {}),
        "tags": body.get("tags", {}),
    }

    def canon(value: Any) -> bytes:
        return json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=True).encode()

    h = hashlib.sha256(b"tidegate-post-digest/1\n" + canon(meta) + b"\n")
    numeric = {"score", "label", "baseline_score", "served_score", "rank"}
    for name in sorted(body.get("sample", {}), key=lambda n: n.encode()):
        values = body["sample"][name]
        if name in numeric:
            floats = np.array([math.nan if v is None else v for v in values], dtype="<f8")
            floats[np.isnan(floats)] = math.nan
            payload = floats.tobytes()
            kind = "f8"
        else:
            distinct: dict[str, int] = {}
            codes = [distinct.setdefault(str(v), len(distinct)) for v in values]
            payload = canon(list(distinct)) + b"\n" + np.array(codes, dtype="<u4").tobytes()
            kind = "text"
        h.update(f"{name}\n{kind}\n{len(values)}\n".encode() + payload)
    return "sha256:" + h.hexdigest()


# --- same content, any encoding ----------------------------------------------------------------


@pytest.mark.parametrize("encoding", ["arrow", "parquet"])
def test_binary_posts_equal_the_json_post(api: Api, encoding: str) -> None:
    first, second = rich_body("s1", step=1), rich_body("s2", step=2, seed=8, shift=0.3)
    verdicts = {}
    for enc in ("json", encoding):
        model = f"shelf-{enc}"
        assert send(api, *encoded(first, enc), model=model).status_code == 201
        response = send(api, *encoded(second, enc), model=model)
        assert response.status_code == 201, response.text
        verdicts[enc] = response.json()
    assert verdicts["json"]["decision"] == "hold"  # the shift breaches the test policy's PSI
    assert comparable(verdicts[encoding]) == comparable(verdicts["json"])
    for key, body in (("s1", first), ("s2", second)):
        views = [
            api.client.get(f"/v1/models/shelf-{enc}/snapshots/{key}", headers=api.headers()).json()
            for enc in ("json", encoding)
        ]
        assert views[0]["content_digest"] == views[1]["content_digest"] == readme_digest(body)
        assert views[0]["summary"] == views[1]["summary"]
        from_json = stored_sample(api, "shelf-json", key)
        from_binary = stored_sample(api, f"shelf-{encoding}", key)
        assert sorted(from_json) == sorted(from_binary)
        for name, values in from_json.items():
            if values.dtype == object:
                assert values.tolist() == from_binary[name].tolist(), name
            else:
                np.testing.assert_array_equal(values, from_binary[name], err_msg=name)
    assert np.isnan(from_json["score"][5]) and np.isnan(from_json["score"][9])
    assert from_json["row_id"][0] == "1000"  # integers in text columns are text


def test_mixed_encodings_of_one_key_are_a_retry(api: Api) -> None:
    body = rich_body("k1", step=1)
    first = send(api, *encoded(body, "json"))
    assert first.status_code == 201
    before = row_counts(api)
    for encoding, compression in [
        ("arrow", "none"),
        ("parquet", "zstd"),
        ("json", "gzip"),
        ("arrow", "gzip"),
        ("json", "zstd"),
    ]:
        retry = send(api, *encoded(body, encoding, compression))
        assert retry.status_code == 200, (encoding, compression, retry.text)
        assert retry.json()["verdict_id"] == first.json()["verdict_id"]
    # an offset in trained_until names the same instant: still the same content
    same_instant = {**body, "trained_until": body["trained_until"].replace("+00:00", "Z")}
    assert send(api, *encoded(same_instant, "arrow")).status_code == 200
    changed = rich_body("k1", step=1)
    changed["sample"]["score"][0] = 0.123456
    conflict = send(api, *encoded(changed, "parquet"))
    assert (conflict.status_code, conflict.json()["error"]["code"]) == (409, "conflict")
    assert row_counts(api) == before


def test_a_parquet_file_from_curl_style_upload(api: Api) -> None:
    """What README's curl example sends: parts with application/octet-stream (curl's default
    for a file) are told apart by their first bytes."""
    body = rich_body("curl", step=1)
    meta = {k: v for k, v in body.items() if k != "sample"}
    content, ctype = multipart(
        [
            ("snapshot", json.dumps(meta).encode(), "application/octet-stream"),
            ("sample", parquet_bytes(table_of(body["sample"])), "application/octet-stream"),
        ]
    )
    response = send(api, content, {"content-type": ctype})
    assert response.status_code == 201, response.text


def test_the_openapi_schema_documents_the_multipart_form(api: Api) -> None:
    schema = api.client.get("/openapi.json").json()
    content = schema["paths"]["/v1/models/{model}/snapshots"]["post"]["requestBody"]["content"]
    assert content["application/json"]["schema"]["$ref"] == "#/components/schemas/SnapshotCreate"
    form = content["multipart/form-data"]
    assert form["schema"]["required"] == ["snapshot", "sample"]
    assert form["schema"]["properties"]["sample"]["format"] == "binary"
    assert ARROW in form["encoding"]["sample"]["contentType"]
    components = schema["components"]["schemas"]
    assert "sample" not in components["SnapshotMeta"]["properties"]
    assert "sample" in components["SnapshotCreate"]["properties"]
    # every reference resolves
    text = json.dumps(schema)
    for ref in {part.split('"')[0] for part in text.split('"$ref": "')[1:]}:
        assert ref.rsplit("/", 1)[-1] in components, ref


# --- bad input: a 4xx naming the field, nothing stored -----------------------------------------


def bomb(compression: str, size: int) -> bytes:
    """A JSON-looking body that inflates to *size* bytes of spaces, compressed in pieces (the
    whole is never in memory here either)."""
    head = b'{"key": "bomb", "tags": {"t": "'
    chunk = b" " * (1 << 20)
    if compression == "gzip":
        deflate = __import__("zlib").compressobj(9, wbits=16 + 15)
        out = [deflate.compress(head)]
        out += [deflate.compress(chunk) for _ in range(size >> 20)]
        out.append(deflate.flush())
        return b"".join(out)
    cctx = zstandard.ZstdCompressor(level=3).compressobj()
    out = [cctx.compress(head)]
    out += [cctx.compress(chunk) for _ in range(size >> 20)]
    out.append(cctx.flush())
    return b"".join(out)


def multipart_of(
    sample: bytes, ctype: str = ARROW, meta: dict[str, Any] | None = None
) -> tuple[bytes, dict[str, str]]:
    meta = meta if meta is not None else {"key": "bad", "trained_until": "2026-12-01T01:00:00Z"}
    content, multipart_type = multipart(
        [("snapshot", json.dumps(meta).encode(), "application/json"), ("sample", sample, ctype)]
    )
    return content, {"content-type": multipart_type}


def table_with(**columns: pa.Array) -> pa.Table:
    base = {
        "score": pa.array(np.linspace(0.1, 0.9, ROWS)),
        "label": pa.array([i % 2 for i in range(ROWS)], type=pa.int64()),
        "segment.device": pa.array(["app", "web"] * (ROWS // 2)),
    }
    base.update(columns)
    return pa.table(base)


def arrow_case(**columns: pa.Array) -> Callable[[], tuple[bytes, dict[str, str]]]:
    return lambda: multipart_of(arrow_bytes(table_with(**columns)))


def parquet_case(**columns: pa.Array) -> Callable[[], tuple[bytes, dict[str, str]]]:
    return lambda: multipart_of(parquet_bytes(table_with(**columns)), PARQUET)


GOOD_ARROW = arrow_bytes(table_with())
LONG = "w" * 201
BAD_POSTS: list[tuple[str, Callable[[], tuple[bytes, dict[str, str]]], int, str, str | None]] = [
    (
        "Arrow part that is not Arrow",
        lambda: multipart_of(b"\x00" * 64),
        422,
        "invalid_sample",
        "sample",
    ),
    (
        "Arrow stream cut short",
        lambda: multipart_of(GOOD_ARROW[: len(GOOD_ARROW) // 2]),
        422,
        "invalid_sample",
        "sample",
    ),
    (
        "Parquet part that is not Parquet",
        lambda: multipart_of(b"PAR1" + b"\x01" * 64, PARQUET),
        422,
        "invalid_sample",
        "sample",
    ),
    (
        "Parquet file cut short",
        lambda: multipart_of(parquet_bytes(table_with())[:-20], PARQUET),
        422,
        "invalid_sample",
        "sample",
    ),
    (
        "score as text",
        arrow_case(score=pa.array(["0.5"] * ROWS)),
        422,
        "invalid_request",
        "sample.score",
    ),
    (
        "score as booleans",
        parquet_case(score=pa.array([True] * ROWS)),
        422,
        "invalid_request",
        "sample.score",
    ),
    (
        "label null",
        arrow_case(label=pa.array([0, 1, None] + [0] * (ROWS - 3))),
        422,
        "invalid_request",
        "sample.label[2]",
    ),
    (
        "label NaN",
        parquet_case(label=pa.array([0.0, 1.0, math.nan] + [0.0] * (ROWS - 3))),
        422,
        "invalid_request",
        "sample.label[2]",
    ),
    (
        "rank as floats",
        arrow_case(rank=pa.array([1.0] * ROWS)),
        422,
        "invalid_request",
        "sample.rank",
    ),
    (
        "rank 0",
        arrow_case(rank=pa.array([1, 0] + [1] * (ROWS - 2))),
        422,
        "invalid_request",
        "sample.rank[1]",
    ),
    (
        "segment as floats",
        arrow_case(**{"segment.device": pa.array([1.5] * ROWS)}),
        422,
        "invalid_request",
        "sample.segment.device",
    ),
    (
        "segment null",
        parquet_case(**{"segment.device": pa.array(["app", None] * (ROWS // 2))}),
        422,
        "invalid_request",
        "sample.segment.device[1]",
    ),
    (
        "segment value too long",
        arrow_case(**{"segment.device": pa.array(["a"] * 7 + [LONG] * 53)}),
        422,
        "invalid_request",
        "sample.segment.device[7]",
    ),
    (
        "unknown column",
        arrow_case(colour=pa.array(["red"] * ROWS)),
        422,
        "invalid_request",
        "sample.colour",
    ),
    (
        "duplicate row ids",
        arrow_case(row_id=pa.array(list(range(ROWS - 1)) + [7])),
        422,
        "duplicate_row_id",
        f"sample.row_id[{ROWS - 1}]",
    ),
    (
        "no score column",
        lambda: multipart_of(arrow_bytes(table_with().drop_columns(["score"]))),
        422,
        "invalid_request",
        "sample.score",
    ),
    (
        "snapshot part missing",
        lambda: (lambda c: (c[0], {"content-type": c[1]}))(
            multipart([("sample", GOOD_ARROW, ARROW)])
        ),
        422,
        "invalid_request",
        "snapshot",
    ),
    (
        "sample part missing",
        lambda: (lambda c: (c[0], {"content-type": c[1]}))(
            multipart([("snapshot", b'{"key": "x"}', "application/json")])
        ),
        422,
        "invalid_request",
        "sample",
    ),
    (
        "an unknown part",
        lambda: (lambda c: (c[0], {"content-type": c[1]}))(
            multipart(
                [
                    ("snapshot", b'{"key": "x"}', "application/json"),
                    ("sample", GOOD_ARROW, ARROW),
                    ("extra", b"1", "text/plain"),
                ]
            )
        ),
        422,
        "invalid_request",
        "extra",
    ),
    (
        "sample inside the snapshot part",
        lambda: multipart_of(GOOD_ARROW, meta={"key": "x", "sample": {"score": [0.5]}}),
        422,
        "invalid_request",
        "sample",
    ),
    (
        "snapshot part with a bad key",
        lambda: multipart_of(GOOD_ARROW, meta={"key": "a/b"}),
        422,
        "invalid_request",
        "key",
    ),
    (
        "snapshot part not JSON",
        lambda: (lambda c: (c[0], {"content-type": c[1]}))(
            multipart([("snapshot", b"{key", "application/json"), ("sample", GOOD_ARROW, ARROW)])
        ),
        422,
        "invalid_json",
        None,
    ),
    (
        "sample part as CSV",
        lambda: multipart_of(b"score\n0.5\n", "text/csv"),
        415,
        "unsupported_media_type",
        "sample",
    ),
    (
        "multipart without a boundary",
        lambda: (b"--x\r\n", {"content-type": "multipart/form-data"}),
        422,
        "invalid_request",
        "Content-Type",
    ),
    (
        "multipart cut short",
        lambda: (multipart_of(GOOD_ARROW)[0][:-30], multipart_of(GOOD_ARROW)[1]),
        422,
        "invalid_request",
        "body",
    ),
    (
        "Content-Encoding br",
        lambda: (b"{}", {"content-type": "application/json", "content-encoding": "br"}),
        415,
        "unsupported_media_type",
        "Content-Encoding",
    ),
    (
        "gzip body that is not gzip",
        lambda: (b"not gzip", {"content-type": "application/json", "content-encoding": "gzip"}),
        422,
        "invalid_request",
        "Content-Encoding",
    ),
    (
        "zstd body that is not zstd",
        lambda: (b"not zstd", {"content-type": "application/json", "content-encoding": "zstd"}),
        422,
        "invalid_request",
        "Content-Encoding",
    ),
    (
        "gzip bomb, JSON",
        lambda: (
            bomb("gzip", 8 << 20),
            {"content-type": "application/json", "content-encoding": "gzip"},
        ),
        413,
        "payload_too_large",
        "Content-Encoding",
    ),
    (
        "zstd bomb, JSON",
        lambda: (
            bomb("zstd", 8 << 20),
            {"content-type": "application/json", "content-encoding": "zstd"},
        ),
        413,
        "payload_too_large",
        "Content-Encoding",
    ),
    (
        "gzip bomb, multipart Arrow",
        lambda: (
            gzip.compress(multipart_of(GOOD_ARROW + b"\x00" * (8 << 20))[0], 9),
            {**multipart_of(b"")[1], "content-encoding": "gzip"},
        ),
        413,
        "payload_too_large",
        "Content-Encoding",
    ),
    (
        "zstd bomb, multipart Parquet",
        lambda: (
            zstandard.ZstdCompressor().compress(
                multipart_of(b"PAR1" + b"\x00" * (8 << 20), PARQUET)[0]
            ),
            {**multipart_of(b"")[1], "content-encoding": "zstd"},
        ),
        413,
        "payload_too_large",
        "Content-Encoding",
    ),
]


@pytest.fixture
def small_limits(make_api: Callable[..., Api]) -> Api:
    api = make_api(max_body_bytes=1 << 20)
    assert send(api, *encoded(rich_body("first", step=0), "arrow")).status_code == 201
    return api


def test_every_bad_binary_post_gets_its_error_and_stores_nothing(small_limits: Api) -> None:
    api = small_limits
    before = row_counts(api)
    wrong = []
    for label, make, status, code, field in BAD_POSTS:
        content, headers = make()
        response = send(api, content, headers)
        error = response.json().get("error") or {}
        got = (response.status_code, error.get("code"), error.get("field"))
        if got != (status, code, field):
            wrong.append(f"{label}: expected {(status, code, field)}, got {got}: {error}")
        assert error.get("message"), label
    assert not wrong, "\n".join(wrong)
    assert row_counts(api) == before


def test_too_many_rows_in_arrow(make_api: Callable[..., Api]) -> None:
    api = make_api(max_rows=ROWS - 1)
    response = send(api, *multipart_of(arrow_bytes(table_with())))
    assert response.status_code == 422
    assert response.json()["error"]["code"] == "too_many_rows"
    assert response.json()["error"]["field"] == "sample.score"


def test_a_retry_of_a_post_stored_by_version_0_1_is_still_a_retry(api: Api) -> None:
    """Version 0.1 stored sha256 of the parsed body written out again as JSON (the code that
    computed it, in its own words: json.dumps(body.model_dump(), sort_keys=True, default=str,
    allow_nan=True)). A JSON retry after the upgrade still matches it."""
    from service.api.schemas import SnapshotCreate

    body = rich_body("old", step=1)
    assert send(api, *encoded(body, "json")).status_code == 201
    parsed = SnapshotCreate.model_validate(json.loads(json.dumps(body, allow_nan=True)))
    old = json.dumps(parsed.model_dump(), sort_keys=True, default=str, allow_nan=True)
    old_digest = "sha256:" + hashlib.sha256(old.encode("utf-8")).hexdigest()
    engine = store_db.make_engine(api.settings)
    with store_db.transaction(store_db.make_sessionmaker(engine)) as session:
        snap = session.scalar(select(SnapshotRow).where(SnapshotRow.key == "old"))
        assert snap is not None and snap.content_digest != old_digest
        snap.content_digest = old_digest
    engine.dispose()
    assert send(api, *encoded(body, "json")).status_code == 200
    changed = rich_body("old", step=1, seed=9)
    assert send(api, *encoded(changed, "json")).status_code == 409


def test_the_readme_lists_every_bad_binary_post() -> None:
    from pathlib import Path

    readme = (Path(__file__).resolve().parents[2] / "README.md").read_text("utf-8")
    section = readme.split("Binary and compressed posts (", 1)[-1]
    missing = [label for label, *_ in BAD_POSTS if f"| {label} |" not in section]
    assert not missing, f"add these to the README's binary bad-input table: {missing}"
