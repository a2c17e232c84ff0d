"""Holm and Benjamini-Hochberg against statsmodels.multipletests."""

from __future__ import annotations

import numpy as np
import pytest
from statsmodels.stats.multitest import multipletests

from service.stats.multiple import adjust, benjamini_hochberg, holm


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_against_statsmodels(seed: int) -> None:
    rng = np.random.default_rng(seed)
    p = np.concatenate([rng.random(12), rng.random(5) * 1e-3, [0.04, 0.04]])  # with a tie
    np.testing.assert_allclose(holm(p), multipletests(p, method="holm")[1], rtol=1e-12)
    np.testing.assert_allclose(
        benjamini_hochberg(p), multipletests(p, method="fdr_bh")[1], rtol=1e-12
    )


def test_holm_by_hand() -> None:
    # Holm (1979): sorted 0.01, 0.03, 0.04 times 3, 2, 1 = 0.03, 0.06, 0.04 -> monotone 0.06.
    assert holm([0.01, 0.04, 0.03]).tolist() == pytest.approx([0.03, 0.06, 0.06])


def test_single_test_is_unchanged_and_validation() -> None:
    assert adjust([0.2], "holm").tolist() == [0.2]
    assert adjust([0.2], "bh").tolist() == [0.2]
    assert adjust([], "holm").size == 0
    with pytest.raises(ValueError, match="method must be one of"):
        adjust([0.1], "bonferroni")  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="within"):
        holm([0.1, 1.2])
