"""Reader bias (Hotelling's T^2) and drift (OLS slope, Mann-Kendall, CUSUM)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pymannkendall
import pytest
from scipy import stats

from studies.analysis.agreement import leave_one_out_centroid
from studies.analysis.consensus import estimate_consensus, leave_one_out_centres
from studies.analysis.readers import (
    bias_table,
    drift_table,
    mann_kendall_large,
    standardised_distances,
)
from studies.analysis.table import to_dense, validate_placements
from tests.analysis.placement_factory import make_placements


def residuals(df: pd.DataFrame, method: str = "mean"):
    study = to_dense(validate_placements(df))
    pts, placed = study.points_mm[0], study.placed[0]
    loo = leave_one_out_centres(pts, placed, estimate_consensus(pts, placed, method))
    res = np.where(placed[..., None], pts, np.nan) - loo
    dist = np.sqrt(((np.where(study.placed[..., None], study.points_mm, np.nan) - loo) ** 2)
                   .sum(axis=-1))
    return study, res, dist


def test_it_finds_a_planted_bias_and_tests_it_with_hotelling_t2():
    """Reader c is shifted by (+1.5, 0, -1) mm. T^2 = n xbar' S^-1 xbar and
    F = (n-p)/(p(n-1)) T^2 ~ F(p, n-p) (Hotelling 1931), computed here with numpy/scipy."""
    df, _ = make_placements(n_cases=60, n_landmarks=2, n_readers=4, repeat_cases=0, seed=21)
    shift = df["reader"] == "reader_c"
    df.loc[shift, "x_mm"] += 1.5
    df.loc[shift, "z_mm"] -= 1.0
    study, res, _ = residuals(df)
    table = bias_table(study, res).set_index(["reader", "landmark"])
    row = table.loc[("reader_c", "LM0")]
    # LOO mean of the 3 others: the shift shows in full; the others carry -shift/3
    assert row["bias_x_mm"] == pytest.approx(1.5, abs=0.5)
    assert row["bias_z_mm"] == pytest.approx(-1.0, abs=0.5)
    assert row["t2_p_value"] < 1e-6
    x = res[:, 0, 2]
    n, p = x.shape
    t2 = n * x.mean(0) @ np.linalg.solve(np.cov(x.T, ddof=1), x.mean(0))
    assert row["t2"] == pytest.approx(t2, rel=1e-10)
    assert row["t2_p_value"] == pytest.approx(stats.f.sf((n - p) / (p * (n - 1)) * t2, p, n - p),
                                              rel=1e-8)
    np.testing.assert_allclose(table["n"].to_numpy(), 60)


def test_it_matches_pymannkendall_on_a_long_series_with_ties():
    """pymannkendall.original_test 1.4.3 (s, var_s, z, p, Tau) on 5,000 seeded values rounded to
    0.1 (many ties), through the O(n log n) path."""
    rng = np.random.default_rng(12)
    x = np.round(rng.normal(size=5000) + np.linspace(0, 0.3, 5000), 1)
    ours = mann_kendall_large(x)
    ref = pymannkendall.original_test(x)
    assert ours.s == ref.s
    assert ours.var_s == pytest.approx(ref.var_s, rel=1e-12)
    assert ours.z == pytest.approx(ref.z, rel=1e-10)
    assert ours.p == pytest.approx(ref.p, rel=1e-8, abs=1e-15)
    assert ours.tau == pytest.approx(ref.Tau, rel=1e-12)


def test_it_reproduces_the_epa_mann_kendall_example():
    """US EPA QA/G-9S (2006) p. 109: S = 22, Var(S) = 155.33, Z = 1.685 (check-values 8a)."""
    res = mann_kendall_large(np.array([10, 10, 10, 5, 10, 20, 18, 17, 15, 24, 15], float))
    assert res.s == 22 and res.var_s == pytest.approx(155.33, abs=0.005)
    assert res.z == pytest.approx(1.685, abs=0.0005)


def drifting_study():
    df, _ = make_placements(n_cases=70, n_landmarks=2, n_readers=4, repeat_cases=0, seed=31)
    day = df["case"].str[4:].astype(int)
    df["placed_at"] = pd.Timestamp("2026-01-05T08:00:00Z") + pd.to_timedelta(day, unit="D") \
        + pd.to_timedelta(df["reader"].str[-1].map(ord) * 60, unit="s")
    weeks = day / 7.0
    drift = df["reader"] == "reader_d"
    df.loc[drift, "y_mm"] += 0.4 * weeks[drift]  # 0.4 mm per week along y
    return df


def test_it_measures_drift_with_a_least_squares_slope_per_week():
    """The slope and its 95% CI equal scipy.stats.linregress with a t(n-2) interval."""
    df = drifting_study()
    study, _, dist = residuals(df)
    table = drift_table(study, dist).set_index("reader")
    d = dist[0, :, :, 3]
    t = study.placed_at_ns[0, :, :, 3]
    order = np.argsort(t.ravel(), kind="stable")
    y = d.ravel()[order]
    weeks = (t.ravel()[order] - t.ravel()[order][0]) / (7 * 86400e9)
    ref = stats.linregress(weeks, y)
    half = stats.t.ppf(0.975, y.size - 2) * ref.stderr
    row = table.loc["reader_d"]
    assert row["n"] == 140
    assert row["slope_mm_per_week"] == pytest.approx(ref.slope, rel=1e-9)
    assert row["slope_ci_low"] == pytest.approx(ref.slope - half, rel=1e-9)
    assert row["slope_ci_high"] == pytest.approx(ref.slope + half, rel=1e-9)
    assert row["slope_ci_low"] > 0 and row["mann_kendall_p"] < 1e-3
    assert row["cusum_alarms"] >= 1
    first = pd.Timestamp(row["cusum_first_alarm_at"])
    assert first.tzinfo is not None and first > pd.Timestamp("2026-01-05T08:00:00Z")
    steady = table.loc["reader_a"]
    assert steady["slope_ci_low"] < 0.2  # no comparable drift for an unshifted reader


def test_it_standardises_distances_per_landmark_by_median_and_mad():
    """z = (d - median) / (1.4826 MAD) per landmark over all readers (common practice)."""
    rng = np.random.default_rng(3)
    d = np.abs(rng.normal(size=(2, 30, 3, 4))) * np.array([1.0, 2.0, 5.0])[None, None, :, None]
    d[1, 20:] = np.nan
    z = standardised_distances(d)
    for lm in range(3):
        flat = z[:, :, lm].ravel()
        flat = flat[np.isfinite(flat)]
        assert np.median(flat) == pytest.approx(0.0, abs=1e-12)
        assert 1.4826 * np.median(np.abs(flat)) == pytest.approx(1.0, rel=1e-12)


def test_it_uses_the_leave_one_out_centroid_for_the_mean_method():
    df, _ = make_placements(n_cases=5, n_landmarks=1, n_readers=3, repeat_cases=0, seed=1)
    study, res, _ = residuals(df, "mean")
    pts, placed = study.points_mm[0], study.placed[0]
    np.testing.assert_allclose(res, pts - leave_one_out_centroid(pts, placed), atol=1e-12)
