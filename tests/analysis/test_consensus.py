"""Consensus estimators: Weiszfeld geometric median, median, mean, weighted EM, leave-one-out."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import minimize

from studies.analysis.consensus import (
    estimate_consensus,
    leave_one_out_centres,
    outlier_mask,
    weighted_reader_variances,
)
from studies.analysis.geomedian import geometric_median, leave_one_out_median, nan_median

S3 = np.sqrt(3.0)
# Closed-form geometric medians (check-values.md section 6, [COMPUTED], scipy reproduces them).
CLOSED_FORMS = [
    ([[0, 0, 0], [1, 0, 0], [2, 0, 0], [7, 0, 0], [100, 0, 0]], [2, 0, 0], 106.0),
    ([[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0]], [0.5, 0.5, 0], 2 * np.sqrt(2)),
    ([[0, 0, 0], [1, 0, 0], [0.5, S3 / 2, 0]], [0.5, S3 / 6, 0], S3),
    ([[0, 0, 0], [1, 0, 0], [0, 1, 0]], [(3 - S3) / 6, (3 - S3) / 6, 0],
     (np.sqrt(2) + np.sqrt(6)) / 2),
    ([[0, 0, 0], [-1, 0.2, 0], [1, 0.2, 0]], [0, 0, 0], 2 * np.sqrt(1.04)),
]


def total_distance(points: np.ndarray, y: np.ndarray) -> float:
    return float(np.linalg.norm(points - y, axis=1).sum())


@pytest.mark.parametrize(("points", "median", "f"), CLOSED_FORMS)
def test_it_finds_the_closed_form_geometric_medians(points, median, f):
    """Collinear, square, equilateral, Fermat point and a 157-degree vertex (the Vardi-Zhang
    data-point case); check-values.md section 6, to 1e-6."""
    pts = np.asarray(points, dtype=float)
    res = geometric_median(pts)
    np.testing.assert_allclose(res.median_mm, median, atol=1e-6)
    assert total_distance(pts, res.median_mm) == pytest.approx(f, abs=1e-9)
    assert res.converged


def test_it_agrees_with_scipy_nelder_mead_on_random_groups_solved_together():
    """scipy.optimize.minimize(Nelder-Mead, xatol 1e-10, fatol 1e-12) per group; the batch
    solution agrees to 1e-6 mm, is no worse, and meets the optimality condition
    (||sum of unit vectors|| ~ 0, or <= 1 at a data point; check-values.md section 6)."""
    rng = np.random.default_rng(7)
    groups = rng.normal(size=(12, 9, 3)) * rng.uniform(0.5, 5, size=(12, 1, 1)) + 50
    res = geometric_median(groups, tol_mm=1e-12)
    for g, pts in enumerate(groups):
        ref = minimize(lambda y, p=pts: total_distance(p, y), pts.mean(axis=0),
                       method="Nelder-Mead", options={"xatol": 1e-10, "fatol": 1e-12,
                                                      "maxiter": 20000, "maxfev": 40000})
        np.testing.assert_allclose(res.median_mm[g], ref.x, atol=1e-6)
        assert total_distance(pts, res.median_mm[g]) <= ref.fun + 1e-9
        dist = np.linalg.norm(pts - res.median_mm[g], axis=1)
        at_point = dist < 1e-9
        u = (pts[~at_point] - res.median_mm[g]) / dist[~at_point, None]
        assert np.linalg.norm(u.sum(axis=0)) <= (1.0 if at_point.any() else 1e-6)


def test_it_stops_on_a_data_point_that_is_the_median():
    """Vardi & Zhang (2000): at a data point y, y is the median iff ||sum of unit vectors to
    the other points|| <= multiplicity. Four copies of the origin outweigh three far points."""
    pts = np.array([[0, 0, 0]] * 4 + [[10, 0, 0], [0, 10, 0], [0, 0, 10]], dtype=float)
    res = geometric_median(pts, init_mm=np.array([3.0, 3.0, 3.0]))
    np.testing.assert_allclose(res.median_mm, 0.0, atol=1e-9)
    assert res.converged


def test_it_ignores_missing_points_and_returns_nan_for_an_empty_group():
    pts = np.full((2, 4, 3), np.nan)
    pts[0, :3] = [[0, 0, 0], [2, 0, 0], [0, 2, 0]]
    res = geometric_median(pts)
    assert np.isnan(res.median_mm[1]).all()
    ref = geometric_median(pts[0, :3]).median_mm
    np.testing.assert_allclose(res.median_mm[0], ref, atol=1e-9)


def test_it_computes_nan_aware_and_leave_one_out_medians_like_numpy():
    """numpy.nanmedian is the reference for both helpers."""
    rng = np.random.default_rng(5)
    v = rng.normal(size=(50, 7))
    v[rng.random(v.shape) < 0.25] = np.nan
    np.testing.assert_allclose(nan_median(v, axis=1), np.nanmedian(v, axis=1), equal_nan=True)
    loo = leave_one_out_median(v)
    for i in range(50):
        for j in range(7):
            if np.isnan(v[i, j]) or np.isfinite(np.delete(v[i], j)).sum() == 0:
                continue
            assert loo[i, j] == pytest.approx(np.nanmedian(np.delete(v[i], j)), abs=1e-12)


def study_points(seed: int = 1, n_cases: int = 40, n_readers: int = 5, sd=1.0):
    rng = np.random.default_rng(seed)
    truth = rng.uniform(-50, 50, size=(n_cases, 2, 3))
    sd = np.broadcast_to(np.asarray(sd, dtype=float), (2, n_readers))
    pts = truth[:, :, None, :] + rng.normal(size=(n_cases, 2, n_readers, 3)) * sd[..., None]
    return pts, np.ones(pts.shape[:-1], dtype=bool), truth


def test_it_computes_mean_and_median_consensus_with_their_covariances():
    """Mean: S/n; coordinate-wise median: numpy median and (pi/2) S/n (Gaussian asymptotics)."""
    pts, placed, _ = study_points()
    mean = estimate_consensus(pts, placed, "mean")
    np.testing.assert_allclose(mean.centre_mm, pts.mean(axis=2))
    s = np.cov(pts[3, 1].T, ddof=1)
    np.testing.assert_allclose(mean.cov_mm2[3, 1], s / 5)
    np.testing.assert_allclose(mean.se_mm[3, 1], np.sqrt(np.trace(s) / 5))
    med = estimate_consensus(pts, placed, "median")
    np.testing.assert_allclose(med.centre_mm, np.median(pts, axis=2))
    np.testing.assert_allclose(med.cov_mm2[3, 1], np.pi / 2 * s / 5)
    geo = estimate_consensus(pts, placed, "geomedian")
    np.testing.assert_allclose(geo.cov_mm2[3, 1], 3 * np.pi / 8 * s / 5)


def test_it_estimates_reader_variances_and_weights_the_precise_readers_more():
    """Simulation (seeded): readers with SD 0.5, 1, 1, 2, 4 mm per axis over 400 cases; the
    EM variances recover the SDs within 10%, and the weighted consensus beats the mean."""
    sds = np.array([0.5, 1.0, 1.0, 2.0, 4.0])
    pts, placed, truth = study_points(seed=9, n_cases=400, sd=sds)
    var, centre = weighted_reader_variances(pts, placed)
    np.testing.assert_allclose(np.sqrt(var), np.broadcast_to(sds, var.shape), rtol=0.1)
    err_w = np.linalg.norm(centre - truth, axis=-1).mean()
    err_m = np.linalg.norm(pts.mean(axis=2) - truth, axis=-1).mean()
    assert err_w < 0.8 * err_m
    est = estimate_consensus(pts, placed, "weighted")
    np.testing.assert_allclose(est.cov_mm2[0, 0], np.eye(3) / (1 / var[0]).sum())


def test_it_floors_and_shrinks_the_variance_of_a_reader_seen_once():
    """A reader with one case gets a variance pulled towards the landmark's pool, never 0."""
    pts, placed, _ = study_points(seed=4, n_cases=30)
    placed[1:, :, 0] = False
    pts[1:, :, 0] = np.nan
    pts[0, :, 0] = np.median(pts[0, :, 1:], axis=1)  # reader 0 agrees perfectly on its one case
    var, _ = weighted_reader_variances(pts, placed)
    assert (var[:, 0] > 0.2 * var[:, 1:].mean(axis=1)).all()


@pytest.mark.parametrize("method", ["mean", "median", "geomedian", "weighted"])
def test_it_computes_leave_one_out_centres_like_a_loop_over_readers(method):
    """Brute force: drop each reader and recompute (weights kept for 'weighted')."""
    pts, placed, _ = study_points(seed=2, n_cases=6)
    placed[0, 0, 2] = False
    pts[0, 0, 2] = np.nan
    est = estimate_consensus(pts, placed, method)
    loo = leave_one_out_centres(pts, placed, est)
    for r in range(5):
        keep = [i for i in range(5) if i != r]
        sub_pts, sub_placed = pts[:, :, keep], placed[:, :, keep]
        if method == "weighted":
            w = np.where(sub_placed, est.weights[:, :, keep], 0.0)
            ref = (np.nan_to_num(sub_pts) * w[..., None]).sum(axis=2) / w.sum(axis=2)[..., None]
        else:
            ref = estimate_consensus(sub_pts, sub_placed, method, geomedian_tol_mm=1e-10).centre_mm
        np.testing.assert_allclose(loo[:, :, r], ref, atol=2e-3 if method == "geomedian" else 1e-9)


def test_it_flags_an_outlying_reader_but_not_ordinary_scatter():
    pts, placed, _ = study_points(seed=3, n_cases=50)
    pts[10, 1, 4] += [0.0, 12.0, 0.0]
    mask = outlier_mask(pts, placed, tolerance_mm=3.0, multiple=3.0)
    assert mask[10, 1, 4]
    # Gaussian scatter (SD 1 mm per axis) exceeds max(3 mm, 3 x robust spread) rarely
    assert mask.sum() - 1 <= 0.02 * mask.size


def test_it_rejects_an_unknown_method():
    pts, placed, _ = study_points()
    with pytest.raises(ValueError, match="'trimmed'"):
        estimate_consensus(pts, placed, "trimmed")
