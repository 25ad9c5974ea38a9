"""Tests for studies.analysis.trend: Mann-Kendall, tabular CUSUM, OLS slope.

Reference values come from the shared check-values notes section 8 (EPA QA/G-9S
example, Montgomery Example 9.1) and from reference libraries pinned in
requirements.in: pymannkendall 1.4.3, scipy 1.17.1, statsmodels 0.15.0.
"""

from __future__ import annotations

import numpy as np
import pymannkendall
import pytest
import statsmodels.api as sm
from scipy import stats

from studies.analysis.trend import TrendInputError, cusum, mann_kendall, ols_slope

EPA_G9S = [10, 10, 10, 5, 10, 20, 18, 17, 15, 24, 15]
TIE_FREE = [3.1, 2.9, 3.5, 3.8, 3.3, 4.1, 4.4, 4.0, 4.9, 5.2]
MONTGOMERY_9_1 = [
    9.45, 7.99, 9.29, 11.66, 12.16, 10.18, 8.04, 11.46, 9.20, 10.34,
    9.03, 11.47, 10.51, 9.40, 10.08, 9.37, 10.62, 10.31, 8.52, 10.84,
    10.90, 9.33, 12.29, 11.50, 10.60, 11.08, 10.38, 11.62, 11.31, 10.52,
]  # fmt: skip
MONTGOMERY_C_PLUS = [
    0, 0, 0, 1.16, 2.82, 2.50, 0.04, 1.00, 0, 0, 0, 0.97, 0.98, 0, 0,
    0, 0.12, 0, 0, 0.34, 0.74, 0, 1.79, 2.79, 2.89, 3.47, 3.35, 4.47, 5.28, 5.30,
]  # fmt: skip


def test_it_reproduces_the_epa_g9s_worked_example():
    """US EPA QA/G-9S (2006) p. 109 via check-values 8a: S = 22, Var(S) = 155.33,
    Z = 1.685 (published to 2-3 decimals, tolerance half a unit in the last place);
    p = 0.091998 and tau = 0.4 from pymannkendall 1.4.3 (tolerance 1e-6)."""
    result = mann_kendall(EPA_G9S)
    assert result.s == 22
    assert abs(result.var_s - 155.33) <= 0.005
    assert abs(result.z - 1.685) <= 0.0005
    assert result.p == pytest.approx(0.091998, abs=1e-6)
    assert result.tau == pytest.approx(0.4, abs=1e-12)


@pytest.mark.parametrize("series", [EPA_G9S, TIE_FREE])
def test_it_matches_pymannkendall_original_test(series):
    """Reference library pymannkendall 1.4.3 original_test: s, var_s, z, p, Tau
    to 1e-9 on the EPA example (with ties) and the tie-free vector."""
    ref = pymannkendall.original_test(np.asarray(series, dtype=float))
    result = mann_kendall(series)
    assert result.s == pytest.approx(ref.s, abs=1e-9)
    assert result.var_s == pytest.approx(ref.var_s, abs=1e-9)
    assert result.z == pytest.approx(ref.z, abs=1e-9)
    assert result.p == pytest.approx(ref.p, abs=1e-9)
    assert result.tau == pytest.approx(ref.Tau, abs=1e-9)


def test_it_gives_the_tie_free_values_and_scipy_tau():
    """check-values 8a tie-free vector: S = 35, tau = 0.777778 (= scipy.stats.kendalltau,
    which equals tau-a without ties), z = 3.041052, p = 0.002358 (tolerance 1e-6)."""
    result = mann_kendall(TIE_FREE)
    assert result.s == 35
    assert result.tau == pytest.approx(0.777778, abs=1e-6)
    assert result.tau == pytest.approx(stats.kendalltau(np.arange(10), TIE_FREE)[0], abs=1e-12)
    assert result.z == pytest.approx(3.041052, abs=1e-6)
    assert result.p == pytest.approx(0.002358, abs=1e-6)


def test_it_returns_nan_for_fewer_than_three_values_and_drops_nans():
    """Contract: n < 3 (after dropping NaN) gives an all-NaN result, no exception;
    NaNs are dropped, as pymannkendall 1.4.3 does (same S as the EPA series)."""
    short = mann_kendall([1.0, np.nan, 2.0])
    assert all(np.isnan(v) for v in (short.s, short.var_s, short.z, short.p, short.tau))
    with_gap = mann_kendall([*EPA_G9S[:4], np.nan, *EPA_G9S[4:]])
    assert with_gap.s == 22


def test_it_gives_no_trend_for_a_constant_series():
    """All values tied: S = 0 and Var(S) = 0 by the tie formula; z = 0, p = 1 (by definition)."""
    result = mann_kendall([2.0] * 6)
    assert (result.s, result.var_s, result.z, result.p) == (0.0, 0.0, 0.0, 1.0)


def test_it_reproduces_montgomerys_upper_cusum_column():
    """Montgomery, Introduction to SQC, Example 9.1 (check-values 8b, SRC for periods
    1-29, computed for 30): C+ with mu0 = 10, sigma = 1, k = 0.5 on an unreset chart,
    printed to 2 dp, so tolerance 0.005. First alarm at observation 29 (index 28)."""
    z = (np.asarray(MONTGOMERY_9_1) - 10.0) / 1.0
    result = cusum(z, k=0.5, h=5.0, restart=False)
    np.testing.assert_allclose(result.upper, MONTGOMERY_C_PLUS, atol=0.005)
    np.testing.assert_allclose(result.lower[:4], [0.05, 1.56, 1.77, 0.0], atol=0.005)
    assert result.first_alarm == 28
    assert result.alarm_index.tolist() == [28, 29]
    assert result.n_alarms == 2


def test_it_alarms_at_observation_28_with_h_4():
    """check-values 8b (computed): with h = 4 the first alarm is observation 28 (C+ = 4.47)."""
    z = np.asarray(MONTGOMERY_9_1) - 10.0
    assert cusum(z, k=0.5, h=4.0).first_alarm == 27


def test_it_restarts_the_sums_after_an_alarm_by_default():
    """Restart convention (common practice): after the alarm at observation 29 the sums
    restart from 0, so C+_30 = max(0, 0.52 - 0.5) = 0.02 (hand computation, 1e-9)."""
    z = np.asarray(MONTGOMERY_9_1) - 10.0
    result = cusum(z)
    assert result.upper[28] == pytest.approx(5.28, abs=0.005)
    assert result.upper[29] == pytest.approx(0.02, abs=1e-9)
    assert result.alarm_index.tolist() == [28]


def test_it_skips_nans_without_resetting_the_sums():
    """Contract: a NaN carries the sums over unchanged and raises no alarm
    (compared with the same series without the NaN, exact)."""
    z = np.asarray(MONTGOMERY_9_1) - 10.0
    with_gap = np.insert(z, 10, np.nan)
    result = cusum(with_gap, restart=False)
    reference = cusum(z, restart=False)
    np.testing.assert_allclose(np.delete(result.upper, 10), reference.upper, atol=1e-12)
    assert result.upper[10] == result.upper[9]
    assert result.first_alarm == 29


def test_it_has_an_in_control_average_run_length_near_465():
    """Montgomery Table 9.3 (MEMORY; reproduced exactly by a Brook-Evans Markov chain,
    check-values 8b): two-sided ARL0 = 465 for k = 0.5, h = 5. Seeded simulation of
    600,000 N(0,1) values with restart (about 1,300 signals, relative SE about 3%);
    tolerance 12%."""
    z = np.random.default_rng(20261201).standard_normal(600_000)
    result = cusum(z, k=0.5, h=5.0)
    arl = z.size / result.n_alarms
    assert abs(arl - 465) / 465 < 0.12


def test_it_rejects_a_negative_decision_interval():
    """Input contract: bad parameters raise a ValueError subclass quoting the value."""
    with pytest.raises(TrendInputError, match="-1"):
        cusum([0.0, 1.0], h=-1)
    with pytest.raises(TrendInputError, match="shape"):
        cusum(np.zeros((2, 2)))


def test_it_matches_scipy_linregress_and_statsmodels_ols():
    """Reference libraries: slope and intercept equal scipy.stats.linregress 1.17.1;
    the 95% CI equals statsmodels 0.15.0 OLS conf_int(0.05) (tolerance 1e-10)."""
    rng = np.random.default_rng(7)
    t = np.sort(rng.uniform(0, 8, 40))
    y = 1.5 + 0.25 * t + rng.normal(0, 0.6, 40)
    result = ols_slope(t, y)
    ref = stats.linregress(t, y)
    fit = sm.OLS(y, sm.add_constant(t)).fit()
    low, high = fit.conf_int(alpha=0.05)[1]
    assert result.slope == pytest.approx(ref.slope, abs=1e-10)
    assert result.intercept == pytest.approx(ref.intercept, abs=1e-10)
    assert result.ci_low == pytest.approx(low, abs=1e-10)
    assert result.ci_high == pytest.approx(high, abs=1e-10)
    assert result.n == 40


def test_it_uses_alpha_for_the_interval_and_drops_nan_pairs():
    """statsmodels 0.15.0 conf_int(0.10) on the complete pairs (tolerance 1e-10)."""
    t = np.array([0.0, 1, 2, 3, np.nan, 5, 6])
    y = np.array([1.0, 1.4, 2.1, np.nan, 3.0, 3.3, 4.2])
    keep = ~(np.isnan(t) | np.isnan(y))
    fit = sm.OLS(y[keep], sm.add_constant(t[keep])).fit()
    result = ols_slope(t, y, alpha=0.10)
    assert result.n == 5
    assert (result.ci_low, result.ci_high) == pytest.approx(
        tuple(fit.conf_int(alpha=0.10)[1]), abs=1e-10
    )


def test_it_returns_nan_interval_for_two_points_and_nan_slope_for_constant_time():
    """Contract: two points give the exact line and a NaN interval (no residual df);
    equal times give a NaN slope; nothing raises."""
    two = ols_slope([0.0, 2.0], [1.0, 2.0])
    assert two.slope == pytest.approx(0.5) and np.isnan(two.ci_low)
    flat = ols_slope([3.0, 3.0, 3.0], [1.0, 2.0, 3.0])
    assert np.isnan(flat.slope) and flat.n == 3
    with pytest.raises(TrendInputError, match="same length"):
        ols_slope([1.0, 2.0], [1.0])
