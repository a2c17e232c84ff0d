"""The ``paired`` check and the added drift statistics, segments and the PSI null limit."""

from __future__ import annotations

from datetime import UTC, datetime

import numpy as np
import pytest
from scipy import stats as sps
from statsmodels.stats.multitest import multipletests

from service.gate.evaluate import evaluate
from service.gate.policy import PolicyError, parse_policy
from service.gate.types import Finding, GateInput, Sample, Snapshot
from service.stats.drift import psi, psi_null_quantile

NOW = datetime(2026, 12, 1, 3, 0, tzinfo=UTC)


def policy(check: str) -> object:
    return parse_policy(
        f'models = ["*"]\n[sample]\nmin_rows = 10\n[[checks]]\nname = "c"\n{check}\n', name="t"
    )


def run(cand: dict[str, np.ndarray], base: dict[str, np.ndarray] | None, check: str) -> Finding:
    c = Snapshot(model="also-read", key="c", sample=Sample(cand))
    b = None if base is None else Snapshot(model="also-read", key="b", sample=Sample(base))
    verdict = evaluate(GateInput(candidate=c, baseline=b, now=NOW), policy(check))  # type: ignore[arg-type]
    return next(f for f in verdict.findings if f.check == "c")


def paired(seed: int, n: int = 5000, noise: float = 0.05) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    base = rng.beta(2, 5, n)
    return {
        "score": np.clip(base + rng.normal(0, noise, n), 0, 1),
        "baseline_score": base,
        "segment.device": np.where(rng.random(n) < 0.5, "app", "web").astype(object),
    }


def test_mean_abs_change_and_spearman() -> None:
    cols = paired(1)
    f = run(cols, None, 'kind = "paired"\nstatistic = "mean_abs_change"\nmax = 0.02')
    assert f.value == pytest.approx(np.mean(np.abs(cols["score"] - cols["baseline_score"])))
    assert f.outcome == "breach"  # noise 0.05 gives about 0.04
    g = run(cols, None, 'kind = "paired"\nstatistic = "spearman"\nmin = 0.5')
    # scipy.stats.spearmanr
    assert g.value == pytest.approx(sps.spearmanr(cols["score"], cols["baseline_score"]).statistic)
    assert g.outcome == "ok" and g.interval is not None and g.interval[0] < g.value < g.interval[1]


def test_churn_at_threshold_with_segments() -> None:
    cols = paired(2, noise=0.1)
    web = cols["segment.device"] == "web"
    cols["score"][web] = np.clip(cols["baseline_score"][web] + 0.3, 0, 1)  # web moves a lot
    f = run(
        cols,
        None,
        'kind = "paired"\nstatistic = "churn"\nthreshold = 0.5\nmax = 0.2\n'
        'segments = ["device"]\nmin_segment_rows = 100',
    )
    table = {r["segment"]: r for r in f.details["segments"]}
    flips = (cols["score"] >= 0.5) != (cols["baseline_score"] >= 0.5)
    assert table["device=web"]["value"] == pytest.approx(flips[web].mean())
    assert table["device=web"]["outcome"] == "breach" and table["device=app"]["outcome"] == "ok"
    assert f.outcome == "breach" and "device=web" in f.message


def test_top_k_churn_needs_groups() -> None:
    cols = paired(3)
    assert (
        run(cols, None, 'kind = "paired"\nstatistic = "churn"\ntop_k = 3\nmax = 0.2').outcome
        == "skipped"
    )
    cols["group"] = np.array([f"order-{i // 10}" for i in range(cols["score"].size)], dtype=object)
    f = run(cols, None, 'kind = "paired"\nstatistic = "churn"\ntop_k = 3\nmax = 0.9')
    assert f.outcome == "ok" and 0.0 < f.value < 0.9  # type: ignore[operator]


def test_paired_skipped_without_baseline_scores() -> None:
    cols = paired(4)
    del cols["baseline_score"]
    assert (
        run(cols, None, 'kind = "paired"\nstatistic = "spearman"\nmin = 0.9').outcome == "skipped"
    )


@pytest.mark.parametrize(
    ("check", "key", "text"),
    [
        ('kind = "paired"\nstatistic = "spearman"\nmax = 0.9', "(top level)", "takes 'min'"),
        ('kind = "paired"\nstatistic = "churn"\nmax = 0.1', "(top level)", "exactly one of"),
        (
            'kind = "paired"\nstatistic = "churn"\nmax = 0.1\nthreshold = 0.5\n'
            'against = "reference"',
            "(top level)",
            "compare with the baseline",
        ),
        (
            'kind = "drift"\nstatistic = "wasserstein"\nalpha = 0.01',
            "(top level)",
            "has no p-value",
        ),
        ('kind = "drift"\nstatistic = "psi"', "(top level)", "set max"),
        (
            'kind = "drift"\nstatistic = "hellinger"\nmax = 0.1',
            "statistic",
            "unknown drift statistic",
        ),
    ],
)
def test_policy_errors(check: str, key: str, text: str) -> None:
    with pytest.raises(PolicyError) as err:
        policy(check)
    assert err.value.key == key and text in str(err.value)


def scores(seed: int, n: int, shift: float = 0.0) -> np.ndarray:
    return np.clip(np.random.default_rng(seed).beta(2, 5, n) + shift, 0, 1)


@pytest.mark.parametrize("statistic", ["js", "wasserstein", "ad", "mean_shift", "quantile_shift"])
def test_new_drift_statistics_run_from_a_policy(statistic: str) -> None:
    base = {"score": scores(1, 4000)}
    same = run(
        {"score": scores(2, 4000)}, base, f'kind = "drift"\nstatistic = "{statistic}"\nmax = 1000.0'
    )
    moved = run(
        {"score": scores(3, 4000, 0.05)},
        base,
        f'kind = "drift"\nstatistic = "{statistic}"\nmax = 1000.0',
    )
    assert same.outcome == "ok" and moved.outcome == "ok"
    assert moved.value > same.value  # type: ignore[operator]


def test_ad_with_alpha_alone_is_a_pure_test() -> None:
    base = {"score": scores(1, 3000)}
    assert (
        run(
            {"score": scores(2, 3000)}, base, 'kind = "drift"\nstatistic = "ad"\nalpha = 0.001'
        ).outcome
        == "ok"
    )
    assert (
        run(
            {"score": scores(3, 3000, 0.1)}, base, 'kind = "drift"\nstatistic = "ad"\nalpha = 0.001'
        ).outcome
        == "breach"
    )


def test_psi_limit_is_sample_size_aware_with_alpha() -> None:
    # "PSI above 0.1 and significant at 0.001" is max = 0.1, alpha = 0.001. With 40 rows a side,
    # PSI under no change is about (1/40 + 1/40) chi2(9): mean 0.45, so PSI > 0.1 is common and
    # not significant; with 20,000 rows the same shift is significant.
    check = 'kind = "drift"\nstatistic = "psi"\nmax = 0.1\nalpha = 0.001'
    small = run({"score": scores(4, 40, 0.05)}, {"score": scores(5, 40)}, check)
    assert small.value > 0.1 and small.outcome == "ok"  # type: ignore[operator]
    assert "not significant" in small.message
    assert small.details["psi_null_limit"] == pytest.approx(psi_null_quantile(40, 40, 10, 0.999))
    assert small.details["psi_null_limit"] > small.value
    big_base, big_cand = scores(6, 20_000), scores(7, 20_000, 0.05)
    big = run({"score": big_cand}, {"score": big_base}, check)
    assert big.value == pytest.approx(psi(big_base, big_cand).statistic)
    assert big.value > 0.1 and big.outcome == "breach"  # type: ignore[operator]
    assert big.details["psi_null_limit"] < 0.1


def test_drift_segments_are_adjusted_by_holm() -> None:
    rng = np.random.default_rng(8)
    n = 6000
    device_c = np.where(rng.random(n) < 0.5, "app", "web").astype(object)
    device_b = np.where(rng.random(n) < 0.5, "app", "web").astype(object)
    cand = scores(9, n)
    cand[device_c == "web"] = np.clip(cand[device_c == "web"] + 0.15, 0, 1)
    f = run(
        {"score": cand, "segment.device": device_c},
        {"score": scores(10, n), "segment.device": device_b},
        'kind = "drift"\nstatistic = "ks"\nmax = 0.05\nalpha = 0.01\n'
        'segments = ["device"]\nmin_segment_rows = 100',
    )
    table = [r for r in f.details["segments"] if "pvalue" in r]
    assert [r["segment"] for r in table] == ["(all)", "device=app", "device=web"]
    expected = multipletests([r["pvalue"] for r in table], method="holm")[1]
    assert [r["p_adjusted"] for r in table] == pytest.approx(list(expected))
    web = next(r for r in table if r["segment"] == "device=web")
    assert web["outcome"] == "breach" and f.outcome == "breach"


def test_drift_segment_missing_on_the_other_side_is_reported() -> None:
    f = run(
        {"score": scores(11, 2000), "segment.device": np.array(["app"] * 2000, dtype=object)},
        {"score": scores(12, 2000)},
        'kind = "drift"\nstatistic = "psi"\nmax = 0.1\nsegments = ["device"]',
    )
    assert f.outcome == "ok" and f.details["missing_segment_columns"] == ["device"]


def test_adaptive_limits_side_and_refusal() -> None:
    # Learned limits (the [checks.adaptive] table): a low rank correlation is the bad side.
    # Quality now learns its margin per unit (service/gate/checks/margins.py), so it accepts an
    # adaptive table; baseline-age has a fixed limit and refuses one.
    spearman = policy('kind = "paired"\nstatistic = "spearman"\nmin = 0.5\n[checks.adaptive]\n')
    assert spearman.checks[0].adaptive_side() == "lower"  # type: ignore[attr-defined]
    churn = policy(
        'kind = "paired"\nstatistic = "churn"\nthreshold = 0.5\nmax = 0.1\n[checks.adaptive]\n'
    )
    assert churn.checks[0].adaptive_side() == "upper"  # type: ignore[attr-defined]
    assert spearman.checks[0].natural_transform() == "log1m"  # type: ignore[attr-defined]
    quality = policy('kind = "quality"\nmetric = "auc"\nmargin = 0.01\n[checks.adaptive]\n')
    assert quality.checks[0].learning() == "own"
    with pytest.raises(PolicyError, match="drop 'adaptive'"):
        policy('kind = "baseline-age"\nmax_age_hours = 2\n[checks.adaptive]\n')
