"""Lineage: where the candidate comes from (common practice, no source).

The watermark (``trained_until``) must advance past the newest watermark the model has ever
posted, held or promoted (``GateInput.newest_watermark``, supplied by the store), and past the
baseline's. Comparing with the baseline alone would let a replayed job through after a hold: the
held snapshot trained further than the baseline, the replay sits between the two, and it would
look fresh. A policy may also require the watermark and a known parent.
"""

from __future__ import annotations

from datetime import datetime

from service.gate.policy import LineageRules
from service.gate.types import Finding, GateInput

KIND = "lineage"


def _watermark_finding(inp: GateInput) -> list[Finding]:
    """The watermark-must-advance finding; none when there is nothing to compare with."""
    cand = inp.candidate.trained_until
    assert cand is not None
    base = inp.baseline.trained_until if inp.baseline is not None else None
    newest = inp.newest_watermark
    # Against the newer of the two: the newest ever posted, or the baseline's (a baseline set by
    # hand may be newer than anything the store saw posted before it).
    marks: list[tuple[datetime, str]] = []
    if newest is not None:
        marks.append((newest, "newest watermark posted before"))
    if base is not None:
        marks.append((base, "baseline's"))
    if not marks:
        return []
    mark, whose = max(marks, key=lambda m: m[0])
    stale = cand <= mark
    lag = (cand - mark).total_seconds()
    return [
        Finding(
            check="lineage.watermark",
            kind=KIND,
            outcome="breach" if stale else "ok",
            statistic="watermark_advance_seconds",
            value=lag,
            limit=0.0,
            message=(
                f"stale candidate: trained until {cand.isoformat()}, not after the {whose} "
                f"{mark.isoformat()}"
            )
            if stale
            else f"watermark advances {lag:.0f} s past the {whose}",
            blocking=True,
            against="baseline" if whose == "baseline's" else None,
            details={
                "candidate": cand.isoformat(),
                "baseline": base.isoformat() if base is not None else None,
                "newest_posted": newest.isoformat() if newest is not None else None,
            },
        )
    ]


def lineage_findings(rules: LineageRules, inp: GateInput) -> list[Finding]:
    cand = inp.candidate
    findings: list[Finding] = []
    if cand.trained_until is None:
        findings.append(
            Finding(
                check="lineage.watermark",
                kind=KIND,
                outcome="breach" if rules.require_watermark else "skipped",
                statistic="watermark",
                message="candidate does not say how far it was trained (trained_until missing)",
                blocking=True,
            )
        )
    elif rules.watermark_must_advance:
        findings.extend(_watermark_finding(inp))
    if rules.require_known_parent:
        known = inp.known_keys or frozenset()
        ok = cand.parent is not None and cand.parent in known
        findings.append(
            Finding(
                check="lineage.parent",
                kind=KIND,
                outcome="ok" if ok else "breach",
                statistic="parent",
                message=f"parent {cand.parent!r} is a known snapshot"
                if ok
                else f"parent {cand.parent!r} is not a known snapshot of this model",
                blocking=True,
            )
        )
    return findings
