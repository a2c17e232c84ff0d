"""An incremental retraining job wired to tidegate (README, "Wiring tidegate into a retraining
job"). Invented data: the Bramble & Page bookshop's home shelf, generated and seeded.

Every step the job:

1. trains the model further on the newest interactions (logistic regression in numpy, warm
   started from the snapshot that serves, so a held snapshot is never built upon);
2. scores one fresh holdout with the candidate *and* with the serving baseline (the same rows:
   paired comparisons);
3. posts the snapshot with tidegate_client, using a trainer token scoped to the model;
4. acts on the answer: deploys when the snapshot serves now, otherwise reports why it was held;
5. and the deploy step ships whatever ``serving`` names, so an operator's override or rollback
   reaches production without touching the job.

Run it against a service (``make demo`` serves one in open mode)::

    python examples/retraining_job.py --url http://127.0.0.1:8080 --steps 4 --break-step 3

Exit code: that of the last step (0 serves, 3 held; 4 rejected and 5 unreachable end the job).
"""

from __future__ import annotations

import argparse
import json
import sys
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np

from tidegate_client import Client, NotFound, Rejected, Unreachable

FEATURES = ("returning_reader", "app", "popularity", "genre_match", "price")
TRUE_WEIGHTS = np.array([0.8, 0.3, 1.2, 1.6, -0.7])
TRUE_BIAS = -1.4
START = datetime(2026, 12, 1, 0, 0, tzinfo=UTC)


def interactions(rng: np.random.Generator, rows: int) -> tuple[np.ndarray, np.ndarray]:
    """Generated shelf impressions: features and whether the reader opened the book."""
    x = np.column_stack(
        [
            rng.random(rows) < 0.7,  # returning reader
            rng.random(rows) < 0.6,  # on the app
            rng.beta(2.0, 5.0, rows),  # book popularity
            rng.random(rows),  # match with the reader's genres
            rng.gamma(2.0, 0.5, rows),  # price, tens of euros
        ]
    ).astype(float)
    p = 1.0 / (1.0 + np.exp(-(x @ TRUE_WEIGHTS + TRUE_BIAS)))
    return x, (rng.random(rows) < p).astype(np.int64)


def train(w: np.ndarray, x: np.ndarray, y: np.ndarray, steps: int = 200) -> np.ndarray:
    """Gradient descent on the logistic loss, starting from *w* (bias last)."""
    xb = np.column_stack([x, np.ones(len(x))])
    for _ in range(steps):
        p = 1.0 / (1.0 + np.exp(-(xb @ w)))
        w = w - 0.5 * xb.T @ (p - y) / len(y)
    return w


def score(w: np.ndarray, x: np.ndarray) -> np.ndarray:
    return 1.0 / (1.0 + np.exp(-(np.column_stack([x, np.ones(len(x))]) @ w)))


def auc(y: np.ndarray, s: np.ndarray) -> float:
    """Area under the ROC curve by the rank-sum (Mann-Whitney) formula; ties are rare here."""
    ranks = np.empty(len(s))
    ranks[np.argsort(s)] = np.arange(1, len(s) + 1)
    pos = y == 1
    n1, n0 = int(pos.sum()), int((~pos).sum())
    return float((ranks[pos].sum() - n1 * (n1 + 1) / 2) / (n1 * n0))


def serving_key(gate: Client, model: str) -> str | None:
    """The key of the snapshot that serves now (None before the model's first snapshot)."""
    try:
        return gate.serving(model).snapshot
    except NotFound:
        return None


def deploy(gate: Client, model: str, state: Path) -> str | None:
    """The deploy step: ship what serves now (which may be an operator's choice)."""
    key = serving_key(gate, model)
    if key is not None:
        with (state / "deployed.log").open("a") as log:
            log.write(key + "\n")
    return key


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--url", default=None, help="tidegate URL (env TIDEGATE_URL)")
    parser.add_argument("--token", default=None, help="trainer token (env TIDEGATE_TOKEN)")
    parser.add_argument("--model", default="shelf-ranker")
    parser.add_argument("--steps", type=int, default=4)
    parser.add_argument("--rows", type=int, default=4000, help="holdout rows per step")
    parser.add_argument("--state", default="job-state", help="folder for weights and logs")
    parser.add_argument(
        "--break-step", type=int, default=None, help="at this step, break a feature join"
    )
    parser.add_argument("--seed", type=int, default=20261201)
    args = parser.parse_args(argv)
    state = Path(args.state)
    state.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(args.seed)
    code = 0
    with Client(args.url, token=args.token, timeout=300.0) as gate:
        for step in range(1, args.steps + 1):
            key = (START + timedelta(minutes=15 * step)).strftime("%Y-%m-%dT%H:%MZ")
            serving = serving_key(gate, args.model)
            weights = state / f"{serving}.npy"
            baseline = np.load(weights) if weights.exists() else np.zeros(len(FEATURES) + 1)
            x, y = interactions(rng, 20_000)
            candidate = train(baseline.copy(), x, y)
            if step == args.break_step:  # a broken join: the genre feature arrives empty
                candidate[FEATURES.index("genre_match")] = 0.0
                candidate[-1] += 1.5
            np.save(state / f"{key}.npy", candidate)
            hx, hy = interactions(rng, args.rows)  # one fresh holdout, scored by both
            cand_scores = score(candidate, hx)
            sample: dict[str, object] = {
                "score": cand_scores,
                "label": hy,
                "segment.reader_tenure": np.where(hx[:, 0] > 0, "returning", "new"),
                "segment.device": np.where(hx[:, 1] > 0, "app", "web"),
            }
            if weights.exists():
                sample["baseline_score"] = score(baseline, hx)
            try:
                verdict = gate.submit(
                    args.model,
                    key,
                    sample=sample,
                    metrics={"auc": auc(hy, cand_scores)},
                    parent=serving,
                    trained_until=START + timedelta(minutes=15 * step - 1),
                    rows_trained=len(y),
                    code_version="bramble-shelf-1.4",
                )
            except Rejected as exc:  # our post is wrong: stop and fix the job
                print(f"step {step} {key}: rejected: {exc}", file=sys.stderr)
                return 4
            except Unreachable as exc:  # safe to rerun: the same key answers the same verdict
                print(f"step {step} {key}: gate unreachable: {exc}", file=sys.stderr)
                return 5
            if verdict.serves_now:
                code = 0
                shipped = deploy(gate, args.model, state)
                print(f"step {step} {key}: promote; deployed {shipped}")
            else:
                code = 3
                shipped = deploy(gate, args.model, state)
                why = "; ".join(verdict.reasons[:2])
                print(f"step {step} {key}: hold ({why}); still serving {shipped}; {verdict.link}")
            (state / "last.json").write_text(
                json.dumps({"key": key, "decision": verdict.decision, "serves": verdict.serves_now})
            )
    return code


if __name__ == "__main__":
    sys.exit(main())
