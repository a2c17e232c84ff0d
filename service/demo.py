"""The demo scenario (invented, seeded): "Bramble & Page", an online bookshop.

``shelf-ranker`` scores books for the home shelf and retrains every 15 minutes; ``also-read``
recommends books after a purchase and retrains hourly. Segments: ``reader_tenure`` (new /
returning) and ``device`` (app / web). Over the demo period a few bad pushes happen:

=============  ===========================================================================
shelf-ranker   a broken feature join collapses the output; a calibration blow-up shifts every
               score up; a push with NaN scores; a replayed job with a stale watermark; from
               a little past half-time a slow creep: every push nudges the scores up a
               little (each step passes the baseline check; the reference check, the
               baseline of 6 h ago, holds once the sum is too large, and the model sticks)
also-read      a push whose reported recall@10 drops sharply; a push whose lists collapse
               onto the bestsellers (coverage, Gini and popularity checks hold it)
=============  ===========================================================================

Each fault is held for its own reason: the collapse by health (no spread), the calibration
blow-up by the ``calibration`` check, the NaN push by health (non-finite), the stale replay by
lineage (its watermark lies before the serving baseline's), the recall drop by the reported
metric, the list collapse by the list checks.

Honest pairing: the shelf ranker's ``baseline_score`` (the same rows scored by the baseline)
and ``served_score`` (what serving logged for them) come from the snapshot that serves when
the post is made, which the simulation learns from each verdict (:meth:`DemoEvent.settle`;
:func:`load` calls it). A caller that posts the events itself must call ``settle`` too.

Everything is generated from fixed seeds; only the timestamps follow the clock (the scenario
ends at the time the demo starts, so ages on the pages look natural).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import Any

import numpy as np
from scipy import stats as sps

SEED = 20261201


@dataclass
class DemoEvent:
    """One post of the scenario. *source* is its body, or a function that makes it when first
    read (posts are made in time order), from what serves at that moment; :meth:`settle`
    tells the model's simulation the verdict, so the next body's ``baseline_score`` and
    ``served_score`` come from the snapshot that actually serves, not from the trainer's
    last state."""

    model: str
    at: datetime
    source: dict[str, Any] | Callable[[], dict[str, Any]]
    note: str = ""
    on_verdict: Callable[[dict[str, Any]], None] | None = None
    _body: dict[str, Any] | None = field(default=None, repr=False)

    @property
    def body(self) -> dict[str, Any]:
        if self._body is None:
            self._body = self.source() if callable(self.source) else self.source
        return self._body

    def settle(self, verdict: dict[str, Any]) -> None:
        """Record the verdict of this post (what serves next follows from it)."""
        if self.on_verdict is not None:
            self.on_verdict(verdict)


def _auc(labels: np.ndarray, scores: np.ndarray) -> float:
    """AUC by the Mann–Whitney U statistic (ties averaged)."""
    pos = scores[labels == 1]
    neg = scores[labels == 0]
    u = sps.mannwhitneyu(pos, neg, alternative="two-sided").statistic
    return float(u / (pos.size * neg.size))


def _logloss(labels: np.ndarray, scores: np.ndarray) -> float:
    p = np.clip(scores, 1e-7, 1 - 1e-7)
    return float(-np.mean(labels * np.log(p) + (1 - labels) * np.log(1 - p)))


def _logit(p: np.ndarray) -> np.ndarray:
    p = np.clip(p, 1e-6, 1 - 1e-6)
    out: np.ndarray = np.log(p / (1 - p))
    return out


def _sigmoid(x: np.ndarray) -> np.ndarray:
    out: np.ndarray = 1.0 / (1.0 + np.exp(-x))
    return out


class World:
    """Readers' true click propensities, and how a snapshot of a model scores them."""

    def __init__(self, rng: np.random.Generator, rows: int) -> None:
        self.rng = rng
        self.rows = rows
        self._holdout = self._draw()

    def holdout(self) -> dict[str, np.ndarray]:
        """The trainer's holdout: the same rows for every snapshot of a day (so quality
        differences are the model's, not the rows')."""
        return self._holdout

    def _draw(self) -> dict[str, np.ndarray]:
        rng = self.rng
        n = self.rows
        tenure = np.where(rng.random(n) < 0.3, "new", "returning")
        device = np.where(rng.random(n) < 0.6, "app", "web")
        base = rng.normal(-1.2, 1.0, n) + np.where(tenure == "returning", 0.4, 0.0)
        true_p = _sigmoid(base)
        label = (rng.random(n) < true_p).astype(int)
        return {"tenure": tenure, "device": device, "truth": base, "label": label}

    def score(self, truth: np.ndarray, *, skill: float, bias: float, noise_seed: int) -> np.ndarray:
        noise = np.random.default_rng(noise_seed).normal(0.0, 1.0, truth.size)
        return _sigmoid(skill * truth + (1 - skill) * noise + bias)


#: Books in the demo catalogue, and the panel of readers whose lists every snapshot scores.
CATALOG = 400
PANEL = 200
LIST_K = 10
#: Logit units the slow creep adds to every shelf-ranker push once it has started.
CREEP_PER_STEP = 0.025


class Shelves:
    """Each panel reader's top-10 books: a score mixing a Zipf-like popularity with the
    reader's own taste (``head_bias`` 0: taste only, 1: popularity only), plus a little
    noise that differs from one retrain to the next."""

    def __init__(self, seed: int) -> None:
        rng = np.random.default_rng(seed)
        popularity = 1.0 / np.arange(1, CATALOG + 1)
        self.popularity = popularity / popularity.sum()
        self.tastes = rng.dirichlet(np.full(CATALOG, 0.3), size=PANEL)

    def lists(self, rng: np.random.Generator, *, head_bias: float) -> dict[str, list[Any]]:
        mixed = head_bias * self.popularity + (1.0 - head_bias) * self.tastes
        score = np.log(mixed) + rng.normal(0.0, 0.1, mixed.shape)
        top = np.argsort(-score, axis=1)[:, :LIST_K]
        return {
            "group": [f"reader-{g:03d}" for g in range(PANEL) for _ in range(LIST_K)],
            "item": [f"book-{i:03d}" for i in top.ravel()],
            "rank": [r + 1 for _ in range(PANEL) for r in range(LIST_K)],
        }


def _body(
    key: str,
    parent: str | None,
    trained_until: datetime,
    rows_trained: int,
    holdout: dict[str, np.ndarray],
    scores: np.ndarray,
    baseline_scores: np.ndarray | None,
    extra_metrics: dict[str, float] | None = None,
    extra_columns: dict[str, list[Any]] | None = None,
) -> dict[str, Any]:
    label = holdout["label"]
    finite = np.isfinite(scores)
    metrics = {
        "auc": round(_auc(label[finite], scores[finite]), 5),
        "logloss": round(_logloss(label[finite], scores[finite]), 5),
    }
    metrics.update(extra_metrics or {})
    sample: dict[str, Any] = {
        "score": [None if not np.isfinite(s) else round(float(s), 6) for s in scores],
        "label": label.tolist(),
        "segment.reader_tenure": holdout["tenure"].tolist(),
        "segment.device": holdout["device"].tolist(),
    }
    if baseline_scores is not None:
        sample["baseline_score"] = [round(float(s), 6) for s in baseline_scores]
    sample.update(extra_columns or {})
    return {
        "key": key,
        "parent": parent,
        "trained_until": trained_until.isoformat().replace("+00:00", "Z"),
        "code_version": "b7e41d2",
        "rows_trained": rows_trained,
        "metrics": metrics,
        "tags": {"trainer": "bramble-trainer"},
        "sample": sample,
    }


@dataclass
class _Params:
    """A snapshot of the shelf ranker as the simulation knows it."""

    key: str
    skill: float
    bias: float
    watermark: datetime


class ShelfRanker:
    """The home-shelf ranker's trainer and serving fleet.

    The trainer goes on from its own last state that had no planted fault; during the creep
    that includes every creeping step, held or not (so a stuck model drifts further from its
    baseline). Serving runs whatever the gate (or an operator) last promoted: the candidate's
    ``baseline_score`` (the same rows scored by the serving snapshot) and ``served_score``
    (what serving logged for them) come from that snapshot. Bodies must be made in step order.
    """

    def __init__(self, end: datetime, *, hours: int, rows: int) -> None:
        self.rng = np.random.default_rng(SEED)
        self.world = World(self.rng, rows)
        self.rows = rows
        self.steps = hours * 4
        self.start = end - timedelta(minutes=15 * self.steps)
        steps = self.steps
        self.bad = {
            steps // 4: "collapse",
            steps // 2: "calibration",
            (steps * 2) // 3: "nan",
            (steps * 5) // 6: "stale",
        }
        self.creep_start = (steps * 11) // 20
        self.trainer_skill, self.trainer_bias = 0.80, 0.0
        self.parent: str | None = None
        self.serving: _Params | None = None
        self.built = 0
        self.pending: tuple[_Params, str] | None = None

    def at(self, step: int) -> datetime:
        return self.start + timedelta(minutes=15 * (step + 1))

    def note(self, step: int) -> str:
        return self.bad.get(step, "") or ("creep" if step >= self.creep_start else "")

    def body(self, step: int) -> dict[str, Any]:
        if step != self.built:
            raise RuntimeError(f"demo bodies are made in order: step {step} before {self.built}")
        self.built += 1
        rng, world, rows = self.rng, self.world, self.rows
        at = self.at(step)
        key = at.strftime("%Y-%m-%dT%H:%MZ")
        watermark = at - timedelta(minutes=1)
        holdout = world.holdout()
        skill = self.trainer_skill + rng.normal(0.0, 0.004)
        bias = self.trainer_bias + rng.normal(0.0, 0.01)
        kind = self.note(step)
        if step >= self.creep_start:
            bias += CREEP_PER_STEP  # the slow creep: a small step up on every push
        scores = world.score(holdout["truth"], skill=skill, bias=bias, noise_seed=SEED)
        if kind == "collapse":
            scores = 0.31 + rng.normal(0.0, 1e-8, rows)
        elif kind == "calibration":
            scores = _sigmoid(_logit(scores) + 1.6)
        elif kind == "nan":
            scores = scores.copy()
            scores[rng.random(rows) < 0.03] = np.nan
        elif kind == "stale":
            # a replayed old job: trained only up to well before what serves now
            watermark = at - timedelta(hours=3)
            if self.serving is not None:
                watermark = min(watermark, self.serving.watermark - timedelta(minutes=30))
        rows_trained = int(rng.normal(1_800_000, 60_000))
        noise = rng.normal(0.0, 2e-4, rows)
        extra: dict[str, list[Any]] = {}
        baseline_scores = None
        if self.serving is not None:
            baseline_scores = world.score(
                holdout["truth"],
                skill=self.serving.skill,
                bias=self.serving.bias,
                noise_seed=SEED,
            )
            # What serving logged for the same rows: agrees with the offline recomputation up
            # to rounding noise (no offline/online skew in the demo).
            served = np.clip(baseline_scores + noise, 0.0, 1.0)
            extra["served_score"] = [round(float(v), 6) for v in served]
        self.pending = (_Params(key, skill, bias, watermark), kind)
        return _body(
            key,
            self.parent,
            watermark,
            rows_trained,
            holdout,
            scores,
            baseline_scores,
            extra_columns=extra,
        )

    def settle(self, verdict: dict[str, Any]) -> None:
        assert self.pending is not None
        made, kind = self.pending
        self.pending = None
        if verdict.get("moved_baseline", verdict.get("decision") == "promote"):
            self.serving = made
        if kind in ("", "creep"):
            self.trainer_skill, self.trainer_bias = made.skill, made.bias
            self.parent = made.key

    def _maker(self, step: int) -> Callable[[], dict[str, Any]]:
        return lambda: self.body(step)

    def events(self) -> list[DemoEvent]:
        return [
            DemoEvent(
                "shelf-ranker",
                self.at(step),
                self._maker(step),
                note=self.note(step),
                on_verdict=self.settle,
            )
            for step in range(self.steps)
        ]


def shelf_ranker(end: datetime, *, hours: int = 36, rows: int = 3000) -> list[DemoEvent]:
    """The home-shelf ranker: one snapshot every 15 minutes for *hours* hours up to *end*."""
    return ShelfRanker(end, hours=hours, rows=rows).events()


def also_read(end: datetime, *, hours: int = 36) -> Iterator[DemoEvent]:
    """The after-purchase recommender: one snapshot an hour for *hours* hours up to *end*;
    its sample is the top-10 lists of a fixed panel of readers (group, item, rank)."""
    rng = np.random.default_rng(SEED + 1)
    world = World(rng, PANEL * LIST_K)
    shelves = Shelves(SEED + 2)
    start = end - timedelta(hours=hours)
    drop_at = hours // 2
    collapse_at = (hours * 3) // 4
    parent: str | None = None
    recall = 0.31
    for step in range(hours):
        at = start + timedelta(hours=step + 1)
        key = f"ar-{at.strftime('%Y%m%d-%H%M')}"
        holdout = world.holdout()
        scores = world.score(holdout["truth"], skill=0.75, bias=-0.2, noise_seed=SEED + 1)
        step_recall = recall + rng.normal(0.0, 0.002)
        note = ""
        head_bias = 0.3
        if step == drop_at:
            step_recall = recall * 0.9
            note = "recall-drop"
        elif step == collapse_at:
            head_bias = 0.95  # nearly every reader is shown the same bestsellers
            note = "popularity-collapse"
        body = _body(
            key,
            parent,
            at - timedelta(minutes=2),
            int(rng.normal(420_000, 15_000)),
            holdout,
            scores,
            None,
            {"recall_at_10": round(step_recall, 5), "catalog_size": CATALOG},
            extra_columns=shelves.lists(rng, head_bias=head_bias),
        )
        yield DemoEvent("also-read", at, body, note=note)
        if not note:
            recall = step_recall
            parent = key


#: Home-shelf exploration (5% of slots): its pool per slot, the reader's top-50 candidate books,
#: one shown uniformly at random.
EXPLORE_POOL = 50
#: Softmax sharpness turning a model's scores into its slot-level probabilities.
SHARPNESS = 1.0


def with_exploration(events: list[DemoEvent]) -> list[DemoEvent]:
    """Add the logged exploration slots to every shelf-ranker push (off-policy estimates).

    The bookshop serves 5% of home-shelf slots from a uniformly randomised exploration policy
    over the reader's top-50 candidate books, and logs each such slot: the book shown, its
    probability 1/50 (``logging_propensity``), the click (``reward``), and the probability
    that the candidate and the serving baseline would have put that book in the slot (a
    softmax of each model's scores over the 50, :data:`SHARPNESS`), with a reward model's
    prediction and its expectation under each model (doubly robust). Each sample row carries
    one exploration slot beside the holdout row (the job samples both, equally many).

    One push (note ``off-policy``) looks fine on the on-policy holdout labels but puts its
    slots on books serving never shows (those the baseline ranks 26th to 50th), which readers
    click less: the exploration log shows it, and the ``off-policy`` check holds it.
    """
    shelf = [i for i, e in enumerate(events) if e.model == "shelf-ranker"]
    target = next((i for i in shelf[(len(shelf) * 3) // 8 :] if not events[i].note), None)
    out = []
    for step, index in enumerate(shelf):
        event = events[index]
        bad = index == target

        # Made when first read, like the event it wraps (whose body depends on what serves
        # by then), and the verdict is passed on to it.
        def make(event: DemoEvent = event, step: int = step, bad: bool = bad) -> dict[str, Any]:
            columns = _exploration_slots(
                np.random.default_rng([SEED + 3, step]), len(event.body["sample"]["score"]), bad
            )
            body = dict(event.body)
            body["sample"] = {**event.body["sample"], **columns}
            return body

        note = "off-policy" if bad else event.note
        out.append((index, DemoEvent(event.model, event.at, make, note, on_verdict=event.settle)))
    result = list(events)
    for index, event in out:
        result[index] = event
    return result


def _exploration_slots(rng: np.random.Generator, n: int, never_shown: bool) -> dict[str, list[Any]]:
    """*n* logged exploration slots of one push (see :func:`with_exploration`)."""
    k = EXPLORE_POOL
    appeal = rng.normal(-2.2, 0.8, (n, k))  # logit of a reader clicking each book
    beliefs = appeal + rng.normal(0.0, 1.0, (n, k))  # what the serving model scores
    baseline = _softmax_rows(SHARPNESS * beliefs)
    candidate_scores = SHARPNESS * (beliefs + rng.normal(0.0, 0.1, (n, k)))
    if never_shown:
        rank = np.argsort(np.argsort(-beliefs, axis=1), axis=1)  # 0 = serving's first choice
        candidate_scores = candidate_scores + 4.0 * (rank >= k // 2)
    candidate = _softmax_rows(candidate_scores)
    shown = rng.integers(0, k, n)  # uniform exploration over the pool
    rows = np.arange(n)
    click = rng.random(n) < _sigmoid(appeal[rows, shown])
    predicted = _sigmoid(appeal + rng.normal(0.0, 0.3, (n, k)))  # a reward model, not perfect

    def r6(values: np.ndarray) -> list[float]:
        return [round(float(v), 8) for v in values]

    return {
        "reward": click.astype(int).tolist(),
        "logging_propensity": [1.0 / k] * n,
        "candidate_propensity": r6(candidate[rows, shown]),
        "baseline_propensity": r6(baseline[rows, shown]),
        "reward_prediction": r6(predicted[rows, shown]),
        "candidate_expected_reward": r6((candidate * predicted).sum(axis=1)),
        "baseline_expected_reward": r6((baseline * predicted).sum(axis=1)),
    }


def _softmax_rows(x: np.ndarray) -> np.ndarray:
    e = np.exp(x - x.max(axis=1, keepdims=True))
    out: np.ndarray = e / e.sum(axis=1, keepdims=True)
    return out


def scenario(end: datetime, *, hours: int = 36) -> list[DemoEvent]:
    """Every demo event of both models, in time order."""
    events = with_exploration(list(shelf_ranker(end, hours=hours)))
    events += list(also_read(end, hours=hours))
    events.sort(key=lambda e: e.at)
    return events


def load(post: Callable[[DemoEvent], dict[str, Any]], events: list[DemoEvent]) -> dict[str, int]:
    """Post every event with *post*; returns counts of decisions."""
    counts = {"promote": 0, "hold": 0}
    for event in events:
        verdict = post(event)
        event.settle(verdict)
        counts[verdict["decision"]] += 1
    return counts
