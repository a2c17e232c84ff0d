"""``multipart/form-data`` (RFC 7578) split into parts that are views of the body, not copies.

The body is already in memory (decoded, within the size limit), so the parts are found with
``bytes.find`` and handed on as :class:`memoryview` slices: an Arrow part of 100 MB is read
by pyarrow where it lies. (python-multipart, which FastAPI uses for forms, streams each part into
a spooled temporary file: two more copies of the largest thing in the request.)
"""

from __future__ import annotations

from dataclasses import dataclass
from email.message import Message

from service.errors import InvalidInput

MAX_PARTS = 16
MAX_HEADER_BYTES = 8192


@dataclass(frozen=True)
class Part:
    name: str
    content_type: str
    filename: str | None
    data: memoryview


def _params(header_value: str) -> Message:
    message = Message()
    message["content-type"] = header_value
    return message


def boundary_of(content_type: str) -> str:
    boundary = _params(content_type).get_param("boundary")
    if not isinstance(boundary, str) or not 0 < len(boundary) <= 200:
        raise InvalidInput(
            "multipart/form-data needs a boundary parameter in its Content-Type",
            field="Content-Type",
        )
    return boundary


def _headers(raw: bytes | bytearray) -> dict[str, str]:
    out: dict[str, str] = {}
    for line in raw.decode("utf-8", "replace").split("\r\n"):
        if not line.strip():
            continue
        name, sep, value = line.partition(":")
        if not sep:
            raise InvalidInput("a multipart part has a malformed header line", field="body")
        out[name.strip().lower()] = value.strip()
    return out


def split(body: bytes | bytearray, content_type: str) -> dict[str, Part]:
    """The named parts of a multipart/form-data *body*; 422 when it is malformed or a name
    repeats."""
    delimiter = b"--" + boundary_of(content_type).encode("latin-1", "replace")
    view = memoryview(body)
    if body.startswith(delimiter):
        pos = len(delimiter)
    else:
        start = body.find(b"\r\n" + delimiter)
        if start < 0:
            raise InvalidInput("the multipart body has no part", field="body")
        pos = start + 2 + len(delimiter)
    parts: dict[str, Part] = {}
    closing = b"\r\n" + delimiter
    while True:
        if body.startswith(b"--", pos):
            return parts  # the closing delimiter; the epilogue is ignored
        line_end = body.find(b"\r\n", pos)
        if line_end < 0 or body[pos:line_end].strip(b" \t"):
            raise InvalidInput("the multipart body is malformed after a boundary", field="body")
        head_end = body.find(b"\r\n\r\n", line_end, line_end + MAX_HEADER_BYTES)
        if head_end < 0:
            raise InvalidInput("a multipart part's headers do not end", field="body")
        headers = _headers(body[line_end + 2 : head_end])
        content_start = head_end + 4
        content_end = body.find(closing, content_start)
        if content_end < 0:
            raise InvalidInput(
                "the multipart body is truncated (no closing boundary)", field="body"
            )
        disposition_params = headers.get("content-disposition", "").partition(";")[2]
        disposition = _params("form-data; " + disposition_params)
        name = disposition.get_param("name")
        if not isinstance(name, str) or not name:
            raise InvalidInput("a multipart part has no name", field="body")
        if name in parts:
            raise InvalidInput(f"the multipart part {name!r} appears twice", field=name[:100])
        if len(parts) >= MAX_PARTS:
            raise InvalidInput(f"more than {MAX_PARTS} multipart parts", field="body")
        filename = disposition.get_param("filename")
        parts[name] = Part(
            name=name,
            content_type=headers.get("content-type", "text/plain").split(";")[0].strip().lower(),
            filename=filename if isinstance(filename, str) else None,
            data=view[content_start:content_end],
        )
        pos = content_end + len(closing)
