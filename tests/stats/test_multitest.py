"""Tests of Benjamini–Hochberg control (monitor/stats/multitest.py).

Reference: statsmodels' ``multipletests(method="fdr_bh")`` (test-only), and a hand-worked
example of the step-up rule of Benjamini & Hochberg (1995).
"""

from __future__ import annotations

import numpy as np
import pytest
from statsmodels.stats.multitest import multipletests

from monitor.stats.multitest import benjamini_hochberg


def test_hand_worked_example() -> None:
    # m = 5 real p-values (two series have no test), rate q = 0.10.
    # Sorted: 0.001, 0.045, 0.05, 0.07, 0.5; lines i·q/m = 0.02, 0.04, 0.06, 0.08, 0.10.
    #   0.001 <= 0.02 yes; 0.045 <= 0.04 NO; 0.05 <= 0.06 yes; 0.07 <= 0.08 yes; 0.5 <= 0.1 no.
    # Step-up: k = 4 (the largest i under its line), so the first four are rejected, 0.045
    # included even though it is above its own line (a step-down rule would stop there).
    # q-values m·p/i: 0.005, 0.1125, 0.08333, 0.0875, 0.5; running minimum from the top:
    #   0.005, 0.08333, 0.08333, 0.0875, 0.5.
    p_values = [0.07, None, 0.001, 0.5, float("nan"), 0.045, 0.05]
    result = benjamini_hochberg(p_values, rate=0.10)
    assert result.family_size == 5
    assert result.tested.tolist() == [True, False, True, True, False, True, True]
    assert result.reject.tolist() == [True, False, True, False, False, True, True]
    assert result.rejected == 4
    assert result.cutoff == 0.07
    expected_q = [0.0875, None, 0.005, 0.5, None, 0.25 / 3, 0.25 / 3]
    for i, q in enumerate(expected_q):
        if q is None:
            assert result.q_value(i) is None
            assert np.isnan(result.q_values[i])
        else:
            assert result.q_value(i) == pytest.approx(q, rel=1e-12)
    # Counting the two untested series in the family (m = 7) would change the outcome: the
    # lines become i·0.1/7 and only 0.001 survives. They must be left out.
    as_if_seven = multipletests([0.07, 1.0, 0.001, 0.5, 1.0, 0.045, 0.05], alpha=0.10,
                                method="fdr_bh")[0]
    assert as_if_seven.sum() == 1


@pytest.mark.parametrize("rate", [0.05, 0.10, 0.20])
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_against_statsmodels(seed: int, rate: float) -> None:
    # statsmodels multipletests(method="fdr_bh") is the reference; the p-values mix uniform
    # nulls with small alternatives and are rounded to 3 decimals so that ties occur.
    rng = np.random.default_rng(seed)
    p_values = np.concatenate([rng.uniform(size=150), rng.beta(0.3, 8.0, size=50)])
    p_values = np.round(rng.permutation(p_values), 3)
    assert np.unique(p_values).size < p_values.size  # ties present
    reject, q_values, _, _ = multipletests(p_values, alpha=rate, method="fdr_bh")
    result = benjamini_hochberg(p_values, rate=rate)
    assert result.reject.tolist() == reject.tolist()
    np.testing.assert_allclose(result.q_values, q_values, rtol=1e-12, atol=0)
    assert result.family_size == 200


def test_against_statsmodels_with_missing_tests() -> None:
    rng = np.random.default_rng(9)
    p_values = np.round(np.concatenate([rng.uniform(size=80), rng.beta(0.3, 6.0, size=40)]), 2)
    p_values[rng.random(p_values.size) < 0.2] = np.nan
    tested = ~np.isnan(p_values)
    reject, q_values, _, _ = multipletests(p_values[tested], alpha=0.10, method="fdr_bh")
    result = benjamini_hochberg(p_values, rate=0.10)
    assert result.family_size == int(tested.sum())
    assert result.reject[tested].tolist() == reject.tolist()
    assert not result.reject[~tested].any()
    np.testing.assert_allclose(result.q_values[tested], q_values, rtol=1e-12, atol=0)
    assert np.isnan(result.q_values[~tested]).all()


def test_q_values_are_monotone_and_capped() -> None:
    rng = np.random.default_rng(4)
    p_values = rng.uniform(size=500) ** 0.5
    result = benjamini_hochberg(p_values)
    order = np.argsort(p_values)
    assert np.all(np.diff(result.q_values[order]) >= 0)
    assert np.all(result.q_values >= p_values)
    assert np.all(result.q_values <= 1.0)
    # rejecting by q-value at the rate is the same as the step-up rule
    assert result.reject.tolist() == (result.q_values <= 0.10).tolist()


def test_tied_p_values_are_rejected_together() -> None:
    # Four equal p-values of 0.02, m = 4, rate 0.05: the first one is above its line
    # (1·0.05/4 = 0.0125) but the last is below its own (4·0.05/4 = 0.05), so the step-up rule
    # rejects all four; every q-value is min over j of 4·0.02/j = 4·0.02/4 = 0.02.
    result = benjamini_hochberg([0.02, 0.02, 0.02, 0.02], rate=0.05)
    assert result.reject.all()
    np.testing.assert_allclose(result.q_values, 0.02, rtol=1e-12)


def test_degenerate_families() -> None:
    empty = benjamini_hochberg([])
    assert empty.family_size == 0 and empty.rejected == 0 and empty.cutoff is None
    untested = benjamini_hochberg([None, float("nan")])
    assert untested.family_size == 0 and not untested.reject.any()
    assert untested.q_value(0) is None
    single = benjamini_hochberg([0.03], rate=0.05)
    assert single.reject.tolist() == [True] and single.q_value(0) == pytest.approx(0.03)
    extremes = benjamini_hochberg([0.0, 1.0, 1.0])
    assert extremes.reject.tolist() == [True, False, False]
    assert extremes.q_values.tolist() == [0.0, 1.0, 1.0]
    nothing = benjamini_hochberg([0.5, 0.9, 0.3])
    assert nothing.rejected == 0 and nothing.cutoff is None


def test_bad_input_is_refused() -> None:
    with pytest.raises(ValueError, match="between 0 and 1"):
        benjamini_hochberg([0.2, 1.5])
    with pytest.raises(ValueError, match="rate"):
        benjamini_hochberg([0.2], rate=10)
    with pytest.raises(ValueError, match="one-dimensional"):
        benjamini_hochberg(np.zeros((2, 2)))
