"""How the pages write times, ages and numbers: UTC with relative ages, rounded with units.

Every function takes what the read models hold (ISO 8601 text or datetimes, floats or None)
and returns text; None becomes an en dash so an empty cell still reads as "nothing here".
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from datetime import UTC, datetime
from typing import Any
from urllib.parse import quote

DASH = "–"


def parse_time(value: str | datetime | None) -> datetime | None:
    if value is None or value == "":
        return None
    if isinstance(value, datetime):
        moment = value
    else:
        moment = datetime.fromisoformat(value.replace("Z", "+00:00"))
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    return moment.astimezone(UTC)


def utc_text(value: str | datetime | None, *, seconds: bool = False) -> str:
    """``2026-12-01 02:45 UTC``."""
    moment = parse_time(value)
    if moment is None:
        return DASH
    return moment.strftime("%Y-%m-%d %H:%M:%S UTC" if seconds else "%Y-%m-%d %H:%M UTC")


def duration_text(seconds: float | None) -> str:
    """A span in the two largest units: ``45 s``, ``12 min``, ``3 h 5 min``, ``2 d 4 h``."""
    if seconds is None or not math.isfinite(seconds):
        return DASH
    total = int(round(abs(seconds)))
    days, rest = divmod(total, 86400)
    hours, rest = divmod(rest, 3600)
    minutes, secs = divmod(rest, 60)
    if days:
        return f"{days} d {hours} h" if hours else f"{days} d"
    if hours:
        return f"{hours} h {minutes} min" if minutes else f"{hours} h"
    if minutes:
        return f"{minutes} min"
    return f"{secs} s"


def age_text(value: str | datetime | None, now: datetime) -> str:
    """``12 min ago`` (or ``in 5 min`` for a time after *now*)."""
    moment = parse_time(value)
    if moment is None:
        return DASH
    delta = (now - moment).total_seconds()
    if abs(delta) < 60:
        return "just now"
    return f"{duration_text(delta)} ago" if delta > 0 else f"in {duration_text(delta)}"


def num(value: float | None, digits: int = 3) -> str:
    """*digits* significant digits; whole numbers and anything from 1000 up with thousands
    separators; scientific notation only below 0.001."""
    if value is None or not math.isfinite(value):
        return DASH
    if value == 0:
        return "0"
    if abs(value) >= 1000 or (float(value).is_integer() and abs(value) < 1e15):
        return f"{value:,.0f}"
    return f"{value:.{digits}g}"


def signed(value: float | None, digits: int = 3) -> str:
    if value is None or not math.isfinite(value):
        return DASH
    text = num(value, digits)
    return text if value < 0 else f"+{text}"


def pct(value: float | None, digits: int = 1) -> str:
    """A share as a percentage: 0.0287 -> ``2.9 %``."""
    if value is None or not math.isfinite(value):
        return DASH
    return f"{value * 100:.{digits}f} %"


def count(value: int | float | None, unit: str = "") -> str:
    """Thousands separated, with an optional unit: ``1,840,000 rows``."""
    if value is None:
        return DASH
    text = f"{int(value):,}"
    return f"{text} {unit}" if unit else text


def pvalue(value: float | None) -> str:
    if value is None:
        return DASH
    if value < 1e-16:
        return "p < 1e-16"
    if value < 1e-3:
        return f"p = {value:.1e}"
    return f"p = {value:.3f}"


def milliseconds(value: float | None) -> str:
    if value is None:
        return DASH
    return f"{value:.0f} ms" if value >= 10 else f"{value:.1f} ms"


def path_part(value: str) -> str:
    """A model name or snapshot key as one path segment (``/`` never occurs in keys)."""
    return quote(value, safe=":@-._~")


def model_url(model: str) -> str:
    return f"/ui/models/{path_part(model)}"


def snapshot_url(model: str, key: str) -> str:
    """The stable link of a snapshot's verdict page."""
    return f"/ui/models/{path_part(model)}/snapshots/{path_part(key)}"


def state_text(state: dict[str, object] | None) -> str:
    """The decision and baseline of an audit entry's before or after: ``decision hold,
    baseline 2026-12-01T02:30Z``."""
    if not state:
        return DASH
    parts = [
        f"{k} {state[k] if state[k] is not None else 'none'}"
        for k in ("decision", "baseline", "reference")
        if k in state
    ]
    return ", ".join(parts) or DASH


def _change_kind(finding: Mapping[str, Any]) -> str | None:
    details = finding.get("details")
    change = details.get("change") if isinstance(details, Mapping) else None
    return change if isinstance(change, str) else None


#: Statistics whose value is a share of rows (shown as a percentage).
SHARE_STATISTICS = {"non-finite", "range", "saturation", "share-differing"}


def finding_value(finding: Mapping[str, Any]) -> str:
    """A finding's value with its unit: ``96.6 % drop`` for a relative change, ``+0.44
    rise`` for an absolute one, ``3.30 %`` for a share of rows, else rounded."""
    value = finding.get("value")
    if value is None:
        return DASH
    change = _change_kind(finding)
    if change and change.startswith("relative "):
        return f"{pct(value)} {change.removeprefix('relative ')}"
    if change:
        return f"{signed(value)} {change}"
    if finding.get("statistic") in SHARE_STATISTICS:
        return pct(value, 2)
    return num(value)


def finding_limit(finding: Mapping[str, Any]) -> str:
    """A finding's limit in the same unit as :func:`finding_value`."""
    limit = finding.get("limit")
    if limit is None:
        return DASH
    change = _change_kind(finding)
    if (change and change.startswith("relative ")) or finding.get("statistic") in SHARE_STATISTICS:
        return pct(limit, 2 if not change else 1)
    return num(limit)
