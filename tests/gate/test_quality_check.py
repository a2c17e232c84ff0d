"""The ``quality`` check: decision rules, pairing, segments, leak guard, policy keys."""

from __future__ import annotations

import math
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pytest
from statsmodels.stats.multitest import multipletests

from service.gate.evaluate import evaluate
from service.gate.policy import PolicyError, parse_policy
from service.gate.types import Finding, GateInput, Sample, Snapshot
from service.stats.auc import delong_paired, delong_unpaired
from service.stats.inference import minimum_detectable_effect

NOW = datetime(2026, 12, 1, 3, 0, tzinfo=UTC)
ROOT = Path(__file__).resolve().parent.parent.parent


def policy(check: str, *, on_inconclusive: str = "hold", extra: str = "") -> object:
    text = f"""
models = ["*"]
on_inconclusive = "{on_inconclusive}"
[sample]
min_rows = 10
[[checks]]
name = "q"
kind = "quality"
{check}
{extra}
"""
    return parse_policy(text, name="t")


def paired_sample(
    seed: int,
    n: int = 20_000,
    *,
    candidate_noise: float = 1.0,
    baseline_noise: float = 1.0,
    web_noise: float | None = None,
    leak: bool = False,
) -> dict[str, np.ndarray]:
    """Invented demo data: clicks on the home shelf; both models see the same latent appeal."""
    rng = np.random.default_rng(seed)
    appeal = rng.normal(size=n)
    label = (rng.random(n) < 1 / (1 + np.exp(-(appeal - 1.5)))).astype(float)
    device = np.where(rng.random(n) < 0.6, "app", "web").astype(object)
    tenure = np.where(rng.random(n) < 0.3, "new", "returning").astype(object)
    noise_c = np.full(n, candidate_noise)
    if web_noise is not None:
        noise_c[device == "web"] = web_noise
    # Successive snapshots share most of their error (the shared term); each adds its own.
    shared = 0.8 * rng.normal(size=n)
    cand_logit = appeal - 1.5 + shared + 0.4 * noise_c * rng.normal(size=n)
    if leak:
        cand_logit = cand_logit + 4.0 * (label - 0.5)
    base_logit = appeal - 1.5 + shared + 0.4 * baseline_noise * rng.normal(size=n)
    return {
        "score": 1 / (1 + np.exp(-cand_logit)),
        "label": label,
        "baseline_score": 1 / (1 + np.exp(-base_logit)),
        "segment.device": device,
        "segment.reader_tenure": tenure,
    }


def judge(
    columns: dict[str, np.ndarray], pol: object, baseline: dict[str, np.ndarray] | None = None
) -> Finding:
    cand = Snapshot(model="shelf-ranker", key="c", sample=Sample(columns))
    base_cols = baseline or {
        "score": columns["baseline_score"],
        "label": columns.get("label", columns["score"]),
    }
    base = Snapshot(model="shelf-ranker", key="b", sample=Sample(base_cols))
    verdict = evaluate(GateInput(candidate=cand, baseline=base, now=NOW), pol)  # type: ignore[arg-type]
    return next(f for f in verdict.findings if f.check == "q")


AUC_NI = 'metric = "auc"\nrule = "non-inferiority"\nmargin = 0.005\nconfidence = 0.95'


def test_same_model_is_non_inferior() -> None:
    f = judge(paired_sample(1, candidate_noise=1.0, baseline_noise=1.0), policy(AUC_NI))
    assert f.outcome == "ok", f.message
    assert f.details["mode"] == "paired" and f.details["method"] == "delong-paired"
    assert f.limit == -0.005 and f.interval is not None and f.interval[0] > -0.005


def test_finding_numbers_equal_delong_and_mde() -> None:
    cols = paired_sample(2)
    f = judge(cols, policy(AUC_NI))
    ref = delong_paired(cols["label"], cols["score"], cols["baseline_score"])
    assert f.value == pytest.approx(ref.difference, abs=1e-12)
    assert f.candidate_value == pytest.approx(ref.candidate) and f.baseline_value == pytest.approx(
        ref.baseline
    )
    z = 1.959963984540054  # normal 97.5% point
    assert f.interval == pytest.approx(
        (ref.difference - z * ref.se, ref.difference + z * ref.se), rel=1e-9
    )
    assert f.details["mde"] == pytest.approx(
        minimum_detectable_effect(ref.se, confidence=0.95, power=0.8)
    )
    # pvalue: the non-inferiority test, H0 "worse by at least the margin"
    assert f.pvalue == pytest.approx(
        0.5 * math.erfc((ref.difference + 0.005) / ref.se / math.sqrt(2)), rel=1e-6
    )


def test_clear_regression_is_a_breach_and_holds() -> None:
    cols = paired_sample(3, candidate_noise=2.0, baseline_noise=1.0)
    f = judge(cols, policy(AUC_NI))
    assert f.outcome == "breach" and f.interval is not None and f.interval[1] < -0.005
    assert "worse than the baseline by more than the margin" in f.message


def test_small_sample_is_underpowered_and_the_policy_decides() -> None:
    # 300 rows cannot decide against a margin of 0.005: the minimum detectable effect exceeds
    # it, so the unit is underpowered (issue 9: not inconclusive), which does not hold unless
    # the policy opts in with on_underpowered = "hold".
    cols = {k: v[:300] for k, v in paired_sample(4, candidate_noise=1.1).items()}
    f = judge(cols, policy(AUC_NI))
    assert f.outcome == "underpowered"
    assert "detectable change" in f.message
    assert f.details["mde"] > 0.005
    cand = Snapshot(model="m", key="c", sample=Sample(cols))
    base = Snapshot(model="m", key="b", sample=Sample({"score": cols["baseline_score"]}))
    passed = evaluate(GateInput(cand, base, NOW), policy(AUC_NI))  # type: ignore[arg-type]
    opted_in = parse_policy(
        'models = ["*"]\non_underpowered = "hold"\n[sample]\nmin_rows = 10\n'
        f'[[checks]]\nname = "q"\nkind = "quality"\n{AUC_NI}\n',
        name="t",
    )
    held = evaluate(GateInput(cand, base, NOW), opted_in)
    assert passed.decision == "promote"
    assert held.decision == "hold" and any(r.startswith("underpowered:") for r in held.reasons)


def test_superiority_and_limit_rules() -> None:
    better = paired_sample(5, candidate_noise=0.3, baseline_noise=1.0)
    assert judge(better, policy('metric = "auc"\nrule = "superiority"')).outcome == "ok"
    same = paired_sample(6)
    assert (
        judge(same, policy('metric = "auc"\nrule = "superiority"\nmargin = 0.01')).outcome
        == "breach"
    )
    worse = paired_sample(7, candidate_noise=1.3)
    f = judge(worse, policy('metric = "auc"\nrule = "limit"\nmargin = 0.001'))
    assert f.outcome == "breach" and f.details["null"].endswith("no change (two-sided)")


def test_leak_guard() -> None:
    f = judge(paired_sample(8, leak=True), policy(AUC_NI + "\nmax_gain = 0.02"))
    assert f.outcome == "breach" and "label may have leaked" in f.message


@pytest.mark.parametrize(("metric", "better"), [("logloss", "lower"), ("brier", "lower")])
def test_mean_decomposable_metrics_use_paired_t(metric: str, better: str) -> None:
    cols = paired_sample(9, candidate_noise=1.5)
    f = judge(cols, policy(f'metric = "{metric}"\nrule = "non-inferiority"\nmargin = 0.0005'))
    assert f.details["method"] == "paired-t"
    assert f.value is not None and f.value > 0  # worse: higher loss
    assert f.limit == 0.0005 and f.outcome == "breach"


def test_regression_in_one_segment_is_found_and_adjusted() -> None:
    cols = paired_sample(10, n=40_000, web_noise=2.2)
    f = judge(
        cols, policy(AUC_NI, extra='segments = ["device", "reader_tenure"]\nmin_segment_rows = 500')
    )
    table = {row["segment"]: row for row in f.details["segments"]}
    assert set(table) == {
        "(all)",
        "device=app",
        "device=web",
        "reader_tenure=new",
        "reader_tenure=returning",
    }
    assert table["device=web"]["outcome"] == "breach"
    # A unit whose interval straddles the margin while its MDE exceeds it is underpowered now
    # (issue 9), not inconclusive.
    assert table["device=app"]["outcome"] in ("ok", "inconclusive", "underpowered")
    assert f.outcome == "breach" and "device=web" in f.message
    # The adjusted p-values are Holm's over the five units (statsmodels multipletests).
    raw = [table[s]["p_worse"] for s in table]
    adjusted = multipletests(raw, method="holm")[1]
    assert [table[s]["p_worse_adjusted"] for s in table] == pytest.approx(list(adjusted))
    # Each segment's numbers equal DeLong on that segment's rows alone.
    web = cols["segment.device"] == "web"
    ref = delong_paired(cols["label"][web], cols["score"][web], cols["baseline_score"][web])
    assert table["device=web"]["change"] == pytest.approx(ref.difference, abs=1e-12)


def test_benjamini_hochberg_and_small_segments() -> None:
    cols = paired_sample(11, n=6000)
    f = judge(
        cols,
        policy(
            AUC_NI, extra='segments = ["reader_tenure"]\nmin_segment_rows = 2500\ncorrection = "bh"'
        ),
    )
    assert f.details["correction"] == "bh"
    assert [t["segment"] for t in f.details["too_small"]] == ["reader_tenure=new"]
    rows = [r for r in f.details["segments"] if "p_worse" in r]
    adjusted = multipletests([r["p_worse"] for r in rows], method="fdr_bh")[1]
    assert [r["p_worse_adjusted"] for r in rows] == pytest.approx(list(adjusted))


def test_unpaired_uses_the_baselines_own_sample() -> None:
    cand_cols = paired_sample(12)
    base_cols = paired_sample(13)
    del cand_cols["baseline_score"]
    base_only = {"score": base_cols["score"], "label": base_cols["label"]}
    f = judge(cand_cols, policy(AUC_NI), baseline=base_only)
    ref = delong_unpaired(
        cand_cols["label"], cand_cols["score"], base_only["label"], base_only["score"]
    )
    assert f.details["mode"] == "unpaired" and f.details["method"] == "delong-unpaired"
    assert f.value == pytest.approx(ref.difference, abs=1e-12)
    g = judge(
        cand_cols,
        policy('metric = "logloss"\nrule = "non-inferiority"\nmargin = 0.01'),
        baseline=base_only,
    )
    assert g.details["method"] == "welch-t"


def test_floor_without_anything_to_compare() -> None:
    cols = paired_sample(14)
    del cols["baseline_score"]
    cand = Snapshot(model="m", key="c", sample=Sample(cols))
    pol = policy(AUC_NI + "\nfloor = 0.99")
    f = next(x for x in evaluate(GateInput(cand, None, NOW), pol).findings if x.check == "q")  # type: ignore[arg-type]
    assert f.outcome == "breach" and "below the floor 0.99" in f.message
    pol2 = policy(AUC_NI)
    g = next(x for x in evaluate(GateInput(cand, None, NOW), pol2).findings if x.check == "q")  # type: ignore[arg-type]
    assert g.outcome == "skipped"


def test_calibration_ratio_and_ece_use_a_seeded_bootstrap() -> None:
    cols = {k: v[:4000] for k, v in paired_sample(15).items()}
    pol = policy('metric = "ece"\nrule = "non-inferiority"\nmargin = 0.02\nresamples = 200')
    f1, f2 = judge(cols, pol), judge(cols, pol)
    assert f1.details["method"] == "bootstrap-paired"
    assert f1.interval == f2.interval  # same seed, same interval
    other_seed = parse_policy(
        pol.text.replace('models = ["*"]', 'models = ["*"]\nseed = 7'), name="t"
    )  # type: ignore[attr-defined]
    assert judge(cols, other_seed).interval != f1.interval
    ratio = judge(
        cols, policy('metric = "calibration_ratio"\nrule = "limit"\nmargin = 0.05\nresamples = 100')
    )
    assert ratio.details["method"] == "bootstrap-paired"
    assert ratio.candidate_value == pytest.approx(cols["score"].sum() / cols["label"].sum())


def test_forced_bootstrap_agrees_with_delong() -> None:
    cols = {k: v[:5000] for k, v in paired_sample(16, candidate_noise=1.2).items()}
    closed = judge(cols, policy(AUC_NI))
    boot = judge(cols, policy(AUC_NI + '\nmethod = "bootstrap"\nresamples = 1000'))
    assert boot.details["method"] == "bootstrap-paired"
    assert boot.value == pytest.approx(closed.value, abs=1e-12)
    assert closed.interval is not None and boot.interval is not None
    width_closed = closed.interval[1] - closed.interval[0]
    width_boot = boot.interval[1] - boot.interval[0]
    # Same standard error up to the bootstrap's own noise (about 2% at 1000 resamples): 15%.
    assert width_boot == pytest.approx(width_closed, rel=0.15)


def grouped_columns(
    seed: int, noise_c: float, noise_b: float, groups: int = 2000, size: int = 10
) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    n = groups * size
    appeal = rng.normal(size=n)
    label = np.where(appeal + rng.normal(0, 0.5, n) > 1.5, 2.0, 0.0)
    return {
        "score": 1 / (1 + np.exp(-(appeal + noise_c * rng.normal(size=n)))),
        "baseline_score": 1 / (1 + np.exp(-(appeal + noise_b * rng.normal(size=n)))),
        "label": label,
        "group": np.array([f"req-{g}" for g in np.repeat(np.arange(groups), size)], dtype=object),
    }


@pytest.mark.parametrize("metric", ["ndcg", "recall", "mrr", "hit_rate"])
def test_ranking_metrics_paired_per_group(metric: str) -> None:
    cols = grouped_columns(17, noise_c=2.0, noise_b=0.5)
    f = judge(cols, policy(f'metric = "{metric}"\nk = 3\nrule = "non-inferiority"\nmargin = 0.01'))
    assert f.details["method"] == "paired-t" and f.outcome == "breach", f.message
    assert f.statistic == f"{metric} change"
    assert "groups" in f.message


def test_missing_inputs_are_skipped() -> None:
    cols = paired_sample(18)
    no_label = {k: v for k, v in cols.items() if k != "label"}
    assert judge(no_label, policy(AUC_NI)).outcome == "skipped"
    assert (
        judge(cols, policy('metric = "ndcg"\nrule = "non-inferiority"\nmargin = 0.01')).outcome
        == "skipped"
    )


def test_scores_that_are_not_probabilities_fail_closed() -> None:
    cols = paired_sample(19)
    cols["score"] = cols["score"] * 3.0
    f = judge(cols, policy('metric = "logloss"\nrule = "non-inferiority"\nmargin = 0.01'))
    assert f.outcome == "breach" and f.statistic == "error"
    assert "probabilities in [0, 1]" in f.message


@pytest.mark.parametrize(
    ("body", "key", "text"),
    [
        ('metric = "auc"\nrule = "non-inferiority"', "(top level)", "needs a margin"),
        ('metric = "gini"\nmargin = 0.1', "metric", "Input should be"),
        ('metric = "auc"\nmargin = 0.1\nconfidence = 1.5', "confidence", "less than 1"),
        (
            'metric = "auc"\nmargin = 0.1\ncorrection = "bonferroni"',
            "correction",
            "Input should be",
        ),
        ('metric = "auc"\nmargin = 0.1\nthreshold = 0.5', "threshold", "unknown key"),
    ],
)
def test_policy_errors_name_the_key(body: str, key: str, text: str) -> None:
    with pytest.raises(PolicyError) as err:
        policy(body)
    assert err.value.check == "q" and err.value.key == key
    assert text in str(err.value)


def test_example_policy_parses_and_runs() -> None:
    path = ROOT / "config" / "examples" / "quality-policy.toml"
    pol = parse_policy(path.read_text(encoding="utf-8"), name=path.stem, path=str(path))
    kinds = {c.kind for c in pol.checks}
    assert {"quality", "paired", "drift"} <= kinds
    cols = paired_sample(20, n=8000)
    cand = Snapshot(model="shelf-ranker", key="c", sample=Sample(cols))
    base = Snapshot(
        model="shelf-ranker",
        key="b",
        sample=Sample(
            {k: v for k, v in cols.items() if k != "baseline_score"}
            | {"score": cols["baseline_score"]}
        ),
    )
    verdict = evaluate(GateInput(cand, base, NOW), pol)
    assert verdict.error is None
    assert all(f.statistic != "error" for f in verdict.findings), [
        f.message for f in verdict.findings
    ]
    for f in verdict.findings:
        assert f.to_dict()["details"] is not None
