"""The verdict page's evidence, ready to draw: overlays per compared side, findings with their
units and drawings, per-check segment tables, list evidence with its Lorenz chart."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from service import explain
from service.web import format, svg

#: CSS class of each side of a comparison: the reference never borrows the baseline's colour.
SIDE_CSS = {"baseline": "tg-base", "reference": "tg-ref", "candidate": "tg-cand"}


def overlay(dist: Mapping[str, Any], other_css: str) -> dict[str, Any]:
    """Both drawings of one distribution overlay: wide (desktop) and narrow (phone)."""
    series = []
    for side, css in (("baseline", other_css), ("candidate", "tg-cand")):
        if dist.get(side):
            s = dist[side]
            series.append(svg.Series(s["label"], s["shares"], css, s.get("mean")))
    return {
        "wide": svg.histogram_overlay(dist["edges"], series),
        "narrow": svg.histogram_overlay(dist["edges"], series, width=340, height=300),
    }


def finding_rows(findings: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Findings in the order the page shows them, with their drawings and how sure the gate
    is of each failed one."""
    few = explain.too_few_rows(findings)
    rows = sorted(findings, key=lambda f: explain.ORDER.get(f["outcome"], 9))
    for f in rows:
        f["other"] = f.get("against") or (
            "baseline" if f.get("baseline_value") is not None else None
        )
        f["value_text"] = format.finding_value(f)
        f["limit_text"] = format.finding_limit(f)
        f["gauge"] = svg.limit_gauge(f.get("value"), f.get("limit"), f["outcome"])
        interval = f.get("interval")
        f["interval_bar"] = (
            svg.interval_bar(interval[0], interval[1], f.get("value"), f.get("limit"))
            if interval
            else None
        )
        if f.get("blocking", True) and f["outcome"] in {"breach", "inconclusive", "underpowered"}:
            f["sureness"] = explain.assess(f, few_rows=few)
        elif few is not None and f.get("kind") not in {"health", "lineage", "metric"}:
            f["sureness"] = ("unreliable", f"computed from only {few[0]:,} rows")
    return rows


#: Per-segment columns checks report (``details.segments``), in the order shown, with a
#: heading; others are left out of the page (the evidence API keeps them all).
SEGMENT_COLUMNS = (
    ("segment", "segment"),
    ("rows", "rows"),
    ("outcome", "result"),
    ("value", "value"),
    ("candidate", "candidate"),
    ("baseline", "{against}"),
    ("other", "{against}"),
    ("change", "change"),
    ("interval", "interval"),
    ("pvalue", "p-value"),
    ("p_worse_adjusted", "p worse (adjusted)"),
    ("error", "note"),
)


def _cell(value: Any) -> str:
    if value is None:
        return format.DASH
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int | float):
        return format.num(float(value))
    if (
        isinstance(value, list)
        and len(value) == 2
        and all(isinstance(x, int | float) for x in value)
    ):
        return f"[{format.num(float(value[0]))}, {format.num(float(value[1]))}]"
    return str(value)


def segment_tables(findings: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """One table per check that reported per-segment rows, its columns named for people and
    its numbers rounded; the other side is named baseline or reference as the check says."""
    tables = []
    for f in findings:
        details = f.get("details") or {}
        rows = details.get("segments") if isinstance(details, Mapping) else None
        if not isinstance(rows, list) or not rows:
            continue
        against = str(f.get("against") or "baseline")
        present = {k for row in rows if isinstance(row, Mapping) for k in row}
        columns = [
            (key, label.format(against=against)) for key, label in SEGMENT_COLUMNS if key in present
        ]
        tables.append(
            {
                "check": f["check"],
                "against": against,
                "columns": [label for _, label in columns],
                "numeric": [key not in {"segment", "outcome", "error"} for key, _ in columns],
                "rows": [
                    [_cell(row.get(key)) for key, _ in columns]
                    for row in rows
                    if isinstance(row, Mapping)
                ],
            }
        )
    return tables


def lists_context(lists: Mapping[str, Any] | None) -> dict[str, Any] | None:
    if not lists:
        return None
    other = f"{lists['against']} {lists['other_key'] or ''}".strip()
    curves = [
        svg.Curve(
            f"{other}: Gini {format.num(lists['gini']['other'])}",
            lists["lorenz"]["other"],
            SIDE_CSS.get(lists["against"], "tg-base"),
        ),
        svg.Curve(
            f"candidate: Gini {format.num(lists['gini']['candidate'])}",
            lists["lorenz"]["candidate"],
            "tg-cand",
        ),
    ]
    return {**lists, "other_label": other, "lorenz_chart": svg.lorenz_chart(curves)}
