"""The check registry: how a check kind declares its policy keys and its function.

A check kind is a pydantic model (its policy keys, ``extra="forbid"``) plus a pure function
``run(config, ctx) -> list[Finding]``. Register both with :func:`register`::

    class MyConfig(CheckConfig):
        kind: Literal["my-kind"]
        limit: float

    @register("my-kind", MyConfig, family="drift")
    def run_my_kind(config: MyConfig, ctx: CheckContext) -> list[Finding]:
        ...

The function reports ``breach`` when its limit is crossed; :func:`service.gate.evaluate.evaluate`
turns a breach of a non-blocking check into ``advisory`` and wraps errors (fail closed).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import TYPE_CHECKING, Any, Literal

from pydantic import BaseModel, ConfigDict, Field

from service.gate.adaptive import AdaptiveRules, Transform
from service.gate.history import steps_apart
from service.gate.types import Finding, HistoryEntry, Snapshot

if TYPE_CHECKING:
    from service.gate.policy import Policy


class CheckConfig(BaseModel):
    """Keys every check accepts. Subclasses add their own and narrow ``kind`` to a literal."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    name: str = Field(min_length=1, max_length=100, description="Unique name within the policy.")
    kind: str = Field(description="The check kind; selects the other keys.")
    blocking: bool = Field(True, description="A breach holds the candidate; false: advisory.")
    against: Literal["baseline", "reference"] = Field(
        "baseline", description="Compare with the serving baseline or the longer-term reference."
    )
    description: str = Field("", description="Free text shown beside the finding.")
    adaptive: AdaptiveRules | None = Field(
        None, description="Learn the limit from earlier healthy promotions (see adaptive keys)."
    )
    learn: bool = Field(
        True,
        description="With a [budget] in the policy: learn this check's limit from healthy "
        "history at its share of the budget; false keeps the stated static limit.",
    )

    def model_post_init(self, context: Any, /) -> None:
        """Run the cross-key rules once the keys themselves are valid (pydantic reports a
        ValueError raised here as a validation error of the check)."""
        self.consistency()

    def consistency(self) -> None:
        """Raise ValueError when keys contradict each other. A kind with rules of its own
        overrides this and calls ``super().consistency()`` first."""
        if self.adaptive is not None and self.learning() == "none":
            raise ValueError(f"check kind {self.kind!r} does not learn limits; drop 'adaptive'")

    def learning(self) -> Literal["value", "own", "none"]:
        """How this kind learns from history: ``value`` (the generic path: the finding's
        ``value`` against a limit on :meth:`bad_side`, see :mod:`service.gate.adaptive`),
        ``own`` (the check learns inside its run, e.g. per segment) or ``none``. A new kind
        that reports a value on a bad side learns through the generic path without more code."""
        return "value"

    def natural_transform(self) -> Transform:
        """The scale on which this check's values are close to normal, for learned limits:
        ``log`` for non-negative statistics, ``log1m`` for correlations and overlaps near 1."""
        return "none"

    def adaptive_side(self) -> Literal["upper", "lower"]:
        """Which way a value is bad, for a learned limit: the ``adaptive.side`` key, else the
        check's :meth:`bad_side`."""
        if self.adaptive is not None and self.adaptive.side is not None:
            return self.adaptive.side
        return self.bad_side()

    def bad_side(self) -> Literal["upper", "lower"]:
        """``lower`` for a check with ``direction = "higher"`` (higher is better), else
        ``upper``. Check kinds whose ``value`` is bad when low override this."""
        if getattr(self, "direction", None) == "higher":
            return "lower"
        return "upper"


@dataclass(frozen=True)
class CheckContext:
    """What a check sees. ``other`` is the snapshot named by the check's ``against`` key."""

    candidate: Snapshot
    other: Snapshot | None
    baseline: Snapshot | None
    reference: Snapshot | None
    history: tuple[HistoryEntry, ...]
    now: datetime
    policy: Policy
    baseline_since: datetime | None = None
    known_keys: frozenset[str] | None = None

    @property
    def seed(self) -> int:
        return self.policy.seed

    @property
    def steps(self) -> float:
        """Usual push intervals between the candidate's and the baseline's watermarks (at least
        1): a learned limit for one step widens for a candidate further away."""
        if self.baseline is None:
            return 1.0
        return steps_apart(self.candidate.trained_until, self.baseline.trained_until, self.history)


CheckFn = Callable[[Any, CheckContext], Sequence[Finding]]


@dataclass(frozen=True)
class CheckSpec:
    kind: str
    family: str
    config: type[CheckConfig]
    run: CheckFn
    #: True when the check needs the other snapshot (skipped when there is none).
    needs_other: bool = True


REGISTRY: dict[str, CheckSpec] = {}


def register(
    kind: str, config: type[CheckConfig], *, family: str, needs_other: bool = True
) -> Callable[[CheckFn], CheckFn]:
    """Class the decorated function as the runner of check *kind* (see module docstring)."""

    def decorate(fn: CheckFn) -> CheckFn:
        if kind in REGISTRY:
            raise RuntimeError(f"check kind {kind!r} registered twice")
        REGISTRY[kind] = CheckSpec(
            kind=kind, family=family, config=config, run=fn, needs_other=needs_other
        )
        return fn

    return decorate


def skipped(config: CheckConfig, message: str, *, statistic: str | None = None) -> Finding:
    """A ``skipped`` finding: the inputs this check needs are absent."""
    return Finding(
        check=config.name,
        kind=config.kind,
        outcome="skipped",
        message=message,
        statistic=statistic,
        blocking=config.blocking,
        against=config.against,
    )


def format_p(pvalue: float | None) -> str:
    """A p-value for a sentence: ``p = 0.0032``, or ``p < 1e-16`` below double precision."""
    if pvalue is None:
        return ""
    return "p < 1e-16" if pvalue < 1e-16 else f"p = {pvalue:.3g}"


def over_limit(value: float, limit: float | None) -> bool:
    """True when *value* exceeds *limit* (no limit: never)."""
    return limit is not None and value > limit
