"""Inter-reader agreement on first reads: distances, per-axis spread, ICC and kappa.

Works on the dense arrays of :class:`~studies.analysis.table.DenseStudy`
(world mm, RAS+) and returns the two tables ``agreement_by_case`` and
``agreement_by_landmark``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .icc import icc_single
from .kappa import fleiss_kappa
from .table import DenseStudy, key_label

__all__ = [
    "agreement_by_case",
    "agreement_by_landmark",
    "leave_one_out_centroid",
    "pairwise_distances_mm",
]

AXES = ("x", "y", "z")


def pairwise_distances_mm(points_mm: np.ndarray) -> np.ndarray:
    """Euclidean distances between all readers' points of each group.

    Parameters
    ----------
    points_mm : (..., n_readers, 3) float64 array
        World mm (any common frame); NaN rows for missing points.

    Returns
    -------
    (..., n_readers, n_readers) float64 array
        Distances in mm; NaN where either point is missing, including the
        diagonal of a missing point.
    """
    diff = points_mm[..., :, None, :] - points_mm[..., None, :, :]
    return np.sqrt(np.einsum("...i,...i->...", diff, diff))


def leave_one_out_centroid(points_mm: np.ndarray, placed: np.ndarray) -> np.ndarray:
    """Centroid of the other readers' points, for every reader.

    Parameters
    ----------
    points_mm : (..., n_readers, 3) float64 array
        World mm, NaN where not placed.
    placed : (..., n_readers) bool array

    Returns
    -------
    (..., n_readers, 3) float64 array
        (sum of all points - own point) / (n - 1); NaN where no other reader placed.
    """
    x = np.where(placed[..., None], points_mm, 0.0)
    n_other = placed.sum(axis=-1)[..., None] - placed
    with np.errstate(invalid="ignore", divide="ignore"):
        loo = (x.sum(axis=-2)[..., None, :] - x) / n_other[..., None]
    return np.where((n_other > 0)[..., None], loo, np.nan)


def _pair_stats(dist: np.ndarray, placed: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean and maximum pairwise distance per group (NaN with fewer than 2 points)."""
    n = placed.sum(axis=-1)
    pairs = n * (n - 1)  # ordered pairs; the diagonal is 0
    both = placed[..., :, None] & placed[..., None, :]
    d = np.where(both, dist, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = d.sum(axis=(-2, -1)) / pairs
    mx = d.max(axis=(-2, -1)) if d.shape[-1] else np.zeros(n.shape)
    ok = n >= 2
    return np.where(ok, mean, np.nan), np.where(ok, mx, np.nan)


def agreement_by_case(study: DenseStudy, dist: np.ndarray | None = None) -> pd.DataFrame:
    """Per case x landmark agreement of the first reads.

    Parameters
    ----------
    study : DenseStudy
        Dense placements (world mm, RAS+).
    dist : (n_cases, n_landmarks, n_readers, n_readers) float64 array, optional
        Precomputed :func:`pairwise_distances_mm` of the first reads.

    Returns
    -------
    pandas.DataFrame
        One row per case x landmark: case, landmark, n_read, n_placed, n_absent,
        centroid_x_mm, centroid_y_mm, centroid_z_mm, mean_pairwise_mm,
        max_pairwise_mm, then ``loo_mm_<reader>`` for every reader (distance of
        the reader's point to the centroid of the other readers' points), and
        reason (why figures are NaN, empty otherwise).
    """
    pts, placed = study.points_mm[0], study.placed[0]
    n_case, n_lm, _ = study.shape
    if dist is None:
        dist = pairwise_distances_mm(pts)
    mean_pw, max_pw = _pair_stats(dist, placed)
    n_placed = placed.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        centroid = np.where(placed[..., None], pts, 0.0).sum(axis=-2) / n_placed[..., None]
    loo = np.sqrt(((pts - leave_one_out_centroid(pts, placed)) ** 2).sum(axis=-1))
    out = {
        "case": np.repeat(study.cases.to_numpy(dtype=object), n_lm),
        "landmark": np.tile(study.landmarks.to_numpy(dtype=object), n_case),
        "n_read": study.read[0].sum(axis=-1).ravel(),
        "n_placed": n_placed.ravel(),
        "n_absent": (study.read[0] & study.absent[0]).sum(axis=-1).ravel(),
    }
    for a, name in enumerate(AXES):
        out[f"centroid_{name}_mm"] = centroid[..., a].ravel()
    out["mean_pairwise_mm"] = mean_pw.ravel()
    out["max_pairwise_mm"] = max_pw.ravel()
    for r, reader in enumerate(study.readers):
        out[f"loo_mm_{key_label(reader)}"] = loo[..., r].ravel()
    reason = np.select(
        [study.read[0].sum(axis=-1) == 0, n_placed == 0, n_placed == 1],
        ["not read", "no reader placed it", "only one reader placed it"], default="")
    out["reason"] = reason.ravel()
    return pd.DataFrame(out)


def _pooled_sd(pts: np.ndarray, placed: np.ndarray) -> np.ndarray:
    """(n_landmarks, 3) pooled within-case SD over cases with 2+ points."""
    n = placed.sum(axis=-1)
    x = np.where(placed[..., None], pts, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = x.sum(axis=-2) / n[..., None]
        ss = np.where(placed[..., None], (x - mean[..., None, :]) ** 2, 0.0).sum(axis=-2)
    use = n >= 2
    ss = np.where(use[..., None], ss, 0.0).sum(axis=0)
    df = np.where(use, n - 1, 0).sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.sqrt(ss / df[:, None])


def _icc_by_landmark(pts: np.ndarray, placed: np.ndarray) -> dict[str, np.ndarray]:
    """ICC(2,1) and ICC(3,1) per landmark and axis on complete cases.

    The raters of a landmark are the readers with at least one placed first-read
    point for it; a case is complete when all of them placed the landmark.
    """
    n_lm = pts.shape[1]
    res = {f"{f}_{a}": np.full(n_lm, np.nan) for f in ("icc2_1", "icc3_1") for a in AXES}
    res["n_icc_cases"] = np.zeros(n_lm, dtype=np.int64)
    res["n_icc_readers"] = np.zeros(n_lm, dtype=np.int64)
    raters = placed.any(axis=0)  # (L, R)
    patterns, which = np.unique(raters, axis=0, return_inverse=True)
    for p, pattern in enumerate(patterns):
        lms = np.flatnonzero(which.ravel() == p)
        cols = np.flatnonzero(pattern)
        sub = pts[:, lms][:, :, cols]  # (C, l, k, 3)
        complete = placed[:, lms][:, :, cols].all(axis=-1)  # (C, l)
        y = np.moveaxis(sub, (1, 3), (0, 1))  # (l, 3, C, k)
        result = icc_single(y, use=np.broadcast_to(complete.T[:, None, :], y.shape[:-1]))
        for a, name in enumerate(AXES):
            res[f"icc2_1_{name}"][lms] = result.icc2_1[:, a]
            res[f"icc3_1_{name}"][lms] = result.icc3_1[:, a]
        res["n_icc_cases"][lms] = complete.sum(axis=0)
        res["n_icc_readers"][lms] = cols.size
    return res


def agreement_by_landmark(study: DenseStudy, by_case: pd.DataFrame) -> pd.DataFrame:
    """Per landmark summary of first-read agreement over cases.

    Parameters
    ----------
    study : DenseStudy
        Dense placements (world mm, RAS+).
    by_case : pandas.DataFrame
        Output of :func:`agreement_by_case` for the same study.

    Returns
    -------
    pandas.DataFrame
        One row per landmark: landmark, n_cases (cases with 2+ placed points),
        mean_pairwise_mm, sd_pairwise_mm, median_pairwise_mm, p95_pairwise_mm
        (over cases of the per-case mean pairwise distance), sd_x_mm, sd_y_mm,
        sd_z_mm (pooled within-case SD per world axis), icc2_1_x/y/z,
        icc3_1_x/y/z, n_icc_cases, n_icc_readers, kappa_absent, n_kappa_cases,
        reason (why figures are NaN, empty otherwise).

    Notes
    -----
    The per-axis SD pools the within-case variances: sqrt(sum of squared
    deviations from the case centroid / sum of (n_i - 1)). ICCs follow Shrout &
    Fleiss (1979) on the cases where every rater of the landmark placed it
    (listwise deletion); see :func:`studies.analysis.icc.icc_single`. kappa_absent
    is Fleiss' kappa over cases with two categories, placed and not visible,
    among the readers who read the case (:func:`studies.analysis.kappa.fleiss_kappa`);
    it is NaN when every rating is the same (nothing to agree on beyond chance).
    """
    pts, placed = study.points_mm[0], study.placed[0]
    n_case, n_lm, _ = study.shape
    mean_pw = by_case["mean_pairwise_mm"].to_numpy(dtype=np.float64).reshape(n_case, n_lm)
    ok = np.isfinite(mean_pw)
    n_ok = ok.sum(axis=0)
    out: dict[str, object] = {"landmark": study.landmarks.to_numpy(dtype=object), "n_cases": n_ok}
    with np.errstate(invalid="ignore", divide="ignore"):
        m = np.where(ok, mean_pw, 0.0).sum(axis=0) / n_ok
        var = np.where(ok, (mean_pw - m) ** 2, 0.0).sum(axis=0) / (n_ok - 1)
    out["mean_pairwise_mm"] = np.where(n_ok > 0, m, np.nan)
    out["sd_pairwise_mm"] = np.where(n_ok > 1, np.sqrt(var), np.nan)
    srt = np.sort(mean_pw, axis=0)
    quant = {}
    for q in (0.5, 0.95):
        pos = q * np.maximum(n_ok - 1, 0)
        lo, frac = np.floor(pos).astype(np.int64), pos - np.floor(pos)
        hi = np.minimum(lo + 1, np.maximum(n_ok - 1, 0))
        cols = np.arange(n_lm)
        v = srt[lo, cols] * (1 - frac) + srt[hi, cols] * frac if n_case else np.zeros(n_lm)
        quant[q] = np.where(n_ok > 0, v, np.nan)
    out["median_pairwise_mm"], out["p95_pairwise_mm"] = quant[0.5], quant[0.95]
    sd = _pooled_sd(pts, placed)
    for a, name in enumerate(AXES):
        out[f"sd_{name}_mm"] = sd[:, a]
    out.update(_icc_by_landmark(pts, placed))
    read = study.read[0]
    absent = read & study.absent[0]
    counts = np.stack([(read & ~absent).sum(axis=-1), absent.sum(axis=-1)], axis=-1)
    kap = fleiss_kappa(np.moveaxis(counts, 0, 1))
    out["kappa_absent"] = kap.kappa
    out["n_kappa_cases"] = kap.n_subjects
    out["reason"] = _landmark_reasons(n_ok, out["n_icc_cases"], kap)
    return pd.DataFrame(out)


def _landmark_reasons(n_ok: np.ndarray, n_icc: np.ndarray, kap: object) -> np.ndarray:
    parts = [
        np.where(n_ok == 0, "no case with two placed points", ""),
        np.where(n_icc < 2, "ICC needs two complete cases", ""),
        np.where(kap.n_subjects == 0, "kappa needs a case read twice",
                 np.where(np.isnan(kap.kappa), "kappa undefined: all ratings alike", "")),
    ]
    joined = np.array(["; ".join(p for p in row if p) for row in zip(*parts, strict=True)],
                      dtype=object)
    return joined
