"""Consensus points from several readers, with their uncertainty; outlying readers.

Four estimators of the reference point of each case x landmark from the
readers' first reads, all vectorised over every group at once:

* ``mean``: the centroid;
* ``median``: the coordinate-wise median;
* ``geomedian``: the geometric median (Weiszfeld with the Vardi-Zhang rule);
* ``weighted``: a precision-weighted mean whose per-reader, per-landmark
  variances are estimated from the data by iterative reweighting.

Points are world mm, RAS+, arrays of shape (n_cases, n_landmarks, n_readers, 3).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .geomedian import (
    geometric_median,
    leave_one_out_median,
    nan_median,
    polish_median,
    solve_sym3,
)

__all__ = [
    "METHODS",
    "ConsensusEstimate",
    "estimate_consensus",
    "leave_one_out_centres",
    "outlier_mask",
    "weighted_reader_variances",
]

METHODS: tuple[str, ...] = ("mean", "median", "geomedian", "weighted")
#: Weiszfeld tolerance used for consensus points: 0.1 micrometre is far below any
#: placement precision, and it keeps the iteration count low.
GEOMEDIAN_TOL_MM = 1e-4
#: Tolerance of the leave-one-out geometric medians (reader residuals); with the Newton
#: polish they come out within about 2 micrometres of the exact medians.
LOO_TOL_MM = 1e-4
#: Asymptotic variance of the estimator relative to the mean, spherical Gaussian, 3-D:
#: pi/2 per axis for the coordinate-wise median, 3*pi/8 for the geometric median.
_RELATIVE_VARIANCE = {"mean": 1.0, "median": np.pi / 2, "geomedian": 3 * np.pi / 8}


@dataclass(frozen=True)
class ConsensusEstimate:
    """Consensus points of one method.

    Attributes
    ----------
    method : str
        One of :data:`METHODS`.
    centre_mm : (n_cases, n_landmarks, 3) float64 array
        Consensus points, world mm RAS+; NaN where no reader placed the landmark.
    cov_mm2 : (n_cases, n_landmarks, 3, 3) float64 array
        Covariance of the estimate (mm^2); NaN where it cannot be estimated.
    n_readers : (n_cases, n_landmarks) int64 array
        Readers whose point entered.
    weights : (n_cases, n_landmarks, n_readers) float64 array
        Weight of each reader's point (1 for the unweighted methods, 1/s^2 in
        mm^-2 for ``weighted``), 0 where there is no point.
    reader_var_mm2 : (n_landmarks, n_readers) float64 array or None
        Per-axis variance of each reader per landmark (``weighted`` only).
    """

    method: str
    centre_mm: np.ndarray
    cov_mm2: np.ndarray
    n_readers: np.ndarray
    weights: np.ndarray
    reader_var_mm2: np.ndarray | None = None

    @property
    def se_mm(self) -> np.ndarray:
        """(n_cases, n_landmarks) radial standard error sqrt(trace(cov)), mm."""
        return np.sqrt(np.trace(self.cov_mm2, axis1=-2, axis2=-1))


def _sample_cov(points: np.ndarray, placed: np.ndarray) -> np.ndarray:
    """Sample covariance (ddof 1) of each group's points about its mean, (C, L, 3, 3)."""
    n = placed.sum(axis=-1)
    x = np.where(placed[..., None], points, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = x.sum(axis=-2) / n[..., None]
        d = np.where(placed[..., None], x - mean[..., None, :], 0.0)
        cov = np.empty((*n.shape, 3, 3))
        for i in range(3):
            for j in range(i, 3):
                cov[..., i, j] = cov[..., j, i] = (d[..., i] * d[..., j]).sum(axis=-1)
        cov /= (n - 1)[..., None, None]
    return np.where((n >= 2)[..., None, None], cov, np.nan)


def estimate_consensus(
    points_mm: np.ndarray,
    placed: np.ndarray,
    method: str = "geomedian",
    *,
    geomedian_tol_mm: float = GEOMEDIAN_TOL_MM,
) -> ConsensusEstimate:
    """Consensus point and its covariance for every case x landmark.

    Parameters
    ----------
    points_mm : (n_cases, n_landmarks, n_readers, 3) float64 array
        First-read points, world mm RAS+; NaN where not placed.
    placed : (n_cases, n_landmarks, n_readers) bool array
        Which points exist.
    method : {"mean", "median", "geomedian", "weighted"}
        Estimator, see the module docstring.
    geomedian_tol_mm : float
        Weiszfeld stopping tolerance (mm).

    Returns
    -------
    ConsensusEstimate

    Notes
    -----
    Standard errors. With S the sample covariance of the n readers' points:
    mean: S / n. Median and geometric median: c S / n with the asymptotic
    variance ratio under a spherical Gaussian, c = pi/2 for the coordinate-wise
    median and c = 3 pi / 8 (efficiency 0.85) for the 3-D geometric median
    (from E[1/r] for a chi distribution with 3 degrees of freedom). These are
    model-based; with an outlying reader S grows, so they err on the safe side.
    ``weighted``: cov = I / sum_r w_r, see :func:`weighted_reader_variances`.
    Groups with one point get the point and a NaN covariance.
    """
    if method not in METHODS:
        raise ValueError(f"unknown consensus method {method!r}; choose one of {METHODS}")
    n = placed.sum(axis=-1)
    x = np.where(placed[..., None], points_mm, np.nan)
    if method == "weighted":
        return _weighted(x, placed)
    if method == "mean":
        with np.errstate(invalid="ignore", divide="ignore"):
            centre = np.where(placed[..., None], x, 0.0).sum(axis=-2) / n[..., None]
    elif method == "median":
        centre = nan_median(x, axis=-2)
    else:
        centre = geometric_median(x, placed, tol_mm=geomedian_tol_mm).median_mm
    centre = np.where((n > 0)[..., None], centre, np.nan)
    cov = _RELATIVE_VARIANCE[method] * _sample_cov(x, placed)
    with np.errstate(invalid="ignore", divide="ignore"):
        cov = cov / n[..., None, None]
    return ConsensusEstimate(method, centre, cov, n.astype(np.int64), placed.astype(np.float64))


def weighted_reader_variances(
    points_mm: np.ndarray,
    placed: np.ndarray,
    *,
    prior_cases: float = 2.0,
    floor_mm: float = 0.01,
    floor_fraction: float = 0.01,
    max_iter: int = 100,
    rtol: float = 1e-6,
) -> tuple[np.ndarray, np.ndarray]:
    """Per-reader, per-landmark variance by iterative reweighting (Gaussian model).

    Parameters
    ----------
    points_mm : (n_cases, n_landmarks, n_readers, 3) float64 array
        World mm RAS+, NaN where not placed.
    placed : (n_cases, n_landmarks, n_readers) bool array
    prior_cases : float, default 2.0
        Shrinkage strength: the landmark's pooled variance counts as this many
        cases of evidence for every reader.
    floor_mm : float, default 0.01
        Lower bound on a reader's SD per axis (mm).
    floor_fraction : float, default 0.01
        Lower bound on a reader's variance as a fraction of the pooled variance.
    max_iter, rtol : int, float
        Iteration budget and relative convergence tolerance on the variances.

    Returns
    -------
    var_mm2 : (n_landmarks, n_readers) float64 array
        Per-axis variance s_r^2 of each reader for each landmark (mm^2).
    centre_mm : (n_cases, n_landmarks, 3) float64 array
        The precision-weighted consensus points.

    Notes
    -----
    Model: reader r's point on case i, landmark l is x = mu_il + e with
    e ~ N(0, s_lr^2 I_3), independent. Given the variances, the maximum-
    likelihood mu_il is the precision-weighted mean sum_r w_r x_r / sum_r w_r
    with w_r = 1 / s_lr^2. Given mu, the variances are re-estimated, and the two
    steps alternate (an EM-type coordinate ascent) until the variances change by
    less than ``rtol``. The plain ML variance update collapses: a reader with a
    small variance pulls mu onto its own points and its variance goes to 0. So
    each reader is compared with the weighted mean of the *others*, whose
    expected squared distance is 3 (s_r^2 + V_-r) with V_-r = 1 / sum_{r' != r} w_r';
    the moment estimate is mean_i(||x_r - mu_-r||^2 / 3 - V_-r). It is then shrunk
    towards the landmark's pooled variance, s^2 <- (n s^2 + k s_pool^2) / (n + k)
    with k = ``prior_cases`` (guards readers with few cases), and floored at
    max(floor_mm^2, floor_fraction * s_pool^2). Only cases with two or more
    readers inform the variances. Readers without any such case get s_pool^2.
    """
    placed = placed & np.isfinite(points_mm).all(axis=-1)
    x = np.where(placed[..., None], points_mm, 0.0)
    n_case = placed.sum(axis=-1)
    informative = placed & (n_case >= 2)[..., None]
    n_lr = informative.sum(axis=0).astype(np.float64)
    var = np.ones(placed.shape[1:])
    for _ in range(max_iter):
        w = np.where(placed, 1.0 / var, 0.0)
        wsum = w.sum(axis=-1)
        wx = np.einsum("clr,clri->cli", w, x)
        with np.errstate(invalid="ignore", divide="ignore"):
            w_others = wsum[..., None] - w
            mu_others = (wx[..., None, :] - w[..., None] * x) / w_others[..., None]
            e2 = ((x - mu_others) ** 2).sum(axis=-1)
            term = np.where(informative, e2 / 3.0 - 1.0 / w_others, 0.0)
            raw = term.sum(axis=0) / n_lr
            pool = term.sum(axis=(0, 2)) / n_lr.sum(axis=-1)
        pool = np.where(np.isfinite(pool) & (pool > 0), pool, floor_mm**2)
        raw = np.where(n_lr > 0, raw, pool[:, None])
        new = (n_lr * raw + prior_cases * pool[:, None]) / (n_lr + prior_cases)
        new = np.maximum(new, np.maximum(floor_mm**2, floor_fraction * pool)[:, None])
        change = np.abs(new - var) / var
        var = new
        if np.nanmax(change, initial=0.0) < rtol:
            break
    w = np.where(placed, 1.0 / var, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        centre = np.einsum("clr,clri->cli", w, x) / w.sum(axis=-1)[..., None]
    return var, centre


def _weighted(x: np.ndarray, placed: np.ndarray) -> ConsensusEstimate:
    var, centre = weighted_reader_variances(x, placed)
    w = np.where(placed, 1.0 / var, 0.0)
    n = placed.sum(axis=-1)
    with np.errstate(divide="ignore"):
        v = 1.0 / w.sum(axis=-1)
    cov = v[..., None, None] * np.eye(3)
    cov = np.where((n >= 1)[..., None, None], cov, np.nan)
    centre = np.where((n > 0)[..., None], centre, np.nan)
    return ConsensusEstimate("weighted", centre, cov, n.astype(np.int64), w, var)


def _others(values: np.ndarray) -> np.ndarray:
    """(..., R, k) -> (..., R, R-1, k): for each reader, the other readers' rows."""
    r = values.shape[-2]
    idx = np.array([[j for j in range(r) if j != i] for i in range(r)], dtype=np.int64)
    if r == 1:
        idx = np.zeros((1, 0), dtype=np.int64)
    return values[..., idx, :]


def _influence_step(points_mm: np.ndarray, placed: np.ndarray, centre: np.ndarray) -> np.ndarray:
    """One Newton step from the all-reader geometric median to each leave-one-out median.

    Dropping reader r adds u_r (its unit vector from the median m) to the
    gradient of the sum of distances, so m_-r ~ m - H_-r^-1 u_r, with H_-r the
    Hessian sum_{i != r} (I - u_i u_i^T) / d_i at m. Used as the starting point.
    """
    diff = np.where(placed[..., None], points_mm - centre[..., None, :], 0.0)
    d = np.sqrt((diff**2).sum(axis=-1))
    live = placed & (d > 1e-9)
    inv = np.where(live, 1.0 / np.where(live, d, 1.0), 0.0)
    u = diff * inv[..., None]
    pairs = ((0, 0), (0, 1), (0, 2), (1, 1), (1, 2), (2, 2))
    per = np.stack([inv * ((i == j) - u[..., i] * u[..., j]) for i, j in pairs])  # (6, C, L, R)
    h_minus = per.sum(axis=-1)[..., None] - per
    step, det = solve_sym3(h_minus, np.moveaxis(u, -1, 0))
    init = centre[..., None, :] - np.moveaxis(step, 0, -1)
    ok = live & (det > 1e-12) & np.isfinite(init).all(axis=-1)
    return np.where(ok[..., None], init, centre[..., None, :])


def _loo_median(points_mm: np.ndarray, placed: np.ndarray) -> np.ndarray:
    """(C, L, R, 3) coordinate-wise median of the other readers' points."""
    x = np.where(placed[..., None], points_mm, np.nan)
    return np.moveaxis(leave_one_out_median(np.moveaxis(x, -1, -2)), -1, -2)


def leave_one_out_centres(
    points_mm: np.ndarray, placed: np.ndarray, estimate: ConsensusEstimate
) -> np.ndarray:
    """For every reader, the consensus of the other readers (same method).

    Parameters
    ----------
    points_mm : (n_cases, n_landmarks, n_readers, 3) float64 array
        World mm RAS+.
    placed : (n_cases, n_landmarks, n_readers) bool array
    estimate : ConsensusEstimate
        The all-reader estimate; its method is reused, and for ``weighted`` its
        weights (the reader variances are not refitted without the reader).

    Returns
    -------
    (n_cases, n_landmarks, n_readers, 3) float64 array
        Centre of the others, world mm; NaN where no other reader placed it.

    Notes
    -----
    Mean and weighted: (sum - own term) / (total weight - own weight), exact.
    Median: one sort per group and axis (:func:`studies.analysis.geomedian.leave_one_out_median`),
    exact. Geometric median: a one-step (Newton, influence-function) update from
    the all-reader median, then Newton steps and, where those are not safe, the
    Weiszfeld solver (:func:`studies.analysis.geomedian.polish_median`); on a
    simulated 176,000-placement study the result was within 2 micrometres of
    the fully converged medians.
    """
    x = np.where(placed[..., None], points_mm, 0.0)
    n_others = placed.sum(axis=-1)[..., None] - placed
    method = estimate.method
    if method in ("mean", "weighted"):
        w = estimate.weights if method == "weighted" else placed.astype(np.float64)
        w = np.where(placed, w, 0.0)
        wx = np.einsum("clr,clri->cli", w, x)
        with np.errstate(invalid="ignore", divide="ignore"):
            out = (wx[..., None, :] - w[..., None] * x) / (w.sum(axis=-1)[..., None] - w)[..., None]
    elif method == "median":
        out = _loo_median(points_mm, placed)
    else:
        others = _others(np.where(placed[..., None], points_mm, np.nan))
        init = _influence_step(points_mm, placed, estimate.centre_mm)
        out = polish_median(others, init, tol_mm=LOO_TOL_MM)
    return np.where((n_others > 0)[..., None], out, np.nan)


def outlier_mask(
    points_mm: np.ndarray, placed: np.ndarray, tolerance_mm: float, multiple: float
) -> np.ndarray:
    """Readers whose point lies far from the robust centre of the other readers.

    Parameters
    ----------
    points_mm : (n_cases, n_landmarks, n_readers, 3) float64 array
        World mm RAS+.
    placed : (n_cases, n_landmarks, n_readers) bool array
    tolerance_mm : float
        Distances up to this are never outlying.
    multiple : float
        Multiple of the others' robust spread beyond which a point is outlying.

    Returns
    -------
    (n_cases, n_landmarks, n_readers) bool array

    Notes
    -----
    For reader r, the robust centre c_r is the coordinate-wise median of the
    other readers' points. The robust spread s of the group is the median
    distance of all its points from the group's coordinate-wise median (one
    outlying point barely moves it). Reader r is an outlier when
    ||x_r - c_r|| > max(tolerance, multiple * s). It needs at least two other readers.
    """
    x = np.where(placed[..., None], points_mm, np.nan)
    centre_r = _loo_median(points_mm, placed)
    centre = nan_median(x, axis=-2)
    spread = nan_median(np.sqrt(((x - centre[..., None, :]) ** 2).sum(axis=-1)), axis=-1)
    dist = np.sqrt(((x - centre_r) ** 2).sum(axis=-1))
    n_others = placed.sum(axis=-1)[..., None] - placed
    with np.errstate(invalid="ignore"):
        out = dist > np.maximum(tolerance_mm, multiple * spread)[..., None]
    return out & placed & (n_others >= 2)
