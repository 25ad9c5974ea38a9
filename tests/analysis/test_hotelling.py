"""Tests for studies.analysis.hotelling (one-sample Hotelling's T-squared).

References: pingouin 0.7.0 multivariate_ttest (reference library) and a hand
example small enough to check on paper.
"""

from __future__ import annotations

import numpy as np
import pingouin
import pytest
from scipy import stats

from studies.analysis.hotelling import HotellingInputError, hotelling_one_sample


def test_it_reproduces_the_hand_example():
    """Hand example (Johnson & Wichern, Applied Multivariate Statistical Analysis,
    Example 5.1, from memory; re-derived on paper): x = (6,9), (10,6), (8,3), mu0 = (9,5):
    xbar = (8,6), S = [[4,-3],[-3,9]], S^-1 = [[9,3],[3,4]]/27, T2 = 3 * 7/27 = 7/9;
    F = (1/4) T2 on (2, 1) df. Tolerance 1e-12."""
    result = hotelling_one_sample([[6, 9], [10, 6], [8, 3]], mu0=[9, 5])
    assert result.t2 == pytest.approx(7 / 9, abs=1e-12)
    assert result.f == pytest.approx(7 / 36, abs=1e-12)
    assert (result.df1, result.df2) == (2.0, 1.0)
    assert result.p_value == pytest.approx(stats.f.sf(7 / 36, 2, 1), abs=1e-12)


@pytest.mark.parametrize("shift", [0.0, 0.4])
def test_it_matches_pingouin_multivariate_ttest(shift):
    """Reference library pingouin 0.7.0 multivariate_ttest(X) (one-sample against zero):
    T2, F, df1, df2 and p-value to 1e-9, on seeded 3D residuals with and without an offset."""
    rng = np.random.default_rng(11)
    x = rng.normal(0, 1.2, size=(25, 3)) + np.array([shift, 0.0, -shift / 2])
    ref = pingouin.multivariate_ttest(x).iloc[0]
    result = hotelling_one_sample(x)
    assert result.t2 == pytest.approx(ref["T2"], rel=1e-9)
    assert result.f == pytest.approx(ref["F"], rel=1e-9)
    assert (result.df1, result.df2) == (ref["df1"], ref["df2"])
    assert result.p_value == pytest.approx(ref["pval"], rel=1e-9, abs=1e-15)


def test_it_matches_pingouin_against_a_nonzero_mean_after_dropping_nan_rows():
    """pingouin 0.7.0 multivariate_ttest(X - mu0) on the complete rows equals
    hotelling_one_sample(X, mu0) with NaN rows present (tolerance 1e-9)."""
    rng = np.random.default_rng(3)
    x = rng.normal(1.0, 2.0, size=(18, 3))
    mu0 = np.array([1.0, 0.5, 1.5])
    ref = pingouin.multivariate_ttest(x - mu0).iloc[0]
    with_gaps = np.vstack([x[:5], [np.nan, 1.0, 2.0], x[5:]])
    result = hotelling_one_sample(with_gaps, mu0=mu0)
    assert result.t2 == pytest.approx(ref["T2"], rel=1e-9)
    assert result.df2 == 15.0


def test_it_is_invariant_to_a_rotation_of_the_frame():
    """Property (T2 is affine invariant): rotating points and mu0 by the same rotation
    leaves T2 unchanged (tolerance 1e-9)."""
    rng = np.random.default_rng(5)
    x = rng.normal(0.3, 1.0, size=(30, 3))
    rot = stats.special_ortho_group.rvs(3, random_state=8)
    mu0 = np.array([0.1, -0.2, 0.0])
    plain = hotelling_one_sample(x, mu0)
    rotated = hotelling_one_sample(x @ rot.T, rot @ mu0)
    assert rotated.t2 == pytest.approx(plain.t2, rel=1e-9)


def test_it_returns_nan_when_there_are_too_few_rows_or_a_flat_sample():
    """Contract: n <= p, or a singular covariance (points on a plane), gives NaN
    statistics with the degrees of freedom still reported, and no exception."""
    few = hotelling_one_sample(np.ones((3, 3)))
    assert np.isnan(few.t2) and np.isnan(few.p_value) and few.df1 == 3.0
    flat = np.column_stack([np.arange(6.0), np.arange(6.0) ** 2, np.zeros(6)])
    assert np.isnan(hotelling_one_sample(flat).t2)


def test_it_rejects_a_mean_of_the_wrong_length():
    """Input contract: a ValueError subclass whose message quotes the bad value."""
    with pytest.raises(HotellingInputError, match=r"\[1, 2\]"):
        hotelling_one_sample(np.zeros((5, 3)), mu0=[1, 2])
    with pytest.raises(HotellingInputError, match="shape"):
        hotelling_one_sample(np.zeros(5))
