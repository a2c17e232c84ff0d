"""Lineage: where the candidate comes from (common practice).

The watermark (``trained_until``) must advance past the baseline's, so a late or replayed job
cannot replace a fresher model; a policy may require the watermark and a known parent.
"""

from __future__ import annotations

from service.gate.policy import LineageRules
from service.gate.types import Finding, GateInput

KIND = "lineage"


def lineage_findings(rules: LineageRules, inp: GateInput) -> list[Finding]:
    cand = inp.candidate
    base = inp.baseline
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
    elif base is not None and base.trained_until is not None and rules.watermark_must_advance:
        stale = cand.trained_until <= base.trained_until
        lag = (cand.trained_until - base.trained_until).total_seconds()
        findings.append(
            Finding(
                check="lineage.watermark",
                kind=KIND,
                outcome="breach" if stale else "ok",
                statistic="watermark_advance_seconds",
                value=lag,
                limit=0.0,
                message=(
                    f"stale candidate: trained until {cand.trained_until.isoformat()}, not after "
                    f"the baseline's {base.trained_until.isoformat()}"
                )
                if stale
                else f"watermark advances {lag:.0f} s past the baseline's",
                blocking=True,
                against="baseline",
            )
        )
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
