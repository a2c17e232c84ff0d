"""Fault bench: how often each policy holds a healthy push, and which faults it lets through.

Run: ``python bench/faults.py`` (full run, 1,000 healthy pushes per policy after warm-up),
``python bench/faults.py --quick`` (the CI-sized seeded run a test asserts), ``--jobs 2`` to run
policies in parallel, ``--policies starter,shelf-ranker`` to pick some.

What it simulates (our own model of an incremental stream; all generated, seeded):

- a fixed panel of readers, each with the same 50 candidate books every push (the trainer scores
  a fixed panel, so lists persist); a row's true relevance is a logit from two "features", the
  book's popularity and a **daily cycle** of the base rate; labels are drawn afresh every push;
- the model sees the relevance with an error fixed per row, so consecutive snapshots share most
  of their errors (their score logits correlate above 0.99; the run prints the figure);
- a healthy step moves the model a little in discrimination (logit scale), calibration (logit
  offset) and noise (a per-row term that evolves slowly, giving ~10 % top-10 turnover per push,
  printed); the movements are mean-reverting (AR(1)), as a model that keeps tracking its data;
- the sample of every post carries ``score``, ``label``, ``baseline_score`` (the serving
  baseline on the same rows), ``served_score`` (what serving logged for the baseline),
  ``group``/``item``/``rank`` (top lists of the panel), and segments ``reader_tenure``
  (new 30 %) and ``device`` (app 55 %, web 40 %, tablet 5 %); metrics ``auc``, ``logloss``,
  ``recall_at_10``; ``rows_trained``; a watermark 15 minutes further each push.

Each policy judges its own stream through the real store and gate, in process
(:func:`service.intake.submit` on a SQLite file): history, promotions and the newest watermark
accumulate as in production. After the warm-up, fault posts are interleaved with the healthy
pushes (a broken job's snapshot, posted between two healthy pushes); a fault that is promoted is
rolled back, as on-call would, so it never becomes the baseline of the healthy pushes that
follow. At the end, for each creep kind: the smallest single-push change the policy holds is
found on a grid, then the same change is applied in steps of 1/8 of it per push; the bound of the
goal is 1.5 times that change, i.e. step 12.

False holds per 1,000 are given with a 95 % Clopper–Pearson interval (Clopper & Pearson 1934,
Biometrika 26:404). Evaluation time is the gate's own (``duration_ms`` stored with the verdict);
wall time and the load average are printed beside it. Nothing here is a timed assertion.
"""

from __future__ import annotations

import argparse
import dataclasses
import math
import multiprocessing
import os
import statistics
import sys
import tempfile
import time
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
from scipy.stats import beta as beta_dist
from sqlalchemy import create_engine
from sqlalchemy.orm import sessionmaker

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from service.gate.policy import Policy, load_policies  # noqa: E402
from service.gate.types import Sample  # noqa: E402
from service.intake import SnapshotPost, submit  # noqa: E402
from service.store import repo  # noqa: E402
from service.store.tables import Base  # noqa: E402

MODEL = "bench"
START = datetime(2026, 11, 1, tzinfo=UTC)
STEP = timedelta(minutes=15)
ITEMS_PER_READER = 50
CATALOG = 3000

# Healthy movement of the model per push: AR(1) x_t = phi x_{t-1} + N(0, sd).
PHI = 0.8
SCALE_SD = 0.006  # discrimination: logit scale 1 + x
OFFSET_SD = 0.01  # calibration: logit offset
NOISE_RHO = 0.6  # the per-row noise term: nu_t = rho nu_{t-1} + sqrt(1 - rho^2) N(0, NOISE_SD)
NOISE_SD = 0.18
DAILY_AMPLITUDE = 0.15  # logit amplitude of the daily cycle of the base rate
ERROR_SD = 0.6  # the model's error on a row, fixed across snapshots

#: Fault kinds and their two sizes: (blatant, near the noise floor), with the unit named.
FAULT_SIZES: dict[str, tuple[tuple[float, float], str]] = {
    "calibration": ((0.4, 0.1), "logit offset added to every score"),
    "dead-feature": ((0.03, 0.005), "AUC lost (a feature's contribution removed)"),
    "segment-regression": (
        (0.5, 0.05),
        "AUC lost in the 5 % device=tablet segment (0.5: at random)",
    ),
    "collapse": ((1e-4, 0.15), "score std: absolute 1e-4 / share of normal std"),
    "nan-burst": ((0.01, 0.0005), "share of NaN scores"),
    "label-leak": ((0.10, 0.02), "AUC gained by leaking the label into the score"),
    "stale": ((2.0, 0.05), "hours behind: the baseline (blatant) / a held snapshot (after hold)"),
    "popularity": ((1.0, 0.25), "logit weight added on the book's popularity"),
    "skew": ((0.5, 0.1), "logit offset on 5 % of rows offline, not in serving"),
}
CREEP_KINDS = ("calibration", "spread")
CREEP_STEPS = 8  # the creep moves 1/8 of the smallest held single-push change per push
CREEP_BOUND = 1.5  # held before the accumulated change reaches 1.5 times that change
#: Above this many false holds per 1,000 a creep's hold tells nothing (the gate holds anyway).
CREEP_MEANINGFUL_PER_1000 = 50.0


@dataclass(frozen=True)
class Size:
    """Run sizes. ``readers`` x 50 rows per post."""

    readers: int
    warmup: int
    healthy: int
    trials: int
    between_creeps: int
    creeps: tuple[str, ...] = CREEP_KINDS
    #: Policies whose creep is measured; empty: all.
    creep_policies: tuple[str, ...] = ()

    @property
    def rows(self) -> int:
        return self.readers * ITEMS_PER_READER


FULL = Size(readers=100, warmup=100, healthy=1000, trials=8, between_creeps=30)
#: The CI-sized run: the creep only for the starter policy (``creep_policies``).
QUICK = Size(
    readers=100,
    warmup=22,
    healthy=30,
    trials=1,
    between_creeps=0,
    creeps=("calibration",),
    creep_policies=("starter",),
)


def sigmoid(x: np.ndarray) -> np.ndarray:
    return 1.0 / (1.0 + np.exp(-x))


def auc_of(score: np.ndarray, label: np.ndarray) -> float:
    """Mann–Whitney AUC (Hanley & McNeil 1982), ties ignored (continuous scores)."""
    order = np.argsort(score, kind="mergesort")
    ranks = np.empty(score.size)
    ranks[order] = np.arange(1, score.size + 1)
    pos = label > 0
    n1, n0 = int(pos.sum()), int((~pos).sum())
    if n1 == 0 or n0 == 0:
        return float("nan")
    return float((ranks[pos].sum() - n1 * (n1 + 1) / 2) / (n1 * n0))


# --- the world: a fixed panel, true relevance, the model's error ------------------------------


@dataclass
class State:
    """The trainer's model at one push (what a snapshot is)."""

    scale: float = 0.0  # logit scale 1 + scale
    offset: float = 0.0  # logit offset
    noise: np.ndarray = field(default_factory=lambda: np.zeros(0))


class World:
    """The fixed panel and the truth; makes the sample of each post."""

    def __init__(self, readers: int, seed: int) -> None:
        rng = np.random.default_rng(seed)
        n = readers * ITEMS_PER_READER
        self.n = n
        self.rng = np.random.default_rng([seed, 1])
        popularity = 1.0 / np.arange(1, CATALOG + 1) ** 0.9  # Zipf-like catalog
        items = np.concatenate(
            [
                rng.choice(
                    CATALOG, ITEMS_PER_READER, replace=False, p=popularity / popularity.sum()
                )
                for _ in range(readers)
            ]
        )
        pop = np.log(popularity[items])
        self.popz = (pop - pop.mean()) / pop.std()
        self.u1 = rng.normal(size=n)
        self.u2 = rng.normal(size=n)
        self.w2 = 0.9
        self.error = rng.normal(0.0, ERROR_SD, n)
        reader_ids = np.repeat(np.arange(readers), ITEMS_PER_READER)
        tenure = np.where(rng.random(readers) < 0.3, "new", "returning")[reader_ids]
        device = rng.choice(["app", "web", "tablet"], readers, p=[0.55, 0.40, 0.05])[reader_ids]
        self.group = np.array([f"r{r}" for r in reader_ids], dtype=object)
        self.item = np.array([f"b{i}" for i in items], dtype=object)
        self.tenure = tenure.astype(object)
        self.device = device.astype(object)
        self.tablet = device == "tablet"
        self.reader_ids = reader_ids
        self.readers = readers
        self.base = -2.2
        # The model's logit is a shrunk version of what it sees (see _calibrate).
        self.shrink, self.centre = self._calibrate()

    def daily(self, at: datetime) -> float:
        hours = at.hour + at.minute / 60.0
        return DAILY_AMPLITUDE * math.sin(2 * math.pi * hours / 24.0)

    def truth(self, at: datetime) -> np.ndarray:
        return self.base + self.u1 + self.w2 * self.u2 + 0.3 * self.popz + self.daily(at)

    def _calibrate(self) -> tuple[float, float]:
        """Shrink factor var(z) / var(z + e) (the regression of z on what the model sees) and
        a centre so that the mean score matches the mean true probability."""
        z = self.truth(START.replace(hour=0))
        seen = z + self.error
        shrink = float(np.var(z) / np.var(seen))
        lo, hi = -5.0, 5.0
        target = float(np.mean(sigmoid(z)))
        for _ in range(60):
            mid = (lo + hi) / 2
            if np.mean(sigmoid(mid + shrink * (seen - seen.mean()))) < target:
                lo = mid
            else:
                hi = mid
        return shrink, (lo + hi) / 2

    def logit(self, state: State, at: datetime, *, dead: float = 0.0) -> np.ndarray:
        """The model's score logit for every row; *dead* removes that share of feature 2."""
        seen = self.truth(at) + self.error - dead * self.w2 * self.u2
        centred = seen - (self.base + self.daily(at))
        return (
            self.centre
            + self.daily(at) * self.shrink
            + (1.0 + state.scale) * self.shrink * centred
            + state.offset
            + state.noise
        )

    def labels(self, at: datetime) -> np.ndarray:
        return (self.rng.random(self.n) < sigmoid(self.truth(at))).astype(float)

    def step(self, state: State) -> State:
        rng = self.rng
        noise = state.noise if state.noise.size else rng.normal(0.0, NOISE_SD, self.n)
        return State(
            scale=PHI * state.scale + rng.normal(0.0, SCALE_SD),
            offset=PHI * state.offset + rng.normal(0.0, OFFSET_SD),
            noise=NOISE_RHO * noise
            + math.sqrt(1 - NOISE_RHO**2) * rng.normal(0.0, NOISE_SD, self.n),
        )

    def ranks(self, score: np.ndarray) -> np.ndarray:
        """Rank (1 = top) of each row's score within its reader (NaN scores last)."""
        s = np.where(np.isfinite(score), score, -np.inf).reshape(self.readers, ITEMS_PER_READER)
        order = np.argsort(-s, axis=1, kind="stable")
        ranks = np.empty_like(order)
        np.put_along_axis(ranks, order, np.arange(1, ITEMS_PER_READER + 1)[None, :], axis=1)
        return ranks.reshape(-1).astype(float)


# --- faults ------------------------------------------------------------------------------------


def _bisect(fn: Callable[[float], float], target: float, lo: float, hi: float) -> float:
    """The x in [lo, hi] where the increasing fn(x) reaches target (60 halvings)."""
    for _ in range(60):
        mid = (lo + hi) / 2
        if fn(mid) < target:
            lo = mid
        else:
            hi = mid
    return (lo + hi) / 2


class Faults:
    """Turns a fault size into the knob that produces it, measured once on the panel."""

    def __init__(self, world: World, seed: int) -> None:
        self.world = world
        at = START.replace(hour=0)
        rng = np.random.default_rng([seed, 2])
        z = world.truth(at)
        # Expected AUC against labels: many label draws over the same rows.
        labels = np.concatenate([(rng.random(world.n) < sigmoid(z)) for _ in range(20)])
        state = State(noise=np.zeros(world.n))

        def auc_for(logit: np.ndarray, mask: np.ndarray | None = None) -> float:
            tiled = np.tile(logit, 20)
            if mask is None:
                return auc_of(tiled, labels)
            m = np.tile(mask, 20)
            return auc_of(tiled[m], labels[m])

        healthy = world.logit(state, at)
        base_auc = auc_for(healthy)
        self.base_auc = base_auc
        self.dead: dict[float, float] = {}
        for loss in FAULT_SIZES["dead-feature"][0]:
            self.dead[loss] = _bisect(
                lambda f: base_auc - auc_for(world.logit(state, at, dead=f)), loss, 0.0, 1.0
            )
        seg_auc = auc_for(healthy, world.tablet)
        noise = rng.normal(size=world.n)
        self.segment: dict[float, float] = {}
        for loss in FAULT_SIZES["segment-regression"][0]:
            if loss >= seg_auc - 0.5:  # blatant: the segment is scored at random
                self.segment[loss] = math.inf
            else:
                self.segment[loss] = _bisect(
                    lambda s: seg_auc - auc_for(healthy + s * noise, world.tablet), loss, 0.0, 50.0
                )
        self.leak: dict[float, float] = {}
        leak_labels = labels[: world.n]
        healthy_auc = auc_of(healthy, leak_labels)

        def leak_gain(g: float) -> float:
            return auc_of(healthy + g * leak_labels, leak_labels) - healthy_auc

        for gain in FAULT_SIZES["label-leak"][0]:
            self.leak[gain] = _bisect(leak_gain, gain, 0.0, 10.0)
        self.segment_auc = seg_auc


@dataclass
class Post:
    """One snapshot to post, before it is judged."""

    key: str
    watermark: datetime
    score: np.ndarray
    label: np.ndarray
    baseline_score: np.ndarray
    served_score: np.ndarray
    rows_trained: int
    kind: str = "healthy"
    size: str = ""


def make_post(
    world: World,
    faults: Faults,
    *,
    key: str,
    state: State,
    at: datetime,
    baseline: tuple[State, datetime] | None,
    fault: tuple[str, str] | None = None,
) -> Post:
    """The post of *state* trained until *at*, with an optional (kind, size) fault."""
    rng = world.rng
    label = world.labels(at)
    dead = 0.0
    kind, which = fault if fault else ("healthy", "")
    value = 0.0
    if fault is not None:
        value = FAULT_SIZES[kind][0][0 if which == "blatant" else 1]
    if kind == "dead-feature":
        dead = faults.dead[value]
    logit = world.logit(state, at, dead=dead)
    if baseline is not None:
        # The same rows, at the same time of day, scored by the baseline's model.
        base_logit = world.logit(baseline[0], at)
    else:
        base_logit = logit.copy()
    served_logit = base_logit.copy()
    if kind == "calibration":
        logit = logit + value
    elif kind == "segment-regression":
        extra = faults.segment[value]
        noisy = rng.normal(size=world.n)
        if math.isinf(extra):
            logit = np.where(world.tablet, rng.permutation(logit), logit)
        else:
            logit = np.where(world.tablet, logit + extra * noisy, logit)
    elif kind == "label-leak":
        logit = logit + faults.leak[value] * label
    elif kind == "popularity":
        logit = logit + value * world.popz
    elif kind == "skew":
        rows = rng.random(world.n) < 0.05
        logit = np.where(rows, logit + value, logit)
        base_logit = np.where(rows, base_logit + value, base_logit)
    score = sigmoid(logit)
    if kind == "collapse":
        mean, std = float(score.mean()), float(score.std())
        target = value if which == "blatant" else value * std
        score = mean + (score - mean) * (target / std)
    elif kind == "nan-burst":
        score = score.copy()
        score[rng.random(world.n) < value] = np.nan
    baseline_score = sigmoid(base_logit)
    served = sigmoid(served_logit).astype(np.float32).astype(np.float64)
    return Post(
        key=key,
        watermark=at,
        score=score,
        label=label,
        baseline_score=baseline_score,
        served_score=served,
        rows_trained=int(rng.normal(1_800_000, 40_000)),
        kind=kind,
        size=which,
    )


# --- one policy's stream through the real store -------------------------------------------------


@dataclass
class Judged:
    key: str
    kind: str
    size: str
    decision: str
    breached: tuple[str, ...]
    duration_ms: float
    counted: bool = False


@dataclass
class CreepResult:
    kind: str
    single_push: float | None  # smallest single-push change held (None: none on the grid)
    held_step: int | None
    bound_step: int
    steps_run: int
    problem: str = ""
    single_by: tuple[str, ...] = ()
    held_by: tuple[str, ...] = ()


@dataclass
class PolicyResult:
    policy: str
    rows: int
    judged: list[Judged] = field(default_factory=list)
    creeps: list[CreepResult] = field(default_factory=list)
    wall_seconds: float = 0.0
    turnover: float = 0.0
    correlation: float = 0.0
    error: str | None = None


class Stream:
    """One policy, one SQLite store, one model."""

    def __init__(self, policy: Policy, size: Size, seed: int, folder: Path) -> None:
        self.policy = dataclasses.replace(policy, models=(MODEL,))
        self.world = World(size.readers, seed)
        self.faults = Faults(self.world, seed)
        engine = create_engine(f"sqlite:///{folder / (policy.name.replace('/', '-') + '.db')}")
        Base.metadata.create_all(engine)
        self.factory = sessionmaker(engine, expire_on_commit=False)
        self.states: dict[str, tuple[State, datetime]] = {}
        self.count = 0
        self.result = PolicyResult(policy.name, self.world.n)

    # -- store access
    def baseline_key(self) -> str | None:
        with self.factory() as session:
            model = repo.get_model(session, name=MODEL)
            row = repo.snapshot_by_id(session, snapshot_id=model.baseline_id) if model else None
            return row.key if row is not None else None

    def set_baseline(self, key: str, cause: str) -> None:
        with self.factory() as session:
            model = repo.get_model(session, name=MODEL)
            assert model is not None
            row = repo.get_snapshot(session, model_id=model.id, key=key)
            assert row is not None
            repo.set_baseline(
                session,
                model=model,
                snapshot=row,
                cause=cause,
                actor="bench",
                reason=f"bench: {cause}",
                verdict_id=None,
                now=self.now,
            )
            session.commit()

    def post(self, post: Post, *, counted: bool = False) -> Judged:
        self.count += 1
        self.now = post.watermark + timedelta(minutes=2)
        w = self.world
        columns = {
            "score": post.score,
            "label": post.label,
            "baseline_score": post.baseline_score,
            "served_score": post.served_score,
            "group": w.group,
            "item": w.item,
            "rank": w.ranks(post.score),
            "segment.reader_tenure": w.tenure,
            "segment.device": w.device,
        }
        finite = np.isfinite(post.score)
        ll = -np.mean(
            post.label[finite] * np.log(np.clip(post.score[finite], 1e-12, 1))
            + (1 - post.label[finite]) * np.log(np.clip(1 - post.score[finite], 1e-12, 1))
        )
        metrics = {
            "auc": auc_of(np.where(finite, post.score, 0.0), post.label),
            "logloss": float(ll),
            "recall_at_10": recall_at_10(w, post.score, post.label),
        }
        snapshot = SnapshotPost(
            key=post.key,
            content_digest=f"bench:{post.key}",
            parent=self.baseline_key(),
            trained_until=post.watermark,
            code_version="bench",
            rows_trained=post.rows_trained,
            metrics={k: v for k, v in metrics.items() if math.isfinite(v)},
            sample=Sample(columns),
        )
        with self.factory() as session:
            done = submit(
                session, model_name=MODEL, post=snapshot, policies=[self.policy], now=self.now
            )
            verdict = done.verdict
            session.commit()
            breached = tuple(
                sorted(
                    {
                        f["check"]
                        for f in verdict.findings
                        if f.get("blocking")
                        and (
                            f["outcome"] == "breach"
                            or (
                                f["outcome"] == "inconclusive"
                                and self.policy.on_inconclusive == "hold"
                            )
                        )
                    }
                )
            ) or ((verdict.error or "first snapshot"),)
            judged = Judged(
                post.key,
                post.kind,
                post.size,
                verdict.decision,
                breached if verdict.decision == "hold" else (),
                float(verdict.duration_ms),
                counted,
            )
        self.result.judged.append(judged)
        return judged

    def side_post(self, post: Post) -> Judged:
        """A post that must not become the baseline: if promoted, roll it back."""
        before = self.baseline_key()
        judged = self.post(post)
        if judged.decision == "promote" and before is not None and self.baseline_key() == post.key:
            self.set_baseline(before, "rollback")
        return judged

    # -- the run
    def healthy(self, state: State, at: datetime, *, counted: bool) -> Judged:
        key = f"h{self.count:05d}"
        base = self.baseline_key()
        baseline = self.states.get(base) if base else None
        post = make_post(self.world, self.faults, key=key, state=state, at=at, baseline=baseline)
        judged = self.post(post, counted=counted)
        self.states[key] = (state, at)
        if len(self.states) > 400:
            self.states.pop(next(iter(self.states)))
        return judged

    def fault(self, state: State, at: datetime, kind: str, which: str) -> Judged:
        base = self.baseline_key()
        baseline = self.states.get(base) if base else None
        key = f"f{self.count:05d}-{kind}-{which}"
        if kind == "stale":
            return self._stale(state, at, which, baseline)
        post = make_post(
            self.world,
            self.faults,
            key=key,
            state=state,
            at=at + timedelta(minutes=5),
            baseline=baseline,
            fault=(kind, which),
        )
        return self.side_post(post)

    def _stale(
        self, state: State, at: datetime, which: str, baseline: tuple[State, datetime] | None
    ) -> Judged:
        assert baseline is not None
        if which == "blatant":
            # A replay of an old job: a healthy model, trained until 2 h before the baseline.
            mark = baseline[1] - timedelta(hours=FAULT_SIZES["stale"][0][0])
        else:
            # First a snapshot that is held (a calibration fault), then a replay trained until
            # 3 min before it: after the baseline, but behind what the model already posted.
            held = self.fault(state, at, "calibration", "blatant")
            held.kind, held.size = "stale-setup", ""
            mark = at + timedelta(minutes=5) - timedelta(hours=FAULT_SIZES["stale"][0][1])
        post = make_post(
            self.world,
            self.faults,
            key=f"f{self.count:05d}-stale-{which}",
            state=state,
            at=mark,
            baseline=baseline,
        )
        post.kind, post.size = "stale", which
        return self.side_post(post)

    def run(self, size: Size, seed: int, *, creep: bool = True) -> PolicyResult:
        started = time.perf_counter()
        rng = np.random.default_rng([seed, 3])
        state = self.world.step(State())
        at = START
        variants = [(k, w) for k in FAULT_SIZES for w in ("blatant", "near-floor")]
        schedule = [v for v in variants for _ in range(size.trials)]
        rng.shuffle(schedule)  # type: ignore[arg-type]
        gap = max(1, size.healthy // max(1, len(schedule)))
        self._correlation(state, at)
        for i in range(size.warmup + size.healthy):
            if i == 0:
                self.healthy(state, at, counted=False)
                if self.baseline_key() is None:  # first_snapshot = "hold": a person sets it
                    self.set_baseline(f"h{self.count - 1:05d}", "manual")
            else:
                self.healthy(state, at, counted=i >= size.warmup)
            nxt_state, nxt_at = self.world.step(state), at + STEP
            k = i - size.warmup
            if k >= 0 and schedule and k % gap == gap - 1:
                kind, which = schedule.pop()
                self.fault(nxt_state, at, kind, which)
            state, at = nxt_state, nxt_at
        if creep:
            for n, kind in enumerate(size.creeps):
                state, at = self._creep(kind, state, at, size, settle=n > 0)
        self.result.wall_seconds = time.perf_counter() - started
        return self.result

    def _correlation(self, state: State, at: datetime) -> None:
        """Print-outs of the simulator: logit correlation and top-10 turnover of one step."""
        w = self.world
        nxt = w.step(state)
        a, b = w.logit(state, at), w.logit(nxt, at + STEP)
        self.result.correlation = float(np.corrcoef(a, b)[0, 1])
        ra, rb = w.ranks(a) <= 10, w.ranks(b) <= 10
        self.result.turnover = float(1 - (ra & rb).sum() / ra.sum())

    def _creep(
        self, kind: str, state: State, at: datetime, size: Size, *, settle: bool
    ) -> tuple[State, datetime]:
        def changed(s: State, amount: float) -> State:
            if kind == "calibration":
                return dataclasses.replace(s, offset=s.offset + amount)
            return dataclasses.replace(s, scale=s.scale + amount)

        def one(s: State, t: datetime, amount: float, label: str) -> Judged:
            base = self.baseline_key()
            post = make_post(
                self.world,
                self.faults,
                key=f"c{self.count:05d}-{kind}-{label}",
                state=changed(s, amount),
                at=t,
                baseline=self.states.get(base) if base else None,
            )
            post.kind, post.size = f"creep-{kind}", label
            return self.post(post)

        # After an earlier creep (rolled back), healthy pushes first, so that the reference
        # moves past the creep's snapshots.
        for _ in range(size.between_creeps if settle else 0):
            self.healthy(state, at, counted=False)
            state, at = self.world.step(state), at + STEP
        # The smallest single-push change held, on a grid of x1.25 steps (side posts).
        single: float | None = None
        single_by: tuple[str, ...] = ()
        amount = 0.001
        # Control: the same side post without the change must pass, else nothing is measured.
        # Side posts of the grid: the next snapshot (one healthy step from the baseline) with
        # the change, 10 s of watermark apart (lineage holds a watermark that does not
        # advance), after the last posted watermarks (a fault post sits at at - STEP + 5 min)
        # and before the next healthy push (at).
        side = 0

        def side_at() -> datetime:
            nonlocal side
            side += 1
            return at - STEP + timedelta(minutes=6, seconds=10 * side)

        control = make_post(
            self.world,
            self.faults,
            key=f"g{self.count:05d}-{kind}-control",
            state=state,
            at=side_at(),
            baseline=self.states.get(self.baseline_key() or ""),
        )
        control.kind, control.size = f"grid-{kind}", "control"
        if self.side_post(control).decision == "hold":
            self.result.creeps.append(CreepResult(kind, None, None, 0, 0, "control held"))
            return state, at
        while amount < 3.0:
            base = self.baseline_key()
            post = make_post(
                self.world,
                self.faults,
                key=f"g{self.count:05d}-{kind}-{amount:.4f}",
                state=changed(state, amount),
                at=side_at(),
                baseline=self.states.get(base) if base else None,
            )
            post.kind, post.size = f"grid-{kind}", f"{amount:.4f}"
            grid = self.side_post(post)
            if grid.decision == "hold":
                single = amount
                single_by = grid.breached
                break
            amount *= 1.25
        bound = math.ceil(CREEP_BOUND * CREEP_STEPS)
        result = CreepResult(kind, single, None, bound, 0, single_by=single_by if single else ())
        if single is not None:
            delta = single / CREEP_STEPS
            before = self.baseline_key()
            for step in range(1, 2 * bound + 1):
                state, at = self.world.step(state), at + STEP
                judged = one(state, at, step * delta, str(step))
                self.states[judged.key] = (changed(state, step * delta), at)
                result.steps_run = step
                if judged.decision == "hold":
                    result.held_step = step
                    result.held_by = judged.breached
                    break
            if before is not None and self.baseline_key() != before:
                self.set_baseline(before, "rollback")  # on-call rolls the creep back
            # The creep's last push was posted at `at`: go on from the next one.
            state, at = self.world.step(state), at + STEP
        self.result.creeps.append(result)
        return state, at


def recall_at_10(world: World, score: np.ndarray, label: np.ndarray) -> float:
    top = (world.ranks(score) <= 10).reshape(world.readers, ITEMS_PER_READER)
    lab = label.reshape(world.readers, ITEMS_PER_READER)
    positives = lab.sum(axis=1)
    has = positives > 0
    return float(np.mean((lab * top).sum(axis=1)[has] / positives[has]))


# --- policies and the report --------------------------------------------------------------------


def bench_policies(names: list[str] | None) -> list[Policy]:
    """The starter policy and every worked policy of the README."""
    found: list[Policy] = []
    try:
        from service.gate.policy import starter_policy  # type: ignore[attr-defined]

        found.append(dataclasses.replace(starter_policy(), name="starter"))
    except ImportError:
        print("note: service.gate.policy.starter_policy is not available on this branch")
    found += load_policies(ROOT / "config" / "policies")
    found += [
        dataclasses.replace(p, name=f"examples/{p.name}")
        for p in load_policies(ROOT / "config" / "examples")
    ]
    if names:
        found = [p for p in found if p.name in names]
    return found


def run_policy(args: tuple[Policy, Size, int, bool]) -> PolicyResult:
    policy, size, seed, creep = args
    with tempfile.TemporaryDirectory(prefix="tidegate-faults-") as folder:
        stream = Stream(policy, size, seed, Path(folder))
        try:
            return stream.run(size, seed, creep=creep)
        except Exception as exc:  # report, do not hide
            stream.result.error = f"{type(exc).__name__}: {exc}"
            return stream.result


def clopper_pearson(k: int, n: int, level: float = 0.95) -> tuple[float, float]:
    """Exact binomial interval (Clopper & Pearson 1934, Biometrika 26:404)."""
    a = (1 - level) / 2
    low = 0.0 if k == 0 else float(beta_dist.ppf(a, k, n - k + 1))
    high = 1.0 if k == n else float(beta_dist.ppf(1 - a, k + 1, n - k))
    return low, high


@dataclass(frozen=True)
class Summary:
    policy: str
    healthy: int
    false_holds: int
    per_1000: float
    interval: tuple[float, float]
    detection: dict[tuple[str, str], tuple[int, int]]
    creeps: list[CreepResult]
    median_ms: float
    false_hold_checks: Counter[str]
    missed: dict[tuple[str, str], Counter[str]]
    caught_by: dict[tuple[str, str], Counter[str]]


def summarise(result: PolicyResult) -> Summary:
    healthy = [j for j in result.judged if j.counted and j.kind == "healthy"]
    held = [j for j in healthy if j.decision == "hold"]
    n, k = len(healthy), len(held)
    low, high = clopper_pearson(k, n) if n else (0.0, 1.0)
    detection: dict[tuple[str, str], tuple[int, int]] = {}
    caught_by: dict[tuple[str, str], Counter[str]] = {}
    for j in result.judged:
        if j.kind in FAULT_SIZES:
            key = (j.kind, j.size)
            got, total = detection.get(key, (0, 0))
            detection[key] = (got + (j.decision == "hold"), total + 1)
            caught_by.setdefault(key, Counter()).update(j.breached)
    reasons: Counter[str] = Counter()
    for j in held:
        reasons.update(j.breached)
    times = [j.duration_ms for j in result.judged if j.kind == "healthy"]
    return Summary(
        result.policy,
        n,
        k,
        1000.0 * k / n if n else float("nan"),
        (1000 * low, 1000 * high),
        detection,
        result.creeps,
        statistics.median(times) if times else float("nan"),
        reasons,
        {},
        caught_by,
    )


def longest_run(result: PolicyResult) -> int:
    """The most counted healthy pushes held in a row (a hold makes the next candidate two
    pushes away from the baseline, so holds can cascade)."""
    best = run = 0
    for j in result.judged:
        if j.kind != "healthy" or not j.counted:
            continue
        run = run + 1 if j.decision == "hold" else 0
        best = max(best, run)
    return best


def goals(s: Summary) -> dict[str, bool]:
    blatant = [v for (_, w), v in s.detection.items() if w == "blatant"]
    near = [v for (_, w), v in s.detection.items() if w == "near-floor"]

    def rate(values: list[tuple[int, int]]) -> float:
        total = sum(t for _, t in values)
        return sum(g for g, _ in values) / total if total else float("nan")

    return {
        "false holds <= 1 per 1,000": s.per_1000 <= 1.0,
        "blatant held >= 99 %": rate(blatant) >= 0.99,
        "near-floor held >= 90 %": rate(near) >= 0.90,
        # A creep "held" by a gate that holds healthy pushes anyway proves nothing.
        "creep held within the bound": all(
            c.held_step is not None and c.held_step <= c.bound_step for c in s.creeps
        )
        and bool(s.creeps)
        and s.per_1000 <= CREEP_MEANINGFUL_PER_1000,
    }


def report(results: list[PolicyResult], size: Size, seed: int, wall: float) -> str:
    lines: list[str] = []
    out = lines.append
    load = os.getloadavg() if hasattr(os, "getloadavg") else (float("nan"),) * 3
    out(
        f"fault bench: seed {seed}, {size.rows} rows a post ({size.readers} readers x "
        f"{ITEMS_PER_READER} books), warm-up {size.warmup} pushes, then {size.healthy} healthy "
        f"pushes counted and {size.trials} trial(s) per fault kind and size"
    )
    if results:
        r0 = results[0]
        out(
            f"simulator: consecutive snapshots' score logits correlate {r0.correlation:.4f}; "
            f"top-10 turnover per push {r0.turnover:.1%}"
        )
    out(f"wall time {wall:.0f} s; load average {load[0]:.2f} {load[1]:.2f} {load[2]:.2f}")
    out("")
    out("fault sizes (blatant / near the noise floor):")
    for kind, ((big, small), unit) in FAULT_SIZES.items():
        out(f"  {kind:20s} {big:g} / {small:g}  ({unit})")
    out("")
    for result in results:
        if result.error:
            out(f"## {result.policy}: FAILED: {result.error}")
            continue
        s = summarise(result)
        out(f"## policy {s.policy}")
        out(
            f"false holds: {s.false_holds} of {s.healthy} healthy pushes after warm-up = "
            f"{s.per_1000:.1f} per 1,000 (95 % Clopper-Pearson {s.interval[0]:.1f} to "
            f"{s.interval[1]:.1f})"
        )
        out(f"  longest run of healthy pushes held in a row: {longest_run(result)}")
        if s.false_hold_checks:
            top = ", ".join(f"{c} x{n}" for c, n in s.false_hold_checks.most_common(6))
            out(f"  held by: {top}")
        out("| fault | blatant held | near-floor held | held by (near-floor) |")
        out("|---|---|---|---|")
        for kind in FAULT_SIZES:
            cells = []
            for which in ("blatant", "near-floor"):
                got, total = s.detection.get((kind, which), (0, 0))
                cells.append(f"{got}/{total}")
            by = s.caught_by.get((kind, "near-floor"), Counter())
            cells.append(", ".join(c for c, _ in by.most_common(3)) or "-")
            out(f"| {kind} | " + " | ".join(cells) + " |")
        for c in s.creeps:
            if c.problem:
                out(
                    f"creep {c.kind}: not measured: the control (no change) was held, the "
                    "stream is stuck"
                )
            elif c.single_push is None:
                out(f"creep {c.kind}: no single-push change on the grid (up to 3) was held")
            else:
                held = f"held at step {c.held_step}" if c.held_step else "never held"
                out(
                    f"creep {c.kind}: smallest single-push change held {c.single_push:.4g} "
                    f"(by {', '.join(c.single_by)}); creep of {c.single_push / CREEP_STEPS:.4g} "
                    f"a push {held}"
                    + (f" by {', '.join(c.held_by)}" if c.held_by else "")
                    + f" (bound: step {c.bound_step}, {c.steps_run} steps run)"
                )
        out(f"median evaluation time {s.median_ms:.0f} ms; {result.wall_seconds:.0f} s wall")
        met = goals(s)
        out("goals: " + "; ".join(f"{g}: {'met' if ok else 'NOT met'}" for g, ok in met.items()))
        out("")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--quick", action="store_true", help="CI-sized seeded run")
    parser.add_argument("--seed", type=int, default=20261202)
    parser.add_argument("--jobs", type=int, default=1, help="policies run in parallel")
    parser.add_argument("--policies", default="", help="comma-separated policy names")
    parser.add_argument("--healthy", type=int, default=0, help="override healthy pushes")
    parser.add_argument("--warmup", type=int, default=0, help="override warm-up pushes")
    parser.add_argument("--trials", type=int, default=0, help="override trials per fault")
    parser.add_argument("--creeps", default="", help="comma-separated creep kinds to measure")
    args = parser.parse_args(argv)
    size = QUICK if args.quick else FULL
    if args.healthy:
        size = dataclasses.replace(size, healthy=args.healthy)
    if args.warmup:
        size = dataclasses.replace(size, warmup=args.warmup)
    if args.trials:
        size = dataclasses.replace(size, trials=args.trials)
    if args.creeps:
        size = dataclasses.replace(size, creeps=tuple(args.creeps.split(",")))
    policies = bench_policies([p for p in args.policies.split(",") if p] or None)
    started = time.perf_counter()
    results: list[PolicyResult] = []
    work = [(p, size, args.seed, creeps_for(size, p)) for p in policies]
    # Each policy's section as soon as it is done (a long run shows its progress).
    if args.jobs > 1:
        with multiprocessing.get_context("spawn").Pool(args.jobs) as pool:
            for result in pool.imap_unordered(run_policy, work):
                results.append(result)
                print(report([result], size, args.seed, time.perf_counter() - started), flush=True)
    else:
        for w in work:
            results.append(run_policy(w))
            print(report(results[-1:], size, args.seed, time.perf_counter() - started), flush=True)
    print("=== all policies ===")
    print(report(results, size, args.seed, time.perf_counter() - started), flush=True)
    return 0


def creeps_for(size: Size, policy: Policy) -> bool:
    return not size.creep_policies or policy.name in size.creep_policies


def run_all(policies: list[Policy], size: Size, seed: int, *, jobs: int = 1) -> list[PolicyResult]:
    """Each policy's stream, in order (in *jobs* processes when more than one)."""
    work = [(p, size, seed, creeps_for(size, p)) for p in policies]
    if jobs > 1:
        with multiprocessing.get_context("spawn").Pool(jobs) as pool:
            return pool.map(run_policy, work)
    return [run_policy(w) for w in work]


if __name__ == "__main__":
    raise SystemExit(main())
