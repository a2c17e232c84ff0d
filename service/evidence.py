"""Evidence for a person: the two score distributions on common bins and a per-segment table.

Pure functions over numpy arrays and stored score summaries; no database, no clock. The read
model :func:`service.views.verdict_evidence` feeds them the stored rows, and the verdict page,
the API (``GET /v1/verdicts/{id}/evidence``) and ``tidegate why`` show the result.

A distribution side comes from the raw sample when it is stored, otherwise from the score
summary kept beside it (101 quantiles): the share of scores in a bin is then the difference of
the empirical distribution function, read off the quantiles by linear interpolation, at the
bin's two edges. That recovers a histogram to within one percentile per bin, enough to see a
shift after the raw sample was pruned.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from service.gate.types import SEGMENT_PREFIX, Sample, json_safe

#: Bins of the overlay drawn on the verdict page and sketched by ``tidegate why``.
DEFAULT_BINS = 30
#: Most values of one segment column listed (the largest by rows); the rest are summed up.
MAX_SEGMENT_VALUES = 20


@dataclass(frozen=True)
class Side:
    """One side of the comparison: counts per bin (expected counts when read from a summary)."""

    label: str
    counts: tuple[float, ...]
    rows: int
    finite: int
    mean: float | None
    source: str  # "sample" | "summary" | "paired"

    def shares(self) -> tuple[float, ...]:
        total = float(sum(self.counts))
        if total <= 0:
            return tuple(0.0 for _ in self.counts)
        return tuple(c / total for c in self.counts)


@dataclass(frozen=True)
class Distribution:
    """Candidate and (optionally) baseline scores on the same bin edges."""

    edges: tuple[float, ...]
    candidate: Side | None
    baseline: Side | None
    notes: tuple[str, ...] = field(default_factory=tuple)

    def to_dict(self) -> dict[str, Any]:
        def side(s: Side | None) -> dict[str, Any] | None:
            if s is None:
                return None
            return {
                "label": s.label,
                "counts": list(s.counts),
                "shares": list(s.shares()),
                "rows": s.rows,
                "finite": s.finite,
                "mean": s.mean,
                "source": s.source,
            }

        out: dict[str, Any] = json_safe(
            {
                "edges": list(self.edges),
                "candidate": side(self.candidate),
                "baseline": side(self.baseline),
                "notes": list(self.notes),
            }
        )
        return out


# --- bins ---------------------------------------------------------------------------------


def common_edges(lows: Sequence[float], highs: Sequence[float], bins: int) -> np.ndarray:
    """Equal-width edges spanning every side's range; a zero-width range is widened a little
    (a collapsed output is all one value) so the one bar still has a width."""
    if bins < 1:
        raise ValueError(f"bins must be at least 1, got {bins}")
    lo, hi = float(min(lows)), float(max(highs))
    if not hi > lo:
        pad = max(abs(lo) * 0.01, 1e-3)
        lo, hi = lo - pad, hi + pad
    return np.linspace(lo, hi, bins + 1)


def counts_from_values(values: np.ndarray, edges: np.ndarray) -> np.ndarray:
    """Counts of the finite *values* in the bins given by *edges* (the last bin closed)."""
    finite = values[np.isfinite(values)]
    counts, _ = np.histogram(finite, bins=edges)
    out: np.ndarray = counts.astype(float)
    return out


def counts_from_quantiles(quantiles: Sequence[float], finite: int, edges: np.ndarray) -> np.ndarray:
    """Expected counts per bin from a quantile summary (levels 0, 1/(k-1), ..., 1).

    The distribution function at each edge is read off the quantiles by linear interpolation
    (``levels`` as a function of ``quantiles``); a bin's count is *finite* times the difference
    at its two edges.
    """
    q = np.asarray(quantiles, dtype=float)
    if q.size < 2 or finite <= 0:
        return np.zeros(len(edges) - 1)
    levels = np.linspace(0.0, 1.0, q.size)
    # np.interp needs increasing x; equal quantiles (ties, a collapsed output) keep the
    # highest level of the run, which puts the whole tie inside the bin that holds the value.
    q_unique, last = np.unique(q[::-1], return_index=True)
    levels_unique = levels[::-1][last]
    cdf = np.interp(edges, q_unique, levels_unique, left=0.0, right=1.0)
    if q_unique.size == 1:  # all mass at one value
        cdf = np.where(edges >= q_unique[0], 1.0, 0.0)
    out: np.ndarray = np.clip(np.diff(cdf), 0.0, None) * finite
    return out


# --- the two distributions ----------------------------------------------------------------


@dataclass(frozen=True)
class SideInput:
    """What is known about one side: raw values, or a stored summary (dict of codec.summarise)."""

    label: str
    values: np.ndarray | None = None
    summary: Mapping[str, Any] | None = None
    source: str = "sample"

    def usable(self) -> bool:
        if self.values is not None:
            return bool(np.isfinite(self.values).any())
        return bool(self.summary and self.summary.get("finite") and self.summary.get("quantiles"))

    def bounds(self) -> tuple[float, float]:
        if self.values is not None:
            finite = self.values[np.isfinite(self.values)]
            return float(finite.min()), float(finite.max())
        assert self.summary is not None
        return float(self.summary["min"]), float(self.summary["max"])


def _side(inp: SideInput, edges: np.ndarray) -> Side:
    if inp.values is not None:
        finite = inp.values[np.isfinite(inp.values)]
        counts = counts_from_values(inp.values, edges)
        return Side(
            inp.label,
            tuple(float(c) for c in counts),
            int(inp.values.size),
            int(finite.size),
            float(finite.mean()) if finite.size else None,
            inp.source,
        )
    assert inp.summary is not None
    finite_n = int(inp.summary["finite"])
    counts = counts_from_quantiles(inp.summary["quantiles"], finite_n, edges)
    return Side(
        inp.label,
        tuple(float(c) for c in counts),
        int(inp.summary["count"]),
        finite_n,
        inp.summary.get("mean"),
        "summary",
    )


def distribution(
    candidate: SideInput | None, baseline: SideInput | None, *, bins: int = DEFAULT_BINS
) -> Distribution:
    """Both sides on common equal-width bins; a side without finite scores is left out."""
    notes: list[str] = []
    sides = {"candidate": candidate, "baseline": baseline}
    usable = {name: s for name, s in sides.items() if s is not None and s.usable()}
    for name, s in sides.items():
        if s is not None and name not in usable:
            notes.append(f"the {name} has no finite scores to draw")
    if not usable:
        return Distribution((), None, None, tuple(notes))
    bounds = [s.bounds() for s in usable.values()]
    edges = common_edges([b[0] for b in bounds], [b[1] for b in bounds], bins)
    built = {name: _side(s, edges) for name, s in usable.items()}
    for name, side in built.items():
        if side.source == "summary":
            notes.append(
                f"the {name}'s raw sample is gone; its bars come from the stored quantile summary"
            )
    return Distribution(
        tuple(float(e) for e in edges), built.get("candidate"), built.get("baseline"), tuple(notes)
    )


# --- segments -----------------------------------------------------------------------------


def _mean(values: np.ndarray) -> float | None:
    finite = values[np.isfinite(values)]
    return float(finite.mean()) if finite.size else None


def segment_table(candidate: Sample, baseline: Sample | None = None) -> list[dict[str, Any]]:
    """Rows, mean scores and label rate per value of each segment column of *candidate*.

    The baseline's mean comes from the candidate's own ``baseline_score`` column (the same
    rows, ``baseline_source = "same rows"``) when present, else from the baseline's sample rows
    of the same segment value (``"baseline sample"``), else it is None.
    """
    out: list[dict[str, Any]] = []
    total = len(candidate)
    score = candidate.score
    paired = candidate.column("baseline_score")
    label = candidate.column("label")
    for name in candidate.segment_names():
        column = candidate.columns[SEGMENT_PREFIX + name].astype(str)
        base_column = None
        if paired is None and baseline is not None:
            found = baseline.column(SEGMENT_PREFIX + name)
            base_column = found.astype(str) if found is not None else None
        values, counts = np.unique(column, return_counts=True)
        order = np.argsort(-counts, kind="stable")
        for rank, index in enumerate(order):
            if rank >= MAX_SEGMENT_VALUES:
                break
            value = values[index]
            mask = column == value
            cand_mean = _mean(score[mask])
            base_mean: float | None = None
            source = None
            if paired is not None:
                base_mean, source = _mean(paired[mask]), "same rows"
            elif base_column is not None and baseline is not None:
                base_mask = base_column == value
                if base_mask.any():
                    base_mean, source = _mean(baseline.score[base_mask]), "baseline sample"
            out.append(
                {
                    "segment": name,
                    "value": str(value),
                    "rows": int(mask.sum()),
                    "share": float(mask.sum()) / total if total else 0.0,
                    "nonfinite": int((~np.isfinite(score[mask])).sum()),
                    "candidate_mean": cand_mean,
                    "baseline_mean": base_mean,
                    "mean_change": (cand_mean - base_mean)
                    if cand_mean is not None and base_mean is not None
                    else None,
                    "baseline_source": source,
                    "label_rate": _mean(label[mask]) if label is not None else None,
                }
            )
    return json_safe(out)  # type: ignore[no-any-return]


def finding_segment_rows(findings: Sequence[Mapping[str, Any]]) -> list[dict[str, Any]]:
    """Per-segment rows that checks put in their findings' ``details["segments"]`` (a list of
    objects), each tagged with the check's name; anything else there is ignored."""
    rows: list[dict[str, Any]] = []
    for f in findings:
        details = f.get("details") or {}
        segments = details.get("segments") if isinstance(details, Mapping) else None
        if not isinstance(segments, list):
            continue
        for row in segments:
            if isinstance(row, Mapping):
                rows.append({"check": f.get("check"), **{str(k): v for k, v in row.items()}})
    return json_safe(rows)  # type: ignore[no-any-return]
