"""From the bytes of a snapshot post to a validated :class:`~service.intake.SnapshotPost`.

Encodings (README, "Posting a snapshot"):

* ``application/json``: the snapshot's fields with the sample as JSON arrays;
* ``multipart/form-data``: part ``snapshot`` (the same JSON fields without ``sample``) and part
  ``sample``, an Arrow IPC stream (``application/vnd.apache.arrow.stream``) or a Parquet file
  (``application/vnd.apache.parquet``) with columns named as in JSON;

each optionally compressed as a whole with ``Content-Encoding: gzip`` or ``zstd``. Every
encoding of the same content gets the same validation, the same errors and the same digest
(:mod:`service.digest`), so a retry in another encoding is a retry, not a conflict.

Everything here is CPU work on one request's bytes: the route runs :func:`parse_post` in a
worker thread holding a heavy-work slot (:mod:`service.heavy`).
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Callable
from functools import partial
from typing import Any, TypeVar

import pydantic_core
from pydantic import BaseModel, ValidationError

from service.api import columnar, multipart
from service.api.body import decode_body
from service.api.errors import invalid_from_errors
from service.api.sample import Decoded, from_json
from service.api.schemas import SnapshotCreate, SnapshotMeta
from service.digest import post_digest
from service.errors import InvalidInput, UnsupportedMediaType
from service.gate.types import NUMERIC_COLUMNS
from service.intake import SnapshotPost
from service.settings import Settings

JSON = "application/json"
MULTIPART = "multipart/form-data"
#: What an ``application/octet-stream`` sample part is, told by its first bytes.
PARQUET_MAGIC = b"PAR1"
ARROW_STREAM_MAGIC = b"\xff\xff\xff\xff"

M = TypeVar("M", bound=BaseModel)

WHAT_TO_SEND = (
    "send JSON (Content-Type: application/json), or multipart/form-data with a part 'snapshot' "
    "(JSON) and a part 'sample' (application/vnd.apache.arrow.stream or "
    "application/vnd.apache.parquet)"
)


def media_type(content_type: str | None) -> str:
    return (content_type or "").split(";")[0].strip().lower()


def check_media_type(content_type: str | None) -> str:
    """``json`` or ``multipart``; 415 for any other Content-Type."""
    kind = media_type(content_type)
    if kind == JSON or kind.endswith("+json"):
        return "json"
    if kind == MULTIPART:
        return "multipart"
    raise UnsupportedMediaType(WHAT_TO_SEND)


def load_json(data: bytes | bytearray | memoryview) -> Any:
    """Parse JSON (NaN and Infinity allowed, as the trainer's scores may hold them). The fast
    parser refuses some text the standard library reads (lone surrogate escapes); those go to
    the standard library, so what is accepted and the errors stay as they were."""
    try:
        return pydantic_core.from_json(
            data if not isinstance(data, memoryview) else bytes(data), allow_inf_nan=True
        )
    except ValueError:
        pass
    try:
        return json.loads(bytes(data))
    except (ValueError, RecursionError) as exc:
        message = str(exc) if isinstance(exc, ValueError) else "nested too deep"
        raise InvalidInput(f"body is not valid JSON: {message}"[:300], code="invalid_json") from exc


def validate(model: type[M], value: Any, *, prefix: str | None = None) -> M:
    try:
        return model.model_validate(value)
    except ValidationError as exc:
        errors = exc.errors(include_input=False, include_url=False)
        if prefix:
            errors = [{**e, "loc": (prefix, *e["loc"])} for e in errors]
        raise invalid_from_errors(errors) from exc


def _sample_kind(part: multipart.Part) -> str:
    kind = part.content_type
    if kind in columnar.MEDIA_TYPES:
        return kind
    if kind in {"application/octet-stream", "text/plain", ""}:
        head = bytes(part.data[:4])
        if head == PARQUET_MAGIC:
            return columnar.PARQUET
        if head == ARROW_STREAM_MAGIC:
            return columnar.ARROW_STREAM
    raise UnsupportedMediaType(
        f"the sample part is {kind!r}; send {columnar.ARROW_STREAM} or {columnar.PARQUET}",
        field="sample",
    )


def _multipart(
    data: bytes | bytearray, content_type: str, settings: Settings
) -> tuple[SnapshotMeta, Decoded]:
    parts = multipart.split(data, content_type)
    unknown = sorted(set(parts) - {"snapshot", "sample"})
    if unknown:
        raise InvalidInput(
            f"unknown multipart part {unknown[0]!r}; the parts are 'snapshot' and 'sample'",
            field=unknown[0][:100],
        )
    if "snapshot" not in parts:
        raise InvalidInput(
            "the multipart body needs a part 'snapshot' with the snapshot's JSON fields",
            field="snapshot",
        )
    if "sample" not in parts:
        raise InvalidInput(
            "the multipart body needs a part 'sample' (Arrow IPC stream or Parquet); a post "
            "without a sample is sent as JSON",
            field="sample",
        )
    meta_value = load_json(parts["snapshot"].data)
    if isinstance(meta_value, dict) and "sample" in meta_value:
        raise InvalidInput(
            "the sample goes in the part 'sample', not in the snapshot's JSON",
            field="sample",
        )
    meta = validate(SnapshotMeta, meta_value)
    sample = parts["sample"]
    table = columnar.read_table(sample.data, _sample_kind(sample))
    return meta, columnar.from_table(table, settings)


def legacy_digest(created: SnapshotCreate) -> str:
    """The digest of version 0.1: SHA-256 of the parsed body written out again as JSON."""
    canonical = json.dumps(created.model_dump(), sort_keys=True, default=str, allow_nan=True)
    return "sha256:" + hashlib.sha256(canonical.encode("utf-8")).hexdigest()


def parse_post(
    data: bytes | bytearray, *, content_type: str | None, encoding: str, settings: Settings
) -> SnapshotPost:
    """Decode, validate and digest one post; raises InvalidInput (422), PayloadTooLarge (413)
    or UnsupportedMediaType (415). Stores nothing."""
    kind = check_media_type(content_type)
    body = decode_body(data, encoding=encoding, limit=settings.max_body_bytes)
    decoded: Decoded | None
    legacy: Callable[[], str] | None = None
    if kind == "json":
        created = validate(SnapshotCreate, load_json(body))
        decoded = from_json(created.sample, settings) if created.sample is not None else None
        meta: SnapshotMeta = created
        legacy = partial(legacy_digest, created)
    else:
        meta, decoded = _multipart(body, content_type or "", settings)
    fields = meta.model_dump(include=set(SnapshotMeta.model_fields))
    digest = post_digest(
        fields,
        decoded.sample.columns if decoded is not None else None,
        numeric=NUMERIC_COLUMNS,
        factorized=decoded.factorized if decoded is not None else None,
    )
    return SnapshotPost(
        key=meta.key,
        content_digest=digest,
        parent=meta.parent,
        trained_until=meta.trained_until,
        code_version=meta.code_version,
        rows_trained=meta.rows_trained,
        metrics=dict(meta.metrics),
        tags=dict(meta.tags),
        sample=decoded.sample if decoded is not None else None,
        text_codes=dict(decoded.factorized) if decoded is not None else {},
        legacy_digest=legacy,
    )
