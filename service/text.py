"""Rules for text that comes in (names, keys, tags, sample values) and for echoing it back.

* Control characters are refused: C0 (U+0000-U+001F, NUL included), DEL (U+007F) and C1
  (U+0080-U+009F, NEL U+0085 included). They are invisible or move the cursor on a terminal
  or a page, PostgreSQL text cannot hold NUL, and NEL breaks lines in some readers.
* ``.`` and ``..`` are refused as keys: a page address holding one resolves to another page.
* An error quotes input only as :func:`shown` gives it: a short prefix, escaped.
"""

from __future__ import annotations

import re

#: One control character (C0, DEL, C1). As a character class for schema patterns.
CONTROL_CLASS = "\\x00-\\x1f\\x7f-\\x9f"
CONTROL = re.compile(f"[{CONTROL_CLASS}]")
_CONTROL_BUT_RS = re.compile("[\\x00-\\x1d\\x1f\\x7f-\\x9f]")
#: Keys that address the path itself or its parent.
DOT_KEYS = frozenset({".", ".."})
#: The longest prefix of an input quoted in an error.
SHOWN = 40


def has_control(text: str) -> bool:
    return CONTROL.search(text) is not None


def first_control(values: list[str]) -> int | None:
    """The index of the first value holding a control character, or None (one regular
    expression over all values joined, fast for a whole sample column; value by value only
    when there is one)."""
    if not values:
        return None
    joined = "\x1e".join(values)  # joined by a record separator, itself a control character
    if joined.count("\x1e") == len(values) - 1 and _CONTROL_BUT_RS.search(joined) is None:
        return None
    return next((i for i, value in enumerate(values) if has_control(value)), None)


def shown(value: object, limit: int = SHOWN, *, quote: bool = True) -> str:
    """*value* quoted for an error message: at most *limit* characters of it, every
    non-printable or non-ASCII character escaped (``\\x85``, ``\\u2028``), ``...`` when cut."""
    text = str(value)
    cut = len(text) > limit
    escaped = text[:limit].encode("ascii", "backslashreplace").decode("ascii")
    escaped = CONTROL.sub(lambda m: f"\\x{ord(m.group()):02x}", escaped)
    if not quote:
        return escaped + ("..." if cut else "")
    return "'" + escaped.replace("'", "\\'") + ("...'" if cut else "'")
