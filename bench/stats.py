"""Benchmark of the statistics engine against reference implementations, in one run.

Run: ``python bench/stats.py`` (or ``make bench``). Optional: ``--sizes 10000,100000``.

For 10k, 100k and 1M rows it prints, each time the best of a few repeats:

- our AUC (service.stats.auc.auc) against ``sklearn.metrics.roc_auc_score``;
- our KS (service.stats.drift.ks_2samp) against ``scipy.stats.ks_2samp(method="asymp")``: the
  same statistic; the same p-value up to 100,000 effective rows, above that ours takes
  Kolmogorov's limit (within 1%) where scipy evaluates the exact-n distribution, which is most of
  its time at 1M rows (scipy's default method is exact below 10,001 rows, so "asymp" is used);
- DeLong's paired test against a 200-resample paired bootstrap of the AUC change (our
  vectorised bootstrap, service.stats.bootstrap);
- the off-policy estimates of a logged-exploration sample (service.stats.offpolicy: weights and
  diagnostics once, then IPS, SNIPS and doubly robust, each paired with its interval) against
  two sorts of a float column of the same length (``np.sort`` twice; target: ratio <= 1);
- the whole evaluation (service.gate.evaluate.evaluate) of one paired sample with two segment
  columns under the policy below: health, paired AUC with segments, log loss, paired change,
  PSI and KS drift.

- shared sort work: the full paired evaluation of the largest size under the policy of issue 10
  (PSI, KS, paired AUC by DeLong with two segment columns and Holm, log loss) divided by the
  time of one ``np.sort`` of a column of that size, both the best of the same repeats, and the
  number of whole-column sorts the evaluation ran (target: at most 8 sorts' time).

Ratios are ours / reference (below 1: ours is faster). Peak memory of the evaluation is measured
in a separate run with tracemalloc (numpy reports its buffers to it), so the timing is not
slowed by the tracing. Targets: AUC and KS at least as fast as the references at 1M rows; the
evaluation of 1M rows under 1 s on a 2-core machine. Timings are wall-clock and depend on the
machine's other load; nothing here is asserted.
"""

from __future__ import annotations

import argparse
import dataclasses
import os
import resource
import sys
import time
import tracemalloc
from collections.abc import Callable
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from scipy import stats as sps  # noqa: E402
from sklearn.metrics import roc_auc_score  # noqa: E402

from service.gate.checks import memo  # noqa: E402
from service.gate.checks.health import health_findings  # noqa: E402
from service.gate.evaluate import _run_check as run_checks  # noqa: E402
from service.gate.evaluate import evaluate  # noqa: E402
from service.gate.policy import Policy, parse_policy  # noqa: E402
from service.gate.types import GateInput, Sample, Snapshot  # noqa: E402
from service.stats import bootstrap as boot  # noqa: E402
from service.stats.auc import auc, delong_paired  # noqa: E402
from service.stats.drift import ks_2samp  # noqa: E402
from service.stats.offpolicy import compare as offpolicy_compare  # noqa: E402
from service.stats.offpolicy import prepare as offpolicy_prepare  # noqa: E402

POLICY = """
models = ["shelf-ranker"]
[sample]
min_rows = 1000

[[checks]]
name = "auc-vs-baseline"
kind = "quality"
metric = "auc"
rule = "non-inferiority"
margin = 0.002
confidence = 0.99
max_gain = 0.03
segments = ["reader_tenure", "device"]
min_segment_rows = 1000

[[checks]]
name = "logloss-vs-baseline"
kind = "quality"
metric = "logloss"
rule = "non-inferiority"
margin = 0.001
confidence = 0.99

[[checks]]
name = "score-change"
kind = "paired"
statistic = "mean_abs_change"
max = 0.05

[[checks]]
name = "rank-agreement"
kind = "paired"
statistic = "spearman"
min = 0.9

[[checks]]
name = "shelf-churn"
kind = "paired"
statistic = "churn"
threshold = 0.5
max = 0.05

[[checks]]
name = "score-psi"
kind = "drift"
statistic = "psi"
max = 0.1
alpha = 0.001

[[checks]]
name = "score-ks"
kind = "drift"
statistic = "ks"
max = 0.05
"""


SORT_POLICY = """
models = ["shelf-ranker"]
[sample]
min_rows = 1000

[[checks]]
name = "auc-vs-baseline"
kind = "quality"
metric = "auc"
rule = "non-inferiority"
margin = 0.002
confidence = 0.99
segments = ["reader_tenure", "device"]
min_segment_rows = 1000
correction = "holm"

[[checks]]
name = "logloss-vs-baseline"
kind = "quality"
metric = "logloss"
rule = "non-inferiority"
margin = 0.001
confidence = 0.99

[[checks]]
name = "score-psi"
kind = "drift"
statistic = "psi"
max = 0.1
alpha = 0.001

[[checks]]
name = "score-ks"
kind = "drift"
statistic = "ks"
max = 0.05
"""


def best_of(fn: Callable[[], object], repeats: int) -> float:
    """Smallest wall-clock time of *repeats* calls, in seconds."""
    best = float("inf")
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - start)
    return best


def shelf_sample(n: int, seed: int) -> tuple[Snapshot, Snapshot]:
    """Invented home-shelf clicks of the demo bookshop: candidate, and the serving baseline."""
    rng = np.random.default_rng(seed)
    appeal = rng.normal(size=n)
    label = (rng.random(n) < 1 / (1 + np.exp(-(appeal - 1.5)))).astype(np.float64)
    shared = 0.8 * rng.normal(size=n)
    cand = 1 / (1 + np.exp(-(appeal - 1.5 + shared + 0.3 * rng.normal(size=n))))
    base = 1 / (1 + np.exp(-(appeal - 1.5 + shared + 0.3 * rng.normal(size=n))))
    # Text columns as the store decodes them: object arrays of distinct str objects.
    tenure = np.array(np.where(rng.random(n) < 0.3, "new", "returning").tolist(), dtype=object)
    device = np.array(np.where(rng.random(n) < 0.6, "app", "web").tolist(), dtype=object)
    candidate = Snapshot(
        model="shelf-ranker",
        key="candidate",
        sample=Sample(
            {
                "score": cand,
                "label": label,
                "baseline_score": base,
                "segment.reader_tenure": tenure,
                "segment.device": device,
            }
        ),
    )
    baseline_rows = rng.permutation(n)  # the baseline's own stored sample: other rows
    baseline = Snapshot(
        model="shelf-ranker",
        key="baseline",
        sample=Sample({"score": base[baseline_rows], "label": label[baseline_rows]}),
    )
    return candidate, baseline


WIDTHS = [9, 46, 10, 10, 8]


def row(*cells: str) -> str:
    return "  ".join(c.rjust(w) for c, w in zip(cells, WIDTHS, strict=True))


def primitives(n: int, repeats: int) -> dict[str, float]:
    """Time our primitives and the references at *n* rows; print one row each; return ratios."""
    rng = np.random.default_rng(n)
    label = (rng.random(n) < 0.3).astype(np.float64)
    score = rng.normal(size=n) + 0.8 * label
    other = score + rng.normal(0, 0.5, size=n)
    x, y = rng.normal(size=n), rng.normal(0.01, 1.0, size=n)
    positive = label > 0
    stat = boot.difference(boot.weighted_auc(positive, score), boot.weighted_auc(positive, other))
    pairs = {
        "AUC vs sklearn roc_auc_score": (
            lambda: auc(label, score),
            lambda: roc_auc_score(label, score),
            repeats,
        ),
        "KS vs scipy ks_2samp (asymp)": (
            lambda: ks_2samp(x, y),
            lambda: sps.ks_2samp(x, y, method="asymp"),
            repeats,
        ),
        "DeLong paired vs 200-resample bootstrap": (
            lambda: delong_paired(label, score, other),
            lambda: boot.paired_replicates(stat, n, resamples=200, rng=np.random.default_rng(1)),
            1,
        ),
    }
    log_columns = exploration_log(n, rng)
    pairs["off-policy IPS+SNIPS+DR vs 2 sorts"] = (
        lambda: all_offpolicy(log_columns),
        lambda: (np.sort(x), np.sort(y)),
        repeats,
    )
    ratios = {}
    for name, (ours_fn, ref_fn, ref_repeats) in pairs.items():
        ours = best_of(ours_fn, repeats)
        ref = best_of(ref_fn, ref_repeats)
        ratios[name] = ours / ref
        print(row(f"{n:,}", name, f"{ours:.4f}", f"{ref:.4f}", f"{ours / ref:.4f}"))
    return ratios


def exploration_log(n: int, rng: np.random.Generator) -> dict[str, np.ndarray]:
    """Invented logged slots: one of 50 books uniformly at random, clicks, both models'
    probabilities of the book and a reward model's columns."""
    cand = rng.dirichlet(np.ones(50), size=1)[0][rng.integers(0, 50, n)]
    base = np.clip(cand * rng.uniform(0.8, 1.25, n), 0.0, 1.0)
    return {
        "reward": (rng.random(n) < 0.1).astype(np.float64),
        "logging_propensity": np.full(n, 0.02),
        "candidate_propensity": cand,
        "baseline_propensity": base,
        "reward_prediction": rng.uniform(0.0, 0.3, n),
        "candidate_expected_reward": rng.uniform(0.0, 0.3, n),
        "baseline_expected_reward": rng.uniform(0.0, 0.3, n),
    }


def all_offpolicy(columns: dict[str, np.ndarray]) -> list[object]:
    """Weights and diagnostics once, then the three estimators with their paired intervals."""
    log = offpolicy_prepare(**columns)
    return [offpolicy_compare(log, est) for est in ("ips", "snips", "dr")]  # type: ignore[arg-type]


def fresh_copy(snapshot: Snapshot) -> Snapshot:
    """The snapshot with every column copied: a new post decoded by the store has new arrays,
    so nothing remembered for an earlier run (sort orders, codes) can help the timed one."""
    assert snapshot.sample is not None
    columns = {
        name: np.array(values.tolist(), dtype=object) if values.dtype == object else values.copy()
        for name, values in snapshot.sample.columns.items()
    }
    return Snapshot(model=snapshot.model, key=snapshot.key, sample=Sample(columns))


def evaluation(
    n: int, repeats: int, policy: Policy, now: datetime
) -> tuple[float, float, int, str, dict[str, float]]:
    """Best wall-clock and CPU time of the whole evaluation at *n* rows, its traced peak
    memory, the decision, and the best wall-clock time of each check."""
    candidate, baseline = shelf_sample(n, seed=n + 1)
    verdict = evaluate(GateInput(candidate=candidate, baseline=baseline, now=now), policy)
    errors = [f.message for f in verdict.findings if f.statistic == "error"]
    if errors:
        raise SystemExit(f"evaluation failed: {errors}")
    wall = cpu = float("inf")
    for _ in range(repeats):
        gate_input = GateInput(
            candidate=fresh_copy(candidate), baseline=fresh_copy(baseline), now=now
        )
        start, start_cpu = time.perf_counter(), time.process_time()
        evaluate(gate_input, policy)
        wall = min(wall, time.perf_counter() - start)
        cpu = min(cpu, time.process_time() - start_cpu)
    per_check: dict[str, float] = {}
    for _ in range(repeats):
        gate_input = GateInput(
            candidate=fresh_copy(candidate), baseline=fresh_copy(baseline), now=now
        )
        start = time.perf_counter()
        health_findings(policy.sample, gate_input.candidate)
        per_check["health"] = min(per_check.get("health", 1e9), time.perf_counter() - start)
        for config in policy.checks:  # in policy order, as evaluate runs them
            one = dataclasses.replace(policy, checks=(config,))
            start = time.perf_counter()
            run_checks(config, gate_input, one)
            per_check[config.name] = min(
                per_check.get(config.name, 1e9), time.perf_counter() - start
            )
    tracemalloc.start()
    evaluate(GateInput(candidate=fresh_copy(candidate), baseline=baseline, now=now), policy)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return wall, cpu, peak, verdict.decision, per_check


def sort_units(n: int, repeats: int, now: datetime) -> tuple[float, float, int]:
    """Best evaluation time under SORT_POLICY, best ``np.sort`` time of an n-row float column
    (each repeat measures both, one after the other), and how many whole-column sorts one
    evaluation runs (``np.sort``/``np.argsort`` calls and shared key sorts of n values)."""
    policy = parse_policy(SORT_POLICY, name="sorts")
    candidate, baseline = shelf_sample(n, seed=n + 2)
    column = np.random.default_rng(n).random(n)
    sorts: list[str] = []
    real = {name: getattr(np, name) for name in ("sort", "argsort")}
    real_keys = memo.order_and_sorted

    def counting(name: str, fn: Callable[..., np.ndarray]) -> Callable[..., np.ndarray]:
        def run(values: np.ndarray, *args: object, **kwargs: object) -> np.ndarray:
            if np.ndim(values) == 1 and np.size(values) >= n // 2:
                sorts.append(f"{name} {np.asarray(values).dtype}")
            return fn(values, *args, **kwargs)

        return run

    def keys(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        sorts.append("shared key sort")
        return real_keys(values)

    for name, fn in real.items():
        setattr(np, name, counting(name, fn))
    memo.order_and_sorted = keys  # type: ignore[assignment]
    try:
        evaluate(
            GateInput(candidate=fresh_copy(candidate), baseline=fresh_copy(baseline), now=now),
            policy,
        )
    finally:
        for name, fn in real.items():
            setattr(np, name, fn)
        memo.order_and_sorted = real_keys  # type: ignore[assignment]
    wall = one_sort = float("inf")
    for _ in range(repeats):
        start = time.perf_counter()
        np.sort(column)
        one_sort = min(one_sort, time.perf_counter() - start)
        gate_input = GateInput(
            candidate=fresh_copy(candidate), baseline=fresh_copy(baseline), now=now
        )
        start = time.perf_counter()
        evaluate(gate_input, policy)
        wall = min(wall, time.perf_counter() - start)
    return wall, one_sort, len(sorts)


def main() -> None:
    parser = argparse.ArgumentParser(description=(__doc__ or "").split("\n\n")[0])
    parser.add_argument("--sizes", default="10000,100000,1000000")
    parser.add_argument(
        "--sorts-only", action="store_true", help="Only the shared sort work row (largest size)."
    )
    args = parser.parse_args()
    sizes = [int(s) for s in args.sizes.split(",")]
    policy = parse_policy(POLICY, name="bench")
    now = datetime(2026, 12, 1, 3, 0, tzinfo=UTC)
    load = os.getloadavg()[0]
    print(
        f"tidegate statistics benchmark: numpy {np.__version__}, {os.cpu_count()} CPUs, "
        f"load average {load:.2f} at start; ratio = ours / reference"
    )
    print(row("rows", "comparison", "ours s", "ref s", "ratio"))
    summary: list[str] = []
    for n in [] if args.sorts_only else sizes:
        repeats = 5 if n <= 100_000 else 3
        ratios = primitives(n, repeats)
        total, cpu, peak, decision, per_check = evaluation(n, repeats, policy, now)
        checks = f"evaluate: health + {len(policy.checks)} checks, 2 segment cols"
        print(row(f"{n:,}", checks, f"{total:.4f}", "-", "-"))
        print(row("", f"  CPU time (both threads) {cpu:.3f} s", "", "", ""))
        memory = f"  peak traced memory {peak / 2**20:.0f} MiB ({peak / n:.0f} B/row)"
        print(row("", memory, "", "", ""))
        if n == sizes[-1]:
            for name, seconds in per_check.items():
                print(row("", f"  {name}", f"{seconds:.4f}", "", ""))
        if n == sizes[-1]:
            summary += [
                f"AUC at {n:,} rows: ours / sklearn = {ratios['AUC vs sklearn roc_auc_score']:.2f}"
                " (target <= 1)",
                f"KS at {n:,} rows: ours / scipy = {ratios['KS vs scipy ks_2samp (asymp)']:.2f}"
                " (target <= 1)",
                f"off-policy IPS+SNIPS+DR with intervals at {n:,} rows: ours / 2 sorts = "
                f"{ratios['off-policy IPS+SNIPS+DR vs 2 sorts']:.2f} (target <= 1)",
                f"paired evaluation of {n:,} rows: {total:.3f} s wall, {cpu:.3f} s CPU "
                f"(target < 1 s), {decision}",
            ]
    n = sizes[-1]
    wall, one_sort, count = sort_units(n, 5, now)
    print(
        row(
            f"{n:,}",
            "shared sorts: PSI, KS, paired AUC 2 seg + Holm, LL",
            f"{wall:.4f}",
            f"{one_sort:.4f}",
            f"{wall / one_sort:.2f}",
        )
    )
    summary.append(
        f"paired evaluation of {n:,} rows (PSI, KS, paired AUC with 2 segment columns + Holm, "
        f"log loss) = {wall / one_sort:.1f} x np.sort of one {n:,}-row column "
        f"({one_sort * 1000:.1f} ms), {count} whole-column sorts (target <= 8 sorts' time)"
    )
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(f"process peak RSS {rss / 1024:.0f} MiB; load average {os.getloadavg()[0]:.2f} at end")
    for line in summary:
        print(line)


if __name__ == "__main__":
    main()
