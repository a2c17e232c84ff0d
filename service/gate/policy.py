"""Policies: which checks run, with which limits, for which models.

A policy is a TOML file in the policy folder. Its top-level keys are declared by :class:`Policy`;
each ``[[checks]]`` table is validated by the pydantic model its ``kind`` registered (see
:mod:`service.gate.checks.base`). Unknown keys and wrong types raise :class:`PolicyError`, whose
message names the file, the check and the key.

Matching: a model name is matched against every policy's ``models`` patterns (shell-style,
``fnmatch``). An exact name beats a pattern; among patterns the longest wins; ties go to the file
that sorts first.
"""

from __future__ import annotations

import fnmatch
import hashlib
import tomllib
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError

from service.gate.adaptive import AdaptiveRules, BudgetRules, LearnPlan, make_plan
from service.gate.checks import REGISTRY, CheckConfig


class PolicyError(ValueError):
    """A policy file that cannot be used; the message names file, check and key."""

    def __init__(
        self, message: str, *, file: str, check: str | None = None, key: str | None = None
    ):
        self.file = file
        self.check = check
        self.key = key
        where = file + (f", check {check!r}" if check else "") + (f", key {key!r}" if key else "")
        super().__init__(f"{where}: {message}")


class SampleRules(BaseModel):
    """Health rules for the candidate's own sample. Always blocking."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    required: bool = Field(
        True,
        description="Posts must carry a sample (422 otherwise). false: the policy judges "
        "reported metrics only, and a post without a sample skips the sample's health checks.",
    )
    min_rows: int = Field(1000, ge=1, description="Fewer sample rows than this is a breach.")
    score_min: float | None = Field(0.0, description="Lowest allowed score; omit for no bound.")
    score_max: float | None = Field(1.0, description="Highest allowed score; omit for no bound.")
    max_nonfinite_share: float = Field(
        0.0, ge=0.0, le=1.0, description="Largest allowed share of NaN/inf/null scores."
    )
    max_out_of_range_share: float = Field(
        0.0, ge=0.0, le=1.0, description="Largest allowed share of scores outside the range."
    )
    min_std: float = Field(
        1e-3,
        ge=0.0,
        description="A score standard deviation at or below this is collapsed output when "
        "there is no baseline spread to compare with (a model's first snapshot).",
    )
    min_std_ratio: float = Field(
        0.2,
        ge=0.0,
        lt=1.0,
        description="A score standard deviation at or below this share of the baseline's is "
        "collapsed output; 0 turns the relative rule off.",
    )
    max_mode_share: float = Field(
        0.5, gt=0.0, le=1.0, description="Largest allowed share of rows sharing one score value."
    )


class LineageRules(BaseModel):
    """Rules on where the candidate comes from."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    require_watermark: bool = Field(
        False, description="Hold a candidate that does not say how far it was trained."
    )
    watermark_must_advance: bool = Field(
        True, description="Hold a candidate trained no further than the baseline (stale)."
    )
    require_known_parent: bool = Field(
        False, description="Hold a candidate whose parent key is not a known snapshot."
    )


class ReferenceRules(BaseModel):
    """Which snapshot is the model's reference (the longer-term anchor against creep).

    An operator's pinned reference always wins. Without one, ``lag_hours`` makes the reference
    the snapshot that was the baseline that many hours ago; with neither there is no reference
    and checks with ``against = "reference"`` are skipped.
    """

    model_config = ConfigDict(extra="forbid", frozen=True)

    lag_hours: float | None = Field(
        None, gt=0, description="Reference: the baseline as of this many hours ago, unless pinned."
    )


class HistoryRules(BaseModel):
    """Rules on the model's own verdict history."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    stuck_after_holds: int = Field(
        4,
        ge=0,
        description="After this many holds in a row every verdict carries an advisory "
        "finding and the model list shows the model as stuck; 0 turns it off.",
    )


class PolicyBody(BaseModel):
    """The top-level keys of a policy file (``checks`` is validated per kind)."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    models: list[str] = Field(min_length=1, description="Model name patterns (fnmatch).")
    description: str = Field("", description="Free text.")
    first_snapshot: Literal["promote-if-healthy", "hold"] = Field(
        "promote-if-healthy",
        description="What to do with a model's first snapshot (there is no baseline yet).",
    )
    on_inconclusive: Literal["hold", "promote"] = Field(
        "hold", description="Decision when a blocking check is inconclusive."
    )
    on_underpowered: Literal["hold", "promote"] = Field(
        "promote",
        description="Decision when a blocking check is underpowered (its sample is too small "
        "to decide against its margin); promote by default.",
    )
    promote_moves_baseline: bool = Field(
        True, description="A promote verdict makes the candidate the baseline."
    )
    seed: int = Field(20261201, description="Seed for resampling checks (bootstrap).")
    sample: SampleRules = Field(default_factory=SampleRules)
    lineage: LineageRules = Field(default_factory=LineageRules)
    reference: ReferenceRules = Field(default_factory=ReferenceRules)
    history: HistoryRules = Field(default_factory=HistoryRules)
    budget: BudgetRules | None = Field(
        None, description="The false-hold budget that sets every learned limit (see [budget])."
    )
    checks: list[dict[str, Any]] = Field(default_factory=list)


@dataclass(frozen=True)
class Policy:
    """A loaded, validated policy. ``digest`` is ``sha256:`` of the file's exact bytes."""

    name: str
    path: str
    text: str
    digest: str
    models: tuple[str, ...]
    description: str
    first_snapshot: str
    on_inconclusive: str
    promote_moves_baseline: bool
    seed: int
    sample: SampleRules
    lineage: LineageRules
    checks: tuple[CheckConfig, ...]
    reference: ReferenceRules = ReferenceRules()
    history: HistoryRules = HistoryRules()
    on_underpowered: str = "promote"
    budget: BudgetRules | None = None

    def budget_checks(self) -> tuple[str, ...]:
        """Names of the blocking checks that share the false-hold budget: those that learn
        under it (``learn = true``, a kind that learns, no adaptive table of another method)."""
        if self.budget is None:
            return ()
        return tuple(
            c.name
            for c in self.checks
            if c.blocking
            and c.learn
            and c.learning() != "none"
            and (c.adaptive is None or c.adaptive.method in (None, "budget"))
        )

    def learn_plan(self, config: CheckConfig) -> LearnPlan | None:
        """How *config* learns its limit under this policy, None when it keeps a static one.

        With a ``[budget]``, each of the :meth:`budget_checks` gets the level
        ``budget / m`` (a Bonferroni split over the ``m`` checks); a non-blocking check learns
        at the same level but does not count towards ``m`` (it never holds).
        """
        if config.learning() == "none":
            return None
        if config.adaptive is None and (self.budget is None or not config.learn):
            return None
        sharing = self.budget_checks()
        m = max(1, len(sharing))
        level = self.budget.level / m if self.budget is not None else None
        return make_plan(
            config.adaptive,
            budget=self.budget,
            side=config.adaptive_side(),
            natural=config.natural_transform(),
            level=level,
            shared_by=m,
        )

    def history_depth(self) -> int:
        """How many recent verdicts the store should load as ``GateInput.history``.

        Four times the largest history window of any check (held and excluded entries also
        take room), at least ``stuck_after_holds`` and 50, at most 2000.
        """
        widest = 0
        if self.budget is not None:
            widest = self.budget.window
        for check in self.checks:
            if check.adaptive is not None and check.adaptive.window is not None:
                widest = max(widest, check.adaptive.window)
            window = getattr(check, "window", None)
            if isinstance(window, int):
                widest = max(widest, window)
        return min(2000, max(50, 4 * widest, self.history.stuck_after_holds))

    def matches(self, model: str) -> bool:
        return any(fnmatch.fnmatchcase(model, pattern) for pattern in self.models)

    def match_strength(self, model: str) -> tuple[int, int] | None:
        """(exact?, pattern length) of the best pattern matching *model*, None if none."""
        best: tuple[int, int] | None = None
        for pattern in self.models:
            if fnmatch.fnmatchcase(model, pattern):
                strength = (1 if pattern == model else 0, len(pattern))
                best = strength if best is None or strength > best else best
        return best


def digest_text(text: str) -> str:
    return "sha256:" + hashlib.sha256(text.encode("utf-8")).hexdigest()


def _first_error(exc: ValidationError) -> tuple[str, str]:
    err = exc.errors()[0]
    key = ".".join(str(part) for part in err["loc"]) or "(top level)"
    msg = err["msg"]
    if err["type"] == "extra_forbidden":
        msg = "unknown key"
    return key, msg


def parse_policy(text: str, *, name: str, path: str = "") -> Policy:
    """Parse and validate one policy's TOML *text*; *name* is usually the file stem."""
    file = path or name
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise PolicyError(f"not valid TOML: {exc}", file=file) from None
    try:
        body = PolicyBody.model_validate(raw)
    except ValidationError as exc:
        key, msg = _first_error(exc)
        if key.startswith("checks."):
            key = key.split(".", 2)[-1] if key.count(".") >= 2 else key
        raise PolicyError(msg, file=file, key=key) from None
    checks: list[CheckConfig] = []
    seen: set[str] = set()
    for index, table in enumerate(body.checks):
        label = str(table.get("name") or f"#{index + 1}")
        kind = table.get("kind")
        if not isinstance(kind, str):
            raise PolicyError("missing or non-text 'kind'", file=file, check=label, key="kind")
        spec = REGISTRY.get(kind)
        if spec is None:
            known = ", ".join(sorted(REGISTRY))
            raise PolicyError(
                f"unknown check kind {kind!r} (known: {known})", file=file, check=label, key="kind"
            )
        try:
            config = spec.config.model_validate(table)
        except ValidationError as exc:
            key, msg = _first_error(exc)
            raise PolicyError(msg, file=file, check=label, key=key) from None
        if config.name in seen:
            raise PolicyError("check name used twice", file=file, check=label, key="name")
        if (
            config.adaptive is not None
            and config.adaptive.method == "budget"
            and body.budget is None
        ):
            raise PolicyError(
                "method 'budget' needs a [budget] section in the policy",
                file=file,
                check=label,
                key="adaptive.method",
            )
        seen.add(config.name)
        checks.append(config)
    return Policy(
        name=name,
        path=path,
        text=text,
        digest=digest_text(text),
        models=tuple(body.models),
        description=body.description,
        first_snapshot=body.first_snapshot,
        on_inconclusive=body.on_inconclusive,
        on_underpowered=body.on_underpowered,
        budget=body.budget,
        promote_moves_baseline=body.promote_moves_baseline,
        seed=body.seed,
        sample=body.sample,
        lineage=body.lineage,
        checks=tuple(checks),
        reference=body.reference,
        history=body.history,
    )


def load_policies(folder: Path) -> list[Policy]:
    """Load every ``*.toml`` file in *folder*, sorted by file name. Raises on the first bad one."""
    if not folder.is_dir():
        raise PolicyError("policy folder does not exist", file=str(folder))
    policies = []
    for path in sorted(folder.glob("*.toml")):
        text = path.read_text(encoding="utf-8")
        policies.append(parse_policy(text, name=path.stem, path=str(path)))
    return policies


STARTER_NAME = "starter"


def starter_policy() -> Policy:
    """The starter policy packaged with tidegate (``service/gate/starter.toml``).

    Used when no policy folder is configured: it matches every model, turns on every check
    whose inputs a post may carry (a check whose inputs are absent is ``skipped`` with that
    reason), learns its limits from the model's healthy history and spends a false-hold budget
    of 1 per 1,000 pushes.
    """
    text = resources.files("service.gate").joinpath("starter.toml").read_text(encoding="utf-8")
    return parse_policy(text, name=STARTER_NAME, path="(packaged) service/gate/starter.toml")


def policies_for(folder: Path | None) -> list[Policy]:
    """The policies of *folder*, or the :func:`starter_policy` alone when no folder is set."""
    return [starter_policy()] if folder is None else load_policies(folder)


def select_policy(policies: Iterable[Policy], model: str) -> Policy | None:
    """The policy for *model* by the matching rule in the module docstring, or None."""
    best: tuple[tuple[int, int], int, Policy] | None = None
    for order, policy in enumerate(policies):
        strength = policy.match_strength(model)
        if strength is None:
            continue
        if best is None or strength > best[0]:
            best = (strength, order, policy)
    return best[2] if best else None


def describe_keys() -> Mapping[str, Mapping[str, str]]:
    """Every documented policy key: section -> key -> description (used by the docs test)."""
    sections: dict[str, dict[str, str]] = {
        "top": {
            name: field.description or ""
            for name, field in PolicyBody.model_fields.items()
            if name not in {"sample", "lineage", "reference", "history", "checks", "budget"}
        },
        "budget": {n: f.description or "" for n, f in BudgetRules.model_fields.items()},
        "sample": {n: f.description or "" for n, f in SampleRules.model_fields.items()},
        "lineage": {n: f.description or "" for n, f in LineageRules.model_fields.items()},
        "reference": {n: f.description or "" for n, f in ReferenceRules.model_fields.items()},
        "history": {n: f.description or "" for n, f in HistoryRules.model_fields.items()},
        "adaptive": {n: f.description or "" for n, f in AdaptiveRules.model_fields.items()},
    }
    for kind, spec in sorted(REGISTRY.items()):
        sections[f"check:{kind}"] = {
            n: f.description or "" for n, f in spec.config.model_fields.items()
        }
    return sections
