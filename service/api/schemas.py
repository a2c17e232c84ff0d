"""Request and response schemas, one per purpose. Never ORM classes."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import (
    AfterValidator,
    AwareDatetime,
    BaseModel,
    ConfigDict,
    Field,
    Strict,
    StringConstraints,
)

from service.text import DOT_KEYS

# Input types. Numbers are strict (JSON numbers only: no true/false, no "0.5" text); text has
# no control characters (PostgreSQL text cannot hold NUL; pydantic already refuses lone
# surrogates); integers that reach the database fit its 64-bit columns.
# Control characters are C0, DEL and C1 (U+0085 included); see service/text.py.


def _not_dots(value: str) -> str:
    if value in DOT_KEYS:
        raise ValueError(
            "'.' and '..' are not keys (a page address holding one means another page)"
        )
    return value


Key = Annotated[
    str,
    StringConstraints(min_length=1, max_length=200, pattern=r"^[^/\\\x00-\x1f\x7f-\x9f]+$"),
    AfterValidator(_not_dots),
]
ShortText = Annotated[str, StringConstraints(max_length=200, pattern=r"^[^\x00-\x1f\x7f-\x9f]*$")]
#: Free text (reasons): line breaks and tabs allowed, other control characters not.
FreeText = Annotated[
    str,
    StringConstraints(
        min_length=1, max_length=2000, pattern=r"^[^\x00-\x08\x0b\x0c\x0e-\x1f\x7f-\x9f]*$"
    ),
]
Number = Annotated[float, Strict()]
FiniteFloat = Annotated[float, Strict(), Field(allow_inf_nan=False)]
BIGINT_MAX = 2**63 - 1
#: Row ids are 32-bit integers (PostgreSQL ``integer``); a larger id in a path is a 422.
MAX_ID = 2**31 - 1
Count = Annotated[int, Strict(), Field(ge=0, le=BIGINT_MAX)]
Rank = Annotated[int, Strict(), Field(ge=1, le=1_000_000_000)]
TextValue = str | Annotated[int, Strict()]


class SampleIn(BaseModel):
    """The sample, columnar: one array per column, all of one length. Besides the columns
    below, any number of ``segment.<name>`` columns of text (or integer) values."""

    model_config = ConfigDict(
        extra="allow",
        json_schema_extra={
            "additionalProperties": {"type": "array", "items": {"type": ["string", "integer"]}}
        },
    )

    score: list[Number | None] = Field(
        description="The candidate's scores; null, NaN and Infinity are kept and judged."
    )
    label: list[FiniteFloat] | None = Field(None, description="Outcome: 0/1 or graded relevance.")
    baseline_score: list[Number | None] | None = Field(
        None, description="The baseline's scores on the same rows."
    )
    served_score: list[Number | None] | None = Field(
        None, description="The score serving logged for the same rows."
    )
    row_id: list[TextValue] | None = Field(None, description="Row identifiers (unique).")
    group: list[TextValue] | None = Field(None, description="Query / request / user of the row.")
    item: list[TextValue] | None = Field(None, description="Recommended item of the row.")
    rank: list[Rank] | None = Field(None, description="Position of the item in its group's list.")
    # Logged exploration (off-policy estimates): one row per logged action. A row whose log
    # columns are all null is not a logged row. Values out of range are stored and held with
    # the health finding ``health.log`` (see README, "Off-policy evaluation").
    reward: list[Number | None] | None = Field(
        None, description="Logged exploration: the observed reward of the logged action."
    )
    logging_propensity: list[Number | None] | None = Field(
        None,
        description="Probability the logging policy gave the logged action in its context, "
        "in (0, 1].",
    )
    candidate_propensity: list[Number | None] | None = Field(
        None, description="Probability the candidate would take the logged action, in [0, 1]."
    )
    baseline_propensity: list[Number | None] | None = Field(
        None, description="Probability the baseline would take the logged action, in [0, 1]."
    )
    reward_prediction: list[Number | None] | None = Field(
        None, description="A reward model's prediction for the logged action (doubly robust)."
    )
    candidate_expected_reward: list[Number | None] | None = Field(
        None, description="That model's expected reward under the candidate in the row's context."
    )
    baseline_expected_reward: list[Number | None] | None = Field(
        None, description="That model's expected reward under the baseline in the row's context."
    )


class SnapshotMeta(BaseModel):
    """One snapshot's fields without its sample: the ``snapshot`` part of a multipart post."""

    model_config = ConfigDict(extra="forbid")

    key: Key = Field(description="The trainer's own key for this snapshot, unique per model.")
    parent: Key | None = Field(None, description="Key of the snapshot this one was trained from.")
    trained_until: AwareDatetime | None = Field(
        None, description="Watermark: the newest interaction the snapshot was trained on."
    )
    code_version: ShortText | None = Field(None, description="Version of the training code.")
    rows_trained: Count | None = Field(None, description="Rows trained on in this step.")
    tags: dict[ShortText, ShortText] = Field(default_factory=dict, description="Free labels.")
    metrics: dict[ShortText, FiniteFloat] = Field(
        default_factory=dict, description="Metrics the trainer computed itself."
    )


class SnapshotCreate(SnapshotMeta):
    """One snapshot posted by the retraining job."""

    sample: SampleIn | None = Field(None, description="Scored rows (see SampleIn).")


class FindingPublic(BaseModel):
    check: str
    kind: str
    outcome: Literal["ok", "breach", "advisory", "inconclusive", "underpowered", "skipped"]
    statistic: str | None = None
    value: float | None = None
    limit: float | None = None
    pvalue: float | None = None
    baseline_value: float | None = None
    candidate_value: float | None = None
    interval: list[float] | None = None
    blocking: bool = True
    against: str | None = None
    message: str
    details: dict[str, Any] = Field(default_factory=dict)


class OverridePublic(BaseModel):
    id: int
    decision: Literal["promote", "hold"]
    reason: str
    actor: str
    created_at: str


class VerdictSummary(BaseModel):
    verdict_id: int
    model: str
    snapshot: str
    decision: Literal["promote", "hold"]
    effective_decision: Literal["promote", "hold"]
    overridden: bool
    reasons: list[str]
    moved_baseline: bool
    created_at: str
    trained_until: str | None = None


class VerdictPublic(VerdictSummary):
    baseline: str | None = None
    reference: str | None = None
    policy: str | None = None
    policy_digest: str | None = None
    error: str | None = None
    duration_ms: float
    findings: list[FindingPublic]
    overrides: list[OverridePublic]
    previous_verdict_id: int | None = None
    next_verdict_id: int | None = None
    serves_now: bool = Field(
        False, description="The snapshot is the one serving at the time of this answer."
    )


class VerdictList(BaseModel):
    data: list[VerdictSummary]
    count: int
    next_cursor: str | None = None


class StuckPublic(BaseModel):
    """Whether the model is stuck behind repeated holds (policy ``[history]``)."""

    stuck: bool
    consecutive_holds: int
    threshold: int
    baseline_age_seconds: float | None = None
    message: str


class ModelPublic(BaseModel):
    name: str
    baseline: str | None = None
    baseline_since: str | None = None
    baseline_age_seconds: float | None = None
    baseline_trained_until: str | None = Field(
        None, description="The serving snapshot's training watermark (where its data ends)."
    )
    baseline_data_age_seconds: float | None = Field(
        None,
        description="Seconds since the serving snapshot's data ends (differs from the serving "
        "age after a roll-back to an old snapshot).",
    )
    baseline_cause: str | None = Field(
        None, description="How the baseline came to serve: verdict, override, rollback, manual."
    )
    reference: str | None = Field(None, description="The reference pinned by an operator.")
    reference_lag_hours: float | None = Field(
        None, description="Without a pinned reference: the baseline as of this many hours ago."
    )
    last_verdict: VerdictSummary | None = None
    holds_24h: int
    consecutive_holds: int
    stuck: StuckPublic
    created_at: str


class ModelList(BaseModel):
    data: list[ModelPublic]
    count: int


class SnapshotPublic(BaseModel):
    model: str
    key: str
    parent: str | None = None
    trained_until: str | None = None
    code_version: str | None = None
    rows_trained: int | None = None
    metrics: dict[str, float]
    tags: dict[str, str]
    sample_rows: int
    columns: list[str]
    summary: dict[str, Any] | None = None
    sample_pruned_at: str | None = None
    content_digest: str = Field(
        description="Digest of the post's content (README, 'Content digest'): a retry with "
        "the same digest is answered with the stored verdict."
    )
    created_at: str
    verdict_id: int | None = None
    is_baseline: bool


class BaselineSet(BaseModel):
    """Make a stored snapshot the baseline: promote by hand, or roll back."""

    model_config = ConfigDict(extra="forbid")

    snapshot: Key = Field(description="Key of the snapshot to serve.")
    reason: FreeText = Field(description="Why (kept in the audit log).")


class BaselinePublic(BaseModel):
    model: str
    baseline: str
    previous: str | None = None
    cause: str


class ReferenceSet(BaseModel):
    """Pin a stored snapshot as the model's reference, or unpin (``snapshot`` null)."""

    model_config = ConfigDict(extra="forbid")

    snapshot: Key | None = Field(
        description="Key of the snapshot to pin; null unpins (the policy's lag applies again)."
    )
    reason: FreeText = Field(description="Why (kept in the audit log).")


class ReferencePublic(BaseModel):
    model: str
    reference: str | None = None
    previous: str | None = None


class PolicyCheckPublic(BaseModel):
    name: str
    kind: str
    blocking: bool
    against: str


class PolicyPublic(BaseModel):
    name: str
    path: str
    digest: str
    models: list[str]
    description: str
    first_snapshot: str
    on_inconclusive: str
    checks: list[PolicyCheckPublic]
    text: str


class PolicyList(BaseModel):
    data: list[PolicyPublic]
    count: int


class OverrideCreate(BaseModel):
    """An operator's change of a verdict's decision."""

    model_config = ConfigDict(extra="forbid")

    decision: Literal["promote", "hold"] = Field(description="The decision to put in force.")
    reason: Annotated[
        str,
        StringConstraints(
            strip_whitespace=True,
            min_length=1,
            max_length=2000,
            pattern=r"^[^\x00-\x08\x0b\x0c\x0e-\x1f\x7f-\x9f]*$",
        ),
    ] = Field(description="Why (required; kept with the override and in the audit log).")


class OverrideResult(BaseModel):
    override: OverridePublic
    verdict: VerdictPublic
    decision_before: Literal["promote", "hold"]
    baseline_before: str | None = None
    baseline_after: str | None = None
    baseline_moved: bool
    note: str


class DistributionSide(BaseModel):
    label: str
    counts: list[float]
    shares: list[float]
    rows: int
    finite: int
    mean: float | None = None
    source: Literal["sample", "summary", "paired"]


class DistributionPublic(BaseModel):
    edges: list[float]
    candidate: DistributionSide | None = None
    baseline: DistributionSide | None = None
    notes: list[str] = Field(default_factory=list)


class SnapshotBrief(BaseModel):
    key: str
    trained_until: str | None = None
    code_version: str | None = None
    rows_trained: int | None = None
    sample_rows: int
    sample_pruned: bool
    metrics: dict[str, float]
    score_mean: float | None = None
    score_std: float | None = None
    nonfinite: int | None = None
    created_at: str | None = None


class PromotionPublic(BaseModel):
    id: int
    snapshot: str | None = None
    previous: str | None = None
    cause: str
    verdict_id: int | None = None
    actor: str
    reason: str
    created_at: str


class ComparisonPublic(BaseModel):
    against: Literal["baseline", "reference"]
    key: str | None = None
    checks: list[str]
    distribution: DistributionPublic
    snapshot: SnapshotBrief | None = None


class EvidencePublic(BaseModel):
    verdict_id: int
    model: str
    snapshot: str
    baseline: str | None = None
    distribution: DistributionPublic
    segments: list[dict[str, Any]]
    finding_segments: list[dict[str, Any]]
    candidate: SnapshotBrief
    baseline_snapshot: SnapshotBrief | None = None
    reference: str | None = Field(None, description="The reference the verdict was judged with.")
    reference_snapshot: SnapshotBrief | None = None
    compared_with: list[Literal["baseline", "reference"]] = Field(
        default_factory=list,
        description="What the failed findings compared the candidate with (the baseline alone "
        "when none compared with anything).",
    )
    comparisons: list[ComparisonPublic] = Field(
        default_factory=list,
        description="The candidate's score distribution beside each side in compared_with.",
    )
    lists: dict[str, Any] | None = Field(
        None,
        description="For list checks: items that gained and lost the most slots (share "
        "before and after), coverage and Gini on both sides, Lorenz curves of exposure.",
    )
    serving: str | None = None
    serving_since: str | None = None
    candidate_serving: bool
    promotions: list[PromotionPublic]


class AuditPublic(BaseModel):
    id: int
    at: str
    actor: str
    action: str
    model: str | None = None
    target: str | None = None
    before: dict[str, Any] | None = None
    after: dict[str, Any] | None = None
    reason: str


class AuditList(BaseModel):
    data: list[AuditPublic]
    count: int
    next_cursor: str | None = None


class ErrorBody(BaseModel):
    code: str
    message: str
    field: str | None = None
    details: list[dict[str, Any]] = Field(default_factory=list)


class ErrorResponse(BaseModel):
    error: ErrorBody


class Health(BaseModel):
    status: Literal["ok", "not_ready"]
    detail: dict[str, Any] = Field(default_factory=dict)


class ReplayRequest(BaseModel):
    """Judge past snapshots again under a policy (the one in force when omitted)."""

    model_config = ConfigDict(extra="forbid")

    policy: Annotated[str, StringConstraints(max_length=200_000)] | None = Field(
        None, description="Policy TOML text to try; omitted: the policy in force."
    )
    limit: int = Field(100, ge=1, le=1000, description="How many of the latest verdicts.")


class ReplayRow(BaseModel):
    verdict_id: int
    snapshot: str
    created_at: str
    baseline: str | None = None
    decision: Literal["promote", "hold"]
    effective_decision: Literal["promote", "hold"]
    replay_decision: Literal["promote", "hold"]
    replay_reasons: list[str]
    changed: bool
    sample_pruned: bool


class ReplayPublic(BaseModel):
    model: str
    policy: str
    policy_digest: str
    summary: dict[str, Any]
    data: list[ReplayRow]


class DeliveryPublic(BaseModel):
    """One webhook message about a model (hold, stuck or override) and how its delivery went."""

    id: int
    event: str
    verdict_id: int | None
    snapshot: str | None
    state: Literal["pending", "delivered", "failed"]
    attempts: int
    last_status: int | None
    last_error: str | None
    created_at: str | None
    last_attempt_at: str | None
    delivered_at: str | None
    next_attempt_at: str | None


class DeliveryList(BaseModel):
    data: list[DeliveryPublic]
    count: int


class AskedSnapshot(BaseModel):
    """Where the snapshot asked about (``?snapshot=``) stands."""

    snapshot: str
    state: Literal["serves", "waiting", "superseded"] = Field(
        description="serves: it is the baseline; superseded: a newer snapshot serves (only a "
        "rollback would bring it back); waiting: an override to promote would make it serve."
    )
    verdict_id: int | None = None
    decision: Literal["promote", "hold"] | None = None
    effective_decision: Literal["promote", "hold"] | None = None


class ServingPublic(BaseModel):
    """The snapshot that serves now (what a deploy step ships)."""

    model: str
    snapshot: str | None = Field(description="Key of the serving snapshot; null: none yet.")
    since: str | None = None
    trained_until: str | None = None
    cause: Literal["gate", "override", "manual", "rollback"] | None = None
    verdict_id: int | None = None
    audit_id: int | None = None
    actor: str | None = None
    reason: str | None = None
    asked: AskedSnapshot | None = None
