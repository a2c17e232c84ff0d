"""A verdict in plain words: the same explanation for the terminal (``tidegate why``) and the
verdict page.

:func:`briefing` answers the four questions of the person on call (why, how sure, what changed,
what can I do) from the verdict and its evidence (the API's verdict and evidence objects);
:func:`explain` renders it as text with a sparkline of both score distributions, and the
verdict page renders the same sections as HTML.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from datetime import UTC, datetime
from typing import Any

MARK = {
    "breach": "x",
    "advisory": "!",
    "inconclusive": "?",
    "underpowered": "~",
    "ok": "-",
    "skipped": " ",
}
ORDER = {
    "breach": 0,
    "inconclusive": 1,
    "underpowered": 2,
    "advisory": 3,
    "ok": 4,
    "skipped": 5,
}
SECTIONS = (
    ("why", "Why"),
    ("how_sure", "How sure"),
    ("what_changed", "What changed"),
    ("what_next", "What you can do"),
)
BLOCKS = "▁▂▃▄▅▆▇█"
ASCII_BLOCKS = ".:-=+*#@"

# How sure (common practice, no source): a breach is "clear" when it is significant at 0.001
# and the statistic is at least 1.5 times its limit; "marginal" when p >= 0.05 or, without a
# p-value or interval, the value is less than twice its limit.
CLEAR_P = 1e-3
WEAK_P = 0.05
CLEAR_RATIO = 1.5
CLEAR_METRIC_RATIO = 2.0


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


def limit_ratio(value: float | None, limit: float | None) -> float | None:
    """How many times its limit a value is, when both lie on the same side of zero."""
    if value is None or limit is None or limit == 0 or value / limit <= 0:
        return None
    return value / limit


def too_few_rows(findings: Sequence[Mapping[str, Any]]) -> tuple[int, int] | None:
    """(rows, rows required) when the ``health.rows`` finding says the sample is too small."""
    for f in findings:
        if f.get("check") == "health.rows" and f.get("outcome") == "breach":
            value, limit = f.get("value"), f.get("limit")
            if value is not None and limit is not None:
                return int(value), int(limit)
    return None


def _leak(finding: Mapping[str, Any]) -> tuple[str, str] | None:
    """The leak guard's own reading: a gain above ``max_gain`` (not the margin's limit)."""
    details = finding.get("details") or {}
    if not isinstance(details, Mapping):
        return None
    max_gain, gain = details.get("max_gain"), details.get("gain")
    value, interval = finding.get("value"), finding.get("interval")
    if max_gain is None or gain is None or gain <= max_gain:
        return None
    text = f"a gain of {number(gain)} is above the leak guard max_gain {number(max_gain)}"
    if interval and value:
        sign = gain / value  # +1 when higher is better, -1 when lower is
        low = min(sign * interval[0], sign * interval[1])
        if low > max_gain:
            return "clear", f"{text}, and so is the whole interval of the gain (from {number(low)})"
        return "marginal", f"{text}, but the interval of the gain reaches down to {number(low)}"
    return "likely", text


def assess(
    finding: Mapping[str, Any], *, few_rows: tuple[int, int] | None = None
) -> tuple[str, str]:
    """How sure the gate is of one failed finding: a level (certain, clear, likely, marginal,
    uncertain, unreliable) and a sentence. *few_rows* (rows, required; see
    :func:`too_few_rows`) marks every figure computed from the sample as unreliable."""
    outcome = finding.get("outcome")
    kind = finding.get("kind")
    value, limit = finding.get("value"), finding.get("limit")
    pvalue, interval = finding.get("pvalue"), finding.get("interval")
    if finding.get("statistic") == "error":
        return "certain", "the check itself failed to run; the gate holds when it cannot judge"
    if kind == "health":
        return "certain", "read straight off the candidate's own sample: no sampling error"
    if kind == "lineage":
        return "certain", "read from the snapshots' metadata: no sampling error"
    if few_rows is not None and kind != "metric":
        rows, required = few_rows
        return "unreliable", (
            f"computed from only {rows:,} rows (the policy asks for {required:,}): its "
            "figures are unreliable"
        )
    if outcome == "inconclusive":
        return "uncertain", "the data cannot settle it either way"
    if outcome == "underpowered":
        return "uncertain", (
            "the sample is too small to decide against the margin: no evidence of harm, and "
            "none of safety; the minimum detectable effect says how many rows would decide it"
        )
    leak = _leak(finding)
    if leak is not None:
        return leak
    if interval and limit is not None and value is not None:
        low, high = interval
        side = 1.0 if value >= limit else -1.0
        beyond = (low - limit) * side > 0 and (high - limit) * side > 0
        span = f"[{number(low)}, {number(high)}]"
        if beyond:
            return "clear", f"the whole interval {span} lies beyond the limit {number(limit)}"
        return "marginal", f"the interval {span} still includes the limit {number(limit)}"
    ratio = limit_ratio(value, limit)
    times = f"{ratio:.1f}× its limit" if ratio is not None else "over its limit"
    if pvalue is not None:
        p = pvalue_text(pvalue)
        if pvalue < CLEAR_P and (ratio is None or ratio >= CLEAR_RATIO):
            return "clear", f"{times}, {p}: far beyond chance"
        if pvalue >= WEAK_P:
            return "marginal", f"{times} but {p}: a shift this size often happens by chance"
        return "likely", f"{times}, {p}: significant, though close to the limit"
    source = (
        "reported by the trainer without an interval"
        if kind == "metric"
        else "computed from the samples, with no p-value or interval"
    )
    if ratio is not None and ratio >= CLEAR_METRIC_RATIO:
        return "clear", f"{times}; {source}"
    if ratio is not None:
        return "marginal", f"only {times}; {source}"
    base = finding.get("baseline_value")
    if value is not None and base:
        return "likely", (
            f"changed by {value:+.3g} ({value / abs(base):+.1%} of the "
            f"{finding.get('against') or 'other'}'s value); {source}"
        )
    return "likely", source


def holding_outcomes(verdict: Mapping[str, Any]) -> set[str]:
    """Outcomes of a blocking finding that count against this verdict: breach and
    inconclusive, and underpowered when the policy held for it (a reason says so)."""
    outcomes = {"breach", "inconclusive"}
    if any(str(r).startswith("underpowered:") for r in verdict.get("reasons", [])):
        outcomes.add("underpowered")
    return outcomes


def failed_findings(verdict: Mapping[str, Any]) -> list[Mapping[str, Any]]:
    outcomes = holding_outcomes(verdict)
    return [
        f
        for f in verdict.get("findings", [])
        if f.get("blocking", True) and f.get("outcome") in outcomes
    ]


def headline(verdict: Mapping[str, Any]) -> str:
    """``shelf-ranker 2026-12-01T02:45Z: HOLD``, and the override in force, if any."""
    text = f"{verdict['model']} {verdict['snapshot']}: {verdict['decision'].upper()}"
    overrides = verdict.get("overrides") or []
    if overrides:
        last = overrides[-1]
        text += (
            f" (overridden to {last['decision'].upper()} by {last['actor']} "
            f"at {moment(last['created_at'])})"
        )
    elif verdict.get("effective_decision", verdict["decision"]) != verdict["decision"]:
        text += f" (overridden to {verdict['effective_decision'].upper()})"
    return text


def _when(text: str) -> datetime:
    return datetime.fromisoformat(text.replace("Z", "+00:00"))


def moment(text: str | None) -> str:
    """An ISO 8601 time as ``2026-12-01 02:45 UTC``."""
    if not text:
        return "?"
    try:
        return _when(text).astimezone(UTC).strftime("%Y-%m-%d %H:%M UTC")
    except ValueError:
        return text


def _span(seconds: float) -> str:
    """``3 h 5 min``, ``15 min``, ``40 s`` (sign dropped)."""
    total = int(round(abs(seconds)))
    hours, rest = divmod(total, 3600)
    minutes, secs = divmod(rest, 60)
    if hours:
        return f"{hours} h {minutes} min" if minutes else f"{hours} h"
    return f"{minutes} min" if minutes else f"{secs} s"


def _change(name: str, before: float, after: float) -> str:
    if before == after:
        return f"{name} {number(after)}, unchanged"
    return f"{name} {number(before)} → {number(after)} ({after - before:+.3g})"


def _watermark(candidate: str, baseline: str) -> str:
    try:
        gap = (_when(candidate) - _when(baseline)).total_seconds()
    except ValueError:
        return f"trained until {candidate} (baseline {baseline})"
    if not gap:
        return f"trained until {moment(candidate)}, the same as the baseline"
    where = "past" if gap > 0 else "before"
    return f"trained until {moment(candidate)}: {_span(gap)} {where} the baseline's watermark"


def judged_against(
    verdict: Mapping[str, Any], evidence: Mapping[str, Any] | None = None
) -> list[str]:
    """``baseline KEY`` and, when a check compared with it, ``reference KEY``."""
    out = [f"baseline {verdict.get('baseline') or '(none)'}"]
    reference = verdict.get("reference") or (evidence or {}).get("reference")
    uses_reference = any(f.get("against") == "reference" for f in verdict.get("findings", []))
    if reference and uses_reference:
        out.append(f"reference {reference}")
    return out


def state_line(verdict: Mapping[str, Any], evidence: Mapping[str, Any]) -> str:
    """The verdict's state in one plain sentence: the decision in force, how it came to be,
    and what serves now (``promoted by override, but X serves now``)."""
    effective = verdict.get("effective_decision", verdict["decision"])
    how = " by override" if verdict.get("overridden") else ""
    word = "held" if effective == "hold" else "promoted"
    serving = evidence.get("serving")
    if evidence.get("candidate_serving"):
        return f"{word}{how}; this snapshot serves now"
    if not serving:
        return f"{word}{how}; nothing serves"
    if effective == "promote":
        return f"{word}{how}, but {serving} serves now"
    return f"{word}{how}; {serving} serves now"


def _side_changes(role: str, cand: Mapping[str, Any], other: Mapping[str, Any]) -> list[str]:
    out: list[str] = []
    if cand.get("score_mean") is not None and other.get("score_mean") is not None:
        out.append(
            _change(f"mean score vs {role} {other['key']}", other["score_mean"], cand["score_mean"])
        )
    return out


def _changes(verdict: Mapping[str, Any], evidence: Mapping[str, Any] | None) -> list[str]:
    out: list[str] = []
    if evidence is None:
        for f in verdict.get("findings", []):
            if f.get("kind") == "drift" and f.get("baseline_value") is not None:
                out.append(
                    f"mean score {number(f['baseline_value'])} → {number(f['candidate_value'])}"
                )
                break
        return out
    cand = evidence.get("candidate") or {}
    base = evidence.get("baseline_snapshot")
    ref = evidence.get("reference_snapshot")
    if "reference" in (evidence.get("compared_with") or []) and ref is not None:
        # what the failed reference checks compared with comes first, named as such
        out.extend(_side_changes("reference", cand, ref))
    if base is None:
        return out or ["nothing to compare with: there was no baseline"]
    out.extend(_side_changes("baseline", cand, base))
    if cand.get("nonfinite"):
        out.append(
            f"{cand['nonfinite']:,} of {cand['sample_rows']:,} candidate scores are not "
            "finite (NaN, infinite or missing)"
        )
    for name in sorted(set(cand.get("metrics", {})) & set(base.get("metrics", {}))):
        out.append(_change(name, base["metrics"][name], cand["metrics"][name]))
    if cand.get("code_version") != base.get("code_version"):
        out.append(
            f"training code {base.get('code_version') or '?'} → {cand.get('code_version') or '?'}"
        )
    if cand.get("trained_until") and base.get("trained_until"):
        out.append(_watermark(cand["trained_until"], base["trained_until"]))
    rows_c, rows_b = cand.get("rows_trained"), base.get("rows_trained")
    if rows_c is not None and rows_b:
        out.append(f"rows trained {rows_b:,} → {rows_c:,} ({(rows_c - rows_b) / rows_b:+.1%})")
    return out


def _next_steps(verdict: Mapping[str, Any], evidence: Mapping[str, Any] | None) -> list[str]:
    vid = verdict.get("verdict_id", "VERDICT")
    model, key = verdict["model"], verdict["snapshot"]
    effective = verdict.get("effective_decision", verdict["decision"])
    serving = evidence.get("serving") if evidence else None
    candidate_serving = bool(evidence and evidence.get("candidate_serving"))
    out: list[str] = []
    judged_against = verdict.get("baseline")
    if effective == "hold":
        if candidate_serving:
            out.append(
                f"{key} still serves (nothing earlier to return to): roll back to another "
                f'snapshot: tidegate rollback {model} SNAPSHOT --reason "..."'
            )
        elif serving and serving == judged_against:
            out.append(f"nothing to do to stay safe: the baseline {serving} keeps serving")
        elif serving:
            out.append(
                f"{serving} was promoted since and serves now: this hold no longer blocks anything"
            )
        out.append(
            f"if the evidence is wrong (a known change, a false alarm): override to "
            f'promote: tidegate override {vid} --decision promote --reason "..."'
        )
        out.append(
            "if holds repeat: read the trends on the model page; each new snapshot is "
            "judged against the same baseline until one is promoted"
        )
    else:
        if candidate_serving:
            out.append(
                f"{key} serves now; if it misbehaves, override to hold (the previous "
                f"baseline serves again): tidegate override {vid} --decision hold "
                '--reason "..."'
            )
        elif serving:
            out.append(f"{serving} serves now")
        out.append(
            f'to serve an earlier snapshot: tidegate rollback {model} SNAPSHOT --reason "..."'
        )
    return out


def briefing(
    verdict: Mapping[str, Any], evidence: Mapping[str, Any] | None = None
) -> dict[str, list[str]]:
    """The four answers, each a list of short sentences (see :data:`SECTIONS`)."""
    failed = failed_findings(verdict)
    if verdict["decision"] == "hold":
        why = list(verdict.get("reasons") or ["held (no reason recorded)"])
    else:
        why = ["every blocking check passed"]
        advisories = [f for f in verdict.get("findings", []) if f.get("outcome") == "advisory"]
        why += [f"advisory (does not hold): {f['message']}" for f in advisories]
    for o in verdict.get("overrides") or []:
        why.append(
            f"override to {o['decision']} by {o['actor']} at "
            f"{moment(o['created_at'])}: {o['reason']}"
        )
    if verdict.get("error"):
        how = ["the gate could not judge (fail closed): " + str(verdict["error"])]
    elif failed:
        how = []
        few = too_few_rows(verdict.get("findings", []))
        for f in failed:
            level, sentence = assess(f, few_rows=few)
            how.append(f"{f['check']}: {level}: {sentence}")
    else:
        how = ["no blocking check failed"]
    return {
        "why": why,
        "how_sure": how,
        "what_changed": _changes(verdict, evidence) or ["no comparable evidence stored"],
        "what_next": _next_steps(verdict, evidence),
    }


def sparkline(
    values: Sequence[float], top: float | None = None, *, ascii_only: bool = False
) -> str:
    """One character per value, height proportional to ``value / top`` (default: the largest
    value); zero is a space, any positive value at least the lowest block."""
    blocks = ASCII_BLOCKS if ascii_only else BLOCKS
    top = max(values, default=0.0) if top is None else top
    out = []
    for v in values:
        if not top or v <= 0 or not math.isfinite(v):
            out.append(" ")
            continue
        level = math.ceil(min(v / top, 1.0) * len(blocks)) - 1
        out.append(blocks[max(level, 0)])
    return "".join(out)


def distribution_lines(
    distribution: Mapping[str, Any] | None, *, ascii_only: bool = False
) -> list[str]:
    """Both sides of a distribution as sparklines on one scale, with their means."""
    if not distribution or not distribution.get("edges"):
        return ["score distribution: no finite scores stored"]
    edges = distribution["edges"]
    sides = [s for s in (distribution.get("candidate"), distribution.get("baseline")) if s]
    top = max(max(s["shares"], default=0.0) for s in sides)
    width = max(len(s["label"]) for s in sides)
    lines = [
        f"score distribution ({len(edges) - 1} bins from {number(edges[0])} to "
        f"{number(edges[-1])}; bar height: share of rows, one scale):"
    ]
    for s in sides:
        line = sparkline(s["shares"], top, ascii_only=ascii_only)
        lines.append(f"  {s['label']:<{width}} |{line}| mean {number(s.get('mean'))}")
    lines.extend(f"  note: {n}" for n in distribution.get("notes", []))
    return lines


def _finding_line(f: Mapping[str, Any]) -> list[str]:
    parts = [f"[{MARK.get(f['outcome'], '?')}] {f['check']} ({f['kind']}, {f['outcome']})"]
    if f.get("value") is not None:
        parts.append(f"{f.get('statistic') or 'value'} {number(f['value'])}")
    if f.get("limit") is not None:
        parts.append(f"limit {number(f['limit'])}")
    if f.get("baseline_value") is not None or f.get("candidate_value") is not None:
        parts.append(
            f"{f.get('against') or 'baseline'} {number(f.get('baseline_value'))}, candidate "
            f"{number(f.get('candidate_value'))}"
        )
    if f.get("interval"):
        low, high = f["interval"]
        parts.append(f"interval [{number(low)}, {number(high)}]")
    if f.get("pvalue") is not None:
        parts.append(pvalue_text(f["pvalue"]))
    return ["  " + "; ".join(parts), f"      {f['message']}"]


def segment_lines(segments: Sequence[Mapping[str, Any]]) -> list[str]:
    if not segments:
        return []
    lines = ["segments (rows, mean score candidate vs baseline):"]
    for s in segments:
        base = number(s.get("baseline_mean"))
        change = s.get("mean_change")
        tail = f" ({change:+.3g})" if change is not None else ""
        bad = f", {s['nonfinite']} not finite" if s.get("nonfinite") else ""
        lines.append(
            f"  {s['segment']}={s['value']}: {s['rows']:,} rows{bad}; "
            f"{number(s.get('candidate_mean'))} vs {base}{tail}"
        )
    return lines


def explain(
    verdict: Mapping[str, Any],
    evidence: Mapping[str, Any] | None = None,
    *,
    ascii_only: bool = False,
) -> str:
    """The verdict as a short report: the headline, the four answers, the distributions, every
    finding and the segments."""
    lines = [headline(verdict)]
    if evidence is not None:
        lines.append(f"  {state_line(verdict, evidence)}")
    compared = " and ".join(judged_against(verdict, evidence))
    lines.append(
        f"  judged against {compared}"
        f" under policy {verdict.get('policy') or '(none)'} {verdict.get('policy_digest') or ''}"
        f" at {moment(verdict.get('created_at'))} (verdict {verdict.get('verdict_id', '?')})"
    )
    answers = briefing(verdict, evidence)
    for key, title in SECTIONS:
        lines.append(f"{title.lower()}:")
        lines.extend(f"  - {item}" for item in answers[key])
    if evidence is not None:
        # what each failed check compared with (the reference, the baseline, or both)
        comparisons = evidence.get("comparisons") or [
            {"against": "baseline", "distribution": evidence.get("distribution")}
        ]
        for c in comparisons:
            if len(comparisons) > 1 or c.get("against") != "baseline":
                lines.append(f"against the {c.get('against')} {c.get('key') or ''}:".rstrip())
            lines.extend(distribution_lines(c.get("distribution"), ascii_only=ascii_only))
    lines.append("findings:")
    findings = sorted(verdict.get("findings", []), key=lambda f: ORDER.get(f["outcome"], 9))
    for f in findings:
        lines.extend(_finding_line(f))
    if evidence is not None:
        lines.extend(segment_lines(evidence.get("segments", [])))
    text = "\n".join(lines)
    if ascii_only:  # a terminal that cannot print arrows and blocks
        text = text.replace("→", "->").replace("×", "x").encode("ascii", "replace").decode()
    return text
