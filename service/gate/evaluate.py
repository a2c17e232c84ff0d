"""evaluate(candidate, baseline, reference, history, policy) -> Verdict. Pure.

Order of work:

1. health findings (the candidate's sample alone; always blocking);
2. lineage findings (watermark advance, known parent);
3. each policy check, against the baseline or the reference as its ``against`` key says;
   a check whose other snapshot does not exist is ``skipped``; a check that raises gives a
   blocking breach naming the error (fail closed); a check that learns (an ``adaptive`` table,
   or any learning check under the policy's ``[budget]``) is then judged again against the
   limit learned from history (:mod:`service.gate.adaptive`);
4. the decision: ``hold`` when a blocking finding is a breach, when a blocking finding is
   inconclusive and the policy says ``on_inconclusive = "hold"``, when a blocking finding is
   underpowered and the policy says ``on_underpowered = "hold"`` (by default it does not hold:
   a unit too small to decide against its margin is no evidence of harm), or when this is the
   model's first snapshot and the policy says ``first_snapshot = "hold"``; else ``promote``;
5. the stuck finding: when this verdict holds and makes ``history.stuck_after_holds`` or more
   holds in a row (itself included, as the model list counts), an advisory finding (it never
   holds by itself: holding because earlier snapshots were held would never end).


Reasons are ordered by severity: evaluation errors, health, lineage, other breaches (in policy
order), then inconclusive, then underpowered findings.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterable
from typing import Literal

from service.gate.adaptive import apply_adaptive
from service.gate.checks import REGISTRY, CheckConfig, CheckContext
from service.gate.checks.base import skipped
from service.gate.checks.health import health_findings
from service.gate.checks.lineage import lineage_findings
from service.gate.checks.offpolicy import log_health_findings
from service.gate.history import consecutive_holds, stuck_state
from service.gate.policy import Policy
from service.gate.types import Finding, GateInput, Verdict

_SEVERITY = {"health": 1, "lineage": 2}


def _run_check(config: CheckConfig, inp: GateInput, policy: Policy) -> list[Finding]:
    spec = REGISTRY[config.kind]
    other = inp.baseline if config.against == "baseline" else inp.reference
    if spec.needs_other and other is None:
        what = "no baseline yet" if config.against == "baseline" else "no reference snapshot"
        return [skipped(config, f"{what}: nothing to compare with")]
    ctx = CheckContext(
        candidate=inp.candidate,
        other=other,
        baseline=inp.baseline,
        reference=inp.reference,
        history=inp.history,
        now=inp.now,
        policy=policy,
        baseline_since=inp.baseline_since,
        known_keys=inp.known_keys,
    )
    try:
        produced = list(spec.run(config, ctx))
    except Exception as exc:  # fail closed: a broken check holds, it never passes silently
        return [
            Finding(
                check=config.name,
                kind=config.kind,
                outcome="breach",
                statistic="error",
                message=f"check {config.name!r} failed: {type(exc).__name__}: {exc}",
                blocking=config.blocking,
                against=config.against,
                details={"error": f"{type(exc).__name__}: {exc}"},
            )
        ]
    plan = policy.learn_plan(config) if config.learning() == "value" else None
    if plan is not None:
        if config.against == "baseline":
            plan = dataclasses.replace(plan, steps=ctx.steps)
        alpha = getattr(config, "alpha", None)
        produced = [
            apply_adaptive(
                f,
                rules=plan,
                side=plan.side,
                alpha=alpha if isinstance(alpha, float) else None,
                history=inp.history,
                now=inp.now,
            )
            if f.check == config.name
            else f
            for f in produced
        ]
    return [_apply_blocking(f, config) for f in produced]


def _stuck_findings(inp: GateInput, policy: Policy, *, held: bool) -> list[Finding]:
    # Counted with this verdict (when it holds), as the model list counts the latest verdicts:
    # the finding and the model view say the same number.
    before = consecutive_holds(inp.history)
    state = stuck_state(
        before + 1 if held else 0,
        threshold=policy.history.stuck_after_holds,
        baseline_since=inp.baseline_since,
        now=inp.now,
    )
    if not state.stuck:
        return []
    return [
        Finding(
            check="history.stuck",
            kind="history",
            outcome="advisory",
            statistic="consecutive_holds",
            value=state.consecutive_holds,
            limit=state.threshold,
            message=state.message,
            blocking=False,
            details=state.to_dict(),
        )
    ]


def _apply_blocking(finding: Finding, config: CheckConfig) -> Finding:
    """A non-blocking check's breach is reported as ``advisory``."""
    blocking = config.blocking
    outcome = finding.outcome
    if not blocking and outcome == "breach":
        outcome = "advisory"
    return dataclasses.replace(finding, blocking=blocking, outcome=outcome)


def _reasons(findings: Iterable[Finding], policy: Policy) -> list[str]:
    ranked: list[tuple[int, int, str]] = []
    for order, f in enumerate(findings):
        if not f.blocking:
            continue
        if f.outcome == "breach":
            severity = 0 if f.statistic == "error" else _SEVERITY.get(f.kind, 3)
            ranked.append((severity, order, f.message))
        elif f.outcome == "inconclusive" and policy.on_inconclusive == "hold":
            ranked.append((4, order, f"inconclusive: {f.message}"))
        elif f.outcome == "underpowered" and policy.on_underpowered == "hold":
            ranked.append((5, order, f"underpowered: {f.message}"))
    return [message for _, _, message in sorted(ranked)]


def evaluate(inp: GateInput, policy: Policy | None) -> Verdict:
    """Judge ``inp.candidate`` under *policy*; see the module docstring for the rules."""
    baseline_key = inp.baseline.key if inp.baseline is not None else None
    if policy is None:
        message = f"no policy matches model {inp.candidate.model!r}; holding (fail closed)"
        return Verdict(
            decision="hold",
            reasons=(message,),
            findings=(),
            policy_name=None,
            policy_digest=None,
            baseline_key=baseline_key,
            error=message,
        )
    findings: list[Finding] = []
    findings.extend(health_findings(policy.sample, inp.candidate, inp.baseline))
    if any(config.kind == "off-policy" for config in policy.checks):
        findings.extend(log_health_findings(inp.candidate))  # the exploration log's health
    findings.extend(lineage_findings(policy.lineage, inp))
    for config in policy.checks:
        findings.extend(_run_check(config, inp, policy))
    reasons = _reasons(findings, policy)
    if inp.baseline is None and policy.first_snapshot == "hold":
        reasons.append(
            "first snapshot of this model: the policy holds it until a person sets the baseline"
        )
    decision: Literal["promote", "hold"] = "hold" if reasons else "promote"
    # advisory only, so it never changes the decision; counted after it
    findings.extend(_stuck_findings(inp, policy, held=decision == "hold"))
    return Verdict(
        decision=decision,
        reasons=tuple(reasons),
        findings=tuple(findings),
        policy_name=policy.name,
        policy_digest=policy.digest,
        baseline_key=baseline_key,
        moves_baseline=decision == "promote" and policy.promote_moves_baseline,
    )


def failed_verdict(
    error: BaseException, *, policy: Policy | None, baseline_key: str | None
) -> Verdict:
    """The verdict when evaluation itself raised: hold, with the error as its reason."""
    message = f"evaluation failed: {type(error).__name__}: {error}"
    return Verdict(
        decision="hold",
        reasons=(message,),
        findings=(),
        policy_name=policy.name if policy else None,
        policy_digest=policy.digest if policy else None,
        baseline_key=baseline_key,
        error=message,
    )
