"""Value types of the decision: what goes into :func:`service.gate.evaluate.evaluate` and what
comes out.

Everything here is a frozen dataclass over numpy arrays and plain Python values. The gate never
reads a clock, a file or a database: the store builds these objects, the gate judges them.

Vocabulary (see DESIGN.md §2): a *candidate* snapshot is judged against the *baseline* (the
snapshot that serves now) and optionally a *reference* (a longer-term anchor). Each check yields
one or more *findings*; the *verdict* is ``promote`` or ``hold`` with its findings and reasons.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any, Literal

import numpy as np

from service.stats.offpolicy import LOG_COLUMNS as LOG_COLUMNS
from service.stats.offpolicy import MODEL_COLUMNS as MODEL_COLUMNS

Outcome = Literal["ok", "breach", "advisory", "inconclusive", "underpowered", "skipped"]
Decision = Literal["promote", "hold"]

OUTCOMES: tuple[Outcome, ...] = (
    "ok",
    "breach",
    "advisory",
    "inconclusive",
    "underpowered",
    "skipped",
)
DECISIONS: tuple[Decision, ...] = ("promote", "hold")

#: Columns with a fixed meaning; any other column must be named ``segment.<name>``.
# The logged-exploration columns (off-policy estimates) are declared with their estimators:
# LOG_COLUMNS (reward and the three propensities), MODEL_COLUMNS (a reward model's, optional).
NUMERIC_COLUMNS = (
    ("score", "label", "baseline_score", "served_score", "rank") + LOG_COLUMNS + MODEL_COLUMNS
)
TEXT_COLUMNS = ("row_id", "group", "item")
KNOWN_COLUMNS = NUMERIC_COLUMNS + TEXT_COLUMNS
SEGMENT_PREFIX = "segment."


def json_safe(value: Any) -> Any:
    """*value* with numpy scalars made plain and non-finite floats made None (strict JSON)."""
    if isinstance(value, Mapping):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, np.ndarray)):
        return [json_safe(v) for v in value]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        number = float(value)
        return number if math.isfinite(number) else None
    return value


@dataclass(frozen=True)
class Sample:
    """A columnar sample: one array per column, all of one length.

    Numeric columns (``score``, ``label``, ``baseline_score``, ``served_score``, ``rank`` and the
    logged-exploration columns :data:`LOG_COLUMNS`, :data:`MODEL_COLUMNS`) are float64 arrays
    (non-finite values kept as NaN/inf: the model produced them); text columns (``row_id``,
    ``group``, ``item`` and every ``segment.<name>``) are object arrays of ``str``.
    """

    columns: Mapping[str, np.ndarray]

    def __post_init__(self) -> None:
        if "score" not in self.columns:
            raise ValueError("a sample needs a 'score' column")
        lengths = {name: len(values) for name, values in self.columns.items()}
        if len(set(lengths.values())) > 1:
            raise ValueError(f"sample columns differ in length: {lengths}")

    def __len__(self) -> int:
        return len(self.columns["score"])

    @property
    def score(self) -> np.ndarray:
        return self.columns["score"]

    def column(self, name: str) -> np.ndarray | None:
        """The column called *name*, or None when the sample does not carry it."""
        return self.columns.get(name)

    def segment_names(self) -> list[str]:
        """Names of the segment columns, without the ``segment.`` prefix, sorted."""
        return sorted(
            name[len(SEGMENT_PREFIX) :] for name in self.columns if name.startswith(SEGMENT_PREFIX)
        )

    def take(self, mask: np.ndarray) -> Sample:
        """The rows where *mask* is true, as a new sample."""
        return Sample({name: values[mask] for name, values in self.columns.items()})


@dataclass(frozen=True)
class SampleSummary:
    """A small summary of a score column that outlives the raw sample (see retention)."""

    count: int
    finite: int
    mean: float | None
    std: float | None
    minimum: float | None
    maximum: float | None
    #: Quantiles of the finite scores at levels 0, 0.01, ..., 1 (101 values), empty if none.
    quantiles: tuple[float, ...] = ()
    #: Equal-width histogram of the finite scores between minimum and maximum.
    hist_edges: tuple[float, ...] = ()
    hist_counts: tuple[int, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        return {
            "count": self.count,
            "finite": self.finite,
            "mean": self.mean,
            "std": self.std,
            "min": self.minimum,
            "max": self.maximum,
            "quantiles": list(self.quantiles),
            "hist_edges": list(self.hist_edges),
            "hist_counts": list(self.hist_counts),
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> SampleSummary:
        return cls(
            count=int(data["count"]),
            finite=int(data["finite"]),
            mean=data.get("mean"),
            std=data.get("std"),
            minimum=data.get("min"),
            maximum=data.get("max"),
            quantiles=tuple(data.get("quantiles", ())),
            hist_edges=tuple(data.get("hist_edges", ())),
            hist_counts=tuple(data.get("hist_counts", ())),
        )


@dataclass(frozen=True)
class Snapshot:
    """One trained state of a model, as the gate sees it."""

    model: str
    key: str
    parent: str | None = None
    trained_until: datetime | None = None
    code_version: str | None = None
    rows_trained: int | None = None
    metrics: Mapping[str, float] = field(default_factory=dict)
    tags: Mapping[str, str] = field(default_factory=dict)
    sample: Sample | None = None
    summary: SampleSummary | None = None
    created_at: datetime | None = None


@dataclass(frozen=True)
class HistoryEntry:
    """One earlier verdict of the same model, newest first in :class:`GateInput.history`.

    ``healthy`` is decided by the store: the snapshot was promoted (by its verdict or an
    override) and was not rolled back later. ``values`` maps a check name to the value that
    check reported for that snapshot (only checks that produced a number).
    """

    snapshot_key: str
    created_at: datetime
    decision: Decision
    effective_decision: Decision
    healthy: bool
    rows_trained: int | None = None
    trained_until: datetime | None = None
    values: Mapping[str, float] = field(default_factory=dict)


@dataclass(frozen=True)
class GateInput:
    """Everything one evaluation may look at. ``now`` is passed in: the gate has no clock."""

    candidate: Snapshot
    baseline: Snapshot | None
    now: datetime
    reference: Snapshot | None = None
    history: tuple[HistoryEntry, ...] = ()
    baseline_since: datetime | None = None
    #: Stored snapshot keys of the model among those the gate needs (the candidate's parent),
    #: None when not loaded.
    known_keys: frozenset[str] | None = None
    #: The newest watermark (``trained_until``) of any earlier snapshot of the model, held or
    #: promoted, None when none had one or it was not loaded. Lineage compares with it, so a
    #: held snapshot's watermark still bars a replayed (older) job.
    newest_watermark: datetime | None = None


@dataclass(frozen=True)
class Finding:
    """One check's result.

    ``value`` is the statistic's value, ``limit`` the limit it was held to; ``baseline_value``
    and ``candidate_value`` are the two sides where the check compares a quantity. ``interval`` is
    a confidence interval of ``value`` where the check computes one. ``details`` holds JSON-safe
    evidence (per-segment tables, histograms). No float field is ever NaN or infinite: a value
    that cannot be computed is None and the message says why.
    """

    check: str
    kind: str
    outcome: Outcome
    message: str
    statistic: str | None = None
    value: float | None = None
    limit: float | None = None
    pvalue: float | None = None
    baseline_value: float | None = None
    candidate_value: float | None = None
    interval: tuple[float, float] | None = None
    blocking: bool = True
    against: str | None = None
    details: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        for name in ("value", "limit", "pvalue", "baseline_value", "candidate_value"):
            number = getattr(self, name)
            if number is not None:
                number = float(number)
                object.__setattr__(self, name, number if math.isfinite(number) else None)
        if self.interval is not None:
            low, high = (float(x) for x in self.interval)
            if math.isfinite(low) and math.isfinite(high):
                object.__setattr__(self, "interval", (low, high))
            else:
                object.__setattr__(self, "interval", None)

    def to_dict(self) -> dict[str, Any]:
        return {
            "check": self.check,
            "kind": self.kind,
            "outcome": self.outcome,
            "statistic": self.statistic,
            "value": self.value,
            "limit": self.limit,
            "pvalue": self.pvalue,
            "baseline_value": self.baseline_value,
            "candidate_value": self.candidate_value,
            "interval": list(self.interval) if self.interval is not None else None,
            "blocking": self.blocking,
            "against": self.against,
            "message": self.message,
            "details": json_safe(self.details),
        }

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> Finding:
        interval = data.get("interval")
        return cls(
            check=data["check"],
            kind=data["kind"],
            outcome=data["outcome"],
            message=data.get("message", ""),
            statistic=data.get("statistic"),
            value=data.get("value"),
            limit=data.get("limit"),
            pvalue=data.get("pvalue"),
            baseline_value=data.get("baseline_value"),
            candidate_value=data.get("candidate_value"),
            interval=tuple(interval) if interval else None,
            blocking=bool(data.get("blocking", True)),
            against=data.get("against"),
            details=data.get("details") or {},
        )


@dataclass(frozen=True)
class Verdict:
    """The decision for a candidate, with the evidence it rests on."""

    decision: Decision
    reasons: tuple[str, ...]
    findings: tuple[Finding, ...]
    policy_name: str | None
    policy_digest: str | None
    baseline_key: str | None
    #: Whether the store should make the candidate the baseline (promote and policy allows).
    moves_baseline: bool = False
    #: Set when evaluation failed; the decision is then ``hold`` (fail closed).
    error: str | None = None
