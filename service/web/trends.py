"""The trends on a model page: each key statistic and reported metric over recent verdicts,
with the limit each verdict was held to.

Values and limits come from the stored findings (every verdict keeps its own). A reported
metric is drawn as the metric itself; its limit line is the threshold its check applied that
time: the other snapshot's value minus the allowed drop (absolute from the stored limit, or
relative from the policy in force now), and the policy's floor or ceiling as a band.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from service.gate.policy import Policy
from service.web.format import snapshot_url
from service.web.svg import TrendPoint

#: Finding kinds whose values are not trended (pass/fail facts about one sample or lineage).
NOT_TRENDED = {"health", "lineage", "metric"}


@dataclass(frozen=True)
class Row:
    """One verdict on the timeline, oldest first: what the trends need of it."""

    key: str
    label: str
    decision: str  # in force
    findings: Sequence[Mapping[str, Any]]
    metrics: Mapping[str, float]
    summary: Mapping[str, Any] | None


@dataclass(frozen=True)
class Trend:
    title: str
    points: list[TrendPoint]
    bands: list[tuple[str, float]]
    limit_label: str = "limit"


def _metric_configs(policy: Policy | None) -> dict[str, Any]:
    """metric name -> its check configuration in *policy* (the first check of that metric)."""
    out: dict[str, Any] = {}
    for check in policy.checks if policy else ():
        if check.kind == "metric":
            out.setdefault(getattr(check, "metric", ""), check)
    return out


def metric_threshold(finding: Mapping[str, Any], config: Any | None) -> float | None:
    """The value the candidate's metric had to reach (or stay under) in this verdict."""
    base = finding.get("baseline_value")
    if base is None:
        return None
    direction = getattr(config, "direction", None)
    sign = 1.0 if direction != "lower" else -1.0
    candidates = []
    if finding.get("limit") is not None:  # stored: -sign * max_drop
        candidates.append(base + float(finding["limit"]))
    relative = getattr(config, "max_relative_drop", None)
    if relative is not None and base != 0:
        candidates.append(base - sign * relative * abs(base))
    if not candidates:
        return None
    return float(max(candidates) if sign > 0 else min(candidates))


def _by_check(row: Row) -> dict[str, Mapping[str, Any]]:
    """A row's findings by check name, and each metric check's finding as ``metric:<name>``."""
    out: dict[str, Mapping[str, Any]] = {}
    for f in row.findings:
        out.setdefault(str(f.get("check")), f)
        statistic = str(f.get("statistic") or "")
        if f.get("kind") == "metric" and statistic.endswith(" change"):
            out.setdefault("metric:" + statistic[: -len(" change")], f)
    return out


def build_trends(model: str, rows: Sequence[Row], policy: Policy | None) -> list[Trend]:
    """Trends for the statistics of the checks, the reported metrics and the mean score."""

    links = {row.key: snapshot_url(model, row.key) for row in rows}  # once per verdict

    def point(
        row: Row, f: Mapping[str, Any] | None, value: float | None, limit: float | None
    ) -> TrendPoint:
        return TrendPoint(
            row.label,
            value,
            limit,
            breach=bool(f and f.get("outcome") == "breach"),
            held=row.decision == "hold",
            href=links[row.key],
            note=row.key,
        )

    indexed = [(row, _by_check(row)) for row in rows]
    trends: list[Trend] = []
    checks: dict[str, str] = {}
    for row in rows:
        for f in row.findings:
            if f.get("kind") not in NOT_TRENDED and f.get("value") is not None:
                checks.setdefault(str(f["check"]), str(f.get("statistic") or "value"))
    for check, statistic in checks.items():
        points = []
        for row, found in indexed:
            hit = found.get(check)
            points.append(
                point(
                    row, hit, hit.get("value") if hit else None, hit.get("limit") if hit else None
                )
            )
        label = statistic.upper() if len(statistic) <= 4 else statistic
        trends.append(Trend(f"{check}: {label}", points, []))
    configs = _metric_configs(policy)
    for name in sorted({name for row in rows for name in row.metrics}):
        config = configs.get(name)
        points = []
        for row, found in indexed:
            hit = found.get("metric:" + name)
            threshold = metric_threshold(hit, config) if hit else None
            points.append(point(row, hit, row.metrics.get(name), threshold))
        bands = []
        if config is not None and getattr(config, "floor", None) is not None:
            bands.append(("floor", float(config.floor)))
        if config is not None and getattr(config, "ceiling", None) is not None:
            bands.append(("ceiling", float(config.ceiling)))
        trends.append(Trend(f"reported {name}", points, bands, "allowed"))
    means = [point(row, None, (row.summary or {}).get("mean"), None) for row in rows]
    if any(p.value is not None for p in means):
        trends.append(Trend("mean score of the sample", means, []))
    return trends
