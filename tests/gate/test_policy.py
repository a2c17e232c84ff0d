"""Policy loading: validation errors name the file, the check and the key; model matching."""

from __future__ import annotations

from pathlib import Path

import pytest

from service.gate.policy import PolicyError, load_policies, parse_policy, select_policy

ROOT = Path(__file__).resolve().parents[2]

GOOD = """
models = ["shelf-*"]
[[checks]]
name = "score-psi"
kind = "drift"
statistic = "psi"
max = 0.1
"""


def test_shipped_policies_load() -> None:
    policies = load_policies(ROOT / "config" / "policies")
    assert {p.name for p in policies} >= {"shelf-ranker", "also-read", "default"}
    for p in policies:
        assert p.digest.startswith("sha256:") and len(p.digest) == 71


def test_digest_is_of_the_exact_text() -> None:
    import hashlib

    policy = parse_policy(GOOD, name="x")
    assert policy.digest == "sha256:" + hashlib.sha256(GOOD.encode()).hexdigest()
    assert parse_policy(GOOD + "\n", name="x").digest != policy.digest


@pytest.mark.parametrize(
    ("text", "pattern"),
    [
        ('models = ["a"]\nsurprise = 1\n', r"p\.toml, key 'surprise': unknown key"),
        ('models = "a"\n', r"p\.toml, key 'models': Input should be a valid list"),
        ('models = ["a"]\n[sample]\nmin_rows = "many"\n', r"key 'sample\.min_rows'"),
        (
            'models = ["a"]\n[[checks]]\nname = "c1"\nkind = "drift"\nstatistic = "psi"\n'
            "max = 0.1\nbinz = 3\n",
            r"p\.toml, check 'c1', key 'binz': unknown key",
        ),
        (
            'models = ["a"]\n[[checks]]\nname = "c2"\nkind = "drift"\n'
            'statistic = "nope"\nmax = 1\n',
            r"check 'c2', key 'statistic'.*unknown drift statistic 'nope'",
        ),
        (
            'models = ["a"]\n[[checks]]\nname = "c3"\nkind = "wobble"\n',
            r"check 'c3', key 'kind': unknown check kind 'wobble'",
        ),
        (
            'models = ["a"]\n[[checks]]\nname = "c4"\nkind = "metric"\nmetric = "auc"\n'
            'direction = "higher"\n',
            r"check 'c4'.*set at least one of",
        ),
        ('models = ["a"\n', r"not valid TOML"),
    ],
)
def test_errors_name_file_check_and_key(text: str, pattern: str) -> None:
    with pytest.raises(PolicyError, match=pattern):
        parse_policy(text, name="p", path="p.toml")


def test_duplicate_check_names_are_refused() -> None:
    with pytest.raises(PolicyError, match="check name used twice"):
        parse_policy(GOOD + GOOD.split("\n", 2)[2], name="p")


def test_matching_prefers_exact_then_longest_pattern() -> None:
    wide = parse_policy('models = ["*"]\n', name="a-wide")
    shelf = parse_policy('models = ["shelf-*"]\n', name="b-shelf")
    exact = parse_policy('models = ["shelf-ranker"]\n', name="c-exact")
    policies = [wide, shelf, exact]
    assert select_policy(policies, "shelf-ranker") is exact
    assert select_policy(policies, "shelf-other") is shelf
    assert select_policy(policies, "also-read") is wide
    assert select_policy([shelf], "also-read") is None
