"""Request bodies with ``Content-Encoding``: identity, ``gzip`` or ``zstd``.

The limit (``max_body_bytes``) holds for the decoded size. Decoding is a stream with a bounded
output per step, so a small compressed body that would inflate far past the limit (a
"compression bomb") is refused with 413 once the output passes the limit, having produced at
most the limit plus one step of output, never the whole inflated body. The bytes on the wire are
limited before this by :class:`~service.api.middleware.BodyLimit`.
"""

from __future__ import annotations

import zlib
from typing import Any

import zstandard
from starlette.requests import Request

from service.errors import InvalidInput, PayloadTooLarge, UnsupportedMediaType

#: Output produced per decoding step (bounds the overshoot past the limit).
STEP = 1 << 20
ENCODINGS = ("identity", "gzip", "x-gzip", "zstd")


def content_encoding(value: str | None) -> str:
    """The one supported coding named by a ``Content-Encoding`` header; 415 otherwise."""
    codings = [c.strip().lower() for c in (value or "").split(",") if c.strip()]
    codings = [c for c in codings if c != "identity"]
    if not codings:
        return "identity"
    if len(codings) > 1 or codings[0] not in ENCODINGS:
        raise UnsupportedMediaType(
            f"Content-Encoding {value!r} is not supported; use gzip or zstd (or none)",
            field="Content-Encoding",
        )
    return "gzip" if codings[0] == "x-gzip" else codings[0]


def _too_large(limit: int) -> PayloadTooLarge:
    return PayloadTooLarge(
        f"decoded request body larger than {limit} bytes", field="Content-Encoding"
    )


def _gunzip(data: bytes | bytearray, limit: int) -> bytes:
    out: list[bytes] = []
    size = 0
    view = memoryview(data)
    while True:
        inflater = zlib.decompressobj(wbits=16 + zlib.MAX_WBITS)
        pending: bytes | memoryview = view
        while pending:
            chunk = inflater.decompress(pending, STEP)
            size += len(chunk)
            if size > limit:
                raise _too_large(limit)
            out.append(chunk)
            pending = inflater.unconsumed_tail
            if inflater.eof:
                break
        if not inflater.eof:
            raise InvalidInput("gzip body is truncated", field="Content-Encoding")
        rest = inflater.unused_data
        if not rest:
            break
        view = memoryview(rest)  # another gzip member follows (RFC 1952 allows several)
    return b"".join(out)


class _Sink:
    """Where the zstd stream writes its output; refuses to hold more than *limit* bytes."""

    def __init__(self, limit: int) -> None:
        self.limit = limit
        self.parts: list[bytes] = []
        self.size = 0

    def write(self, data: bytes) -> int:
        self.size += len(data)
        if self.size > self.limit:
            raise _too_large(self.limit)
        self.parts.append(bytes(data))
        return len(data)


def _unzstd(data: bytes | bytearray, limit: int) -> bytes:
    sink = _Sink(limit)
    decompressor = zstandard.ZstdDecompressor()
    view = memoryview(data)
    # read_across_frames is not available on stream writers; several frames are decoded one
    # after another by feeding the whole input (the writer continues across frames).
    target: Any = sink
    with decompressor.stream_writer(target, write_size=STEP, closefd=False) as writer:
        for start in range(0, len(view), STEP):
            writer.write(view[start : start + STEP])
        writer.flush()  # type: ignore[no-untyped-call]
    return b"".join(sink.parts)


def decode_body(data: bytes | bytearray, *, encoding: str, limit: int) -> bytes | bytearray:
    """*data* decoded per *encoding* (see :func:`content_encoding`); 413 past *limit*, 422 for
    a body that is not valid in its declared coding."""
    if encoding == "identity":
        if len(data) > limit:
            raise PayloadTooLarge(f"request body larger than {limit} bytes")
        return data
    try:
        if encoding == "gzip":
            return _gunzip(data, limit)
        return _unzstd(data, limit)
    except zlib.error as exc:
        raise InvalidInput(f"body is not valid gzip: {exc}", field="Content-Encoding") from exc
    except zstandard.ZstdError as exc:
        raise InvalidInput(f"body is not valid zstd: {exc}", field="Content-Encoding") from exc


async def receive(request: Request) -> bytes | bytearray:
    """The request body as it came (still encoded), read into one buffer without the extra
    copy of joining chunks when the length is declared. The middleware has already refused a
    body longer than the limit."""
    declared = request.headers.get("content-length", "")
    if not declared.isdigit():
        return b"".join([chunk async for chunk in request.stream()])
    buffer = bytearray(int(declared))
    view = memoryview(buffer)
    pos = 0
    async for chunk in request.stream():
        end = pos + len(chunk)
        if end > len(buffer):
            raise InvalidInput("the body is longer than its Content-Length", field="body")
        view[pos:end] = chunk
        pos = end
    view.release()
    if pos != len(buffer):
        raise InvalidInput("the body is shorter than its Content-Length", field="body")
    return buffer
