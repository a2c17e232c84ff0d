"""Plain-text explanation of a verdict, for the terminal (``tidegate why``)."""

from __future__ import annotations

from typing import Any

MARK = {"breach": "x", "advisory": "!", "inconclusive": "?", "ok": "-", "skipped": " "}
ORDER = {"breach": 0, "inconclusive": 1, "advisory": 2, "ok": 3, "skipped": 4}


def number(value: float | None) -> str:
    if value is None:
        return "n/a"
    if value != 0 and (abs(value) < 1e-3 or abs(value) >= 1e5):
        return f"{value:.3g}"
    return f"{value:.4g}"


def pvalue_text(p: float | None) -> str:
    if p is None:
        return ""
    return "p < 1e-16" if p < 1e-16 else f"p = {p:.3g}"


def explain(verdict: dict[str, Any]) -> str:
    """The verdict as a short report: decision and reasons first, then every finding."""
    lines = []
    decision = verdict["decision"].upper()
    effective = verdict.get("effective_decision", verdict["decision"])
    head = f"{verdict['model']} {verdict['snapshot']}: {decision}"
    if effective != verdict["decision"]:
        head += f" (overridden to {effective.upper()})"
    lines.append(head)
    lines.append(
        f"  judged against baseline {verdict.get('baseline') or '(none)'}"
        f" under policy {verdict.get('policy') or '(none)'} {verdict.get('policy_digest') or ''}"
        f" at {verdict['created_at']}"
    )
    if verdict.get("reasons"):
        lines.append("why:")
        lines.extend(f"  - {reason}" for reason in verdict["reasons"])
    for override in verdict.get("overrides", []):
        lines.append(
            f"override: {override['decision']} by {override['actor']} at "
            f"{override['created_at']}: {override['reason']}"
        )
    lines.append("findings:")
    findings = sorted(verdict.get("findings", []), key=lambda f: ORDER.get(f["outcome"], 9))
    for f in findings:
        parts = [f"[{MARK.get(f['outcome'], '?')}] {f['check']} ({f['kind']}, {f['outcome']})"]
        if f.get("value") is not None:
            parts.append(f"{f.get('statistic') or 'value'} {number(f['value'])}")
        if f.get("limit") is not None:
            parts.append(f"limit {number(f['limit'])}")
        if f.get("interval"):
            low, high = f["interval"]
            parts.append(f"interval [{number(low)}, {number(high)}]")
        if f.get("pvalue") is not None:
            parts.append(pvalue_text(f["pvalue"]))
        lines.append("  " + "; ".join(parts))
        lines.append(f"      {f['message']}")
    return "\n".join(lines)
