"""Reader bias and drift against the leave-one-out consensus of the other readers.

A reader's residual on a case and landmark is the vector from the consensus
of the *other* readers' first reads to the reader's own point (world mm,
RAS+). Bias is the mean residual per reader and landmark; drift is a trend in
the residual distance over the reader's placements in time order.
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
from scipy import stats

from .hotelling import hotelling_one_sample
from .table import DenseStudy
from .trend import MannKendallResult, cusum, mann_kendall, ols_slope

__all__ = ["MAD_TO_SD", "bias_table", "drift_table", "mann_kendall_large", "standardised_distances"]

#: Scale factor from the median absolute deviation to the SD of a normal distribution.
MAD_TO_SD = 1.4826
NS_PER_WEEK = 7 * 86400 * 1e9
#: Above this length the Mann-Kendall S is computed in O(n log n) (see mann_kendall_large).
_MK_DIRECT_MAX = 2000


def bias_table(study: DenseStudy, residual_mm: np.ndarray) -> pd.DataFrame:
    """Mean residual per reader and landmark, with Hotelling's T^2 test of zero bias.

    Parameters
    ----------
    study : DenseStudy
        Dense placements (for the identifiers).
    residual_mm : (n_cases, n_landmarks, n_readers, 3) float64 array
        First-read point minus the leave-one-out consensus of the other
        readers, world mm RAS+; NaN where either is missing.

    Returns
    -------
    pandas.DataFrame
        One row per reader x landmark: reader, landmark, n, bias_x_mm,
        bias_y_mm, bias_z_mm, bias_mm (length of the mean vector), t2,
        t2_p_value, reason.

    Notes
    -----
    The test is the one-sample Hotelling T^2 of the residual vectors against 0
    (:func:`studies.analysis.hotelling.hotelling_one_sample`); it needs n > 3.
    Residuals of one reader on different cases are treated as independent.
    """
    ok = np.isfinite(residual_mm).all(axis=-1)
    n = ok.sum(axis=0)  # (L, R)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(ok[..., None], residual_mm, 0.0).sum(axis=0) / n[..., None]
    rows = []
    for r, reader in enumerate(study.readers):
        for lm, landmark in enumerate(study.landmarks):
            res = residual_mm[:, lm, r][ok[:, lm, r]]
            test = hotelling_one_sample(res) if res.shape[0] > 3 else None
            rows.append((reader, landmark, test))
    out = pd.DataFrame({
        "reader": [r[0] for r in rows],
        "landmark": [r[1] for r in rows],
        "n": n.T.ravel(),
    })
    for a, name in enumerate("xyz"):
        out[f"bias_{name}_mm"] = np.where(n > 0, mean[..., a], np.nan).T.ravel()
    out["bias_mm"] = np.sqrt((out[["bias_x_mm", "bias_y_mm", "bias_z_mm"]] ** 2).sum(axis=1,
                                                                                    skipna=False))
    out["t2"] = [t.t2 if t else np.nan for _, _, t in rows]
    out["t2_p_value"] = [t.p_value if t else np.nan for _, _, t in rows]
    nn = out["n"].to_numpy()
    out["reason"] = np.select(
        [nn == 0, nn <= 3, out["t2_p_value"].isna().to_numpy()],
        ["no residual: no other reader placed these points",
         "T2 test needs more than 3 residuals", "T2 undefined: singular covariance"],
        default="")
    return out


def mann_kendall_large(x: np.ndarray) -> MannKendallResult:
    """Mann-Kendall test of a long series in O(n log n) time and O(n) memory.

    Parameters
    ----------
    x : (n,) float64 array
        Values in time order, no NaN.

    Returns
    -------
    MannKendallResult
        The same fields and formulas as :func:`studies.analysis.trend.mann_kendall`.

    Notes
    -----
    S is recovered from Kendall's tau-b between the time index (no ties) and x,
    which scipy computes by merge sort: tau_b = S / sqrt(n0 (n0 - n2)) with
    n0 = n (n - 1) / 2 and n2 = sum t (t - 1) / 2 over tie groups of x. The tie-
    corrected variance, continuity-corrected z and two-sided p follow
    :func:`~studies.analysis.trend.mann_kendall` exactly.
    """
    n = x.size
    if n <= _MK_DIRECT_MAX:
        return mann_kendall(x)
    _, counts = np.unique(x, return_counts=True)
    ties = counts[counts > 1].astype(np.float64)
    n0 = n * (n - 1) / 2.0
    n2 = float(np.sum(ties * (ties - 1) / 2.0))
    tau_b = stats.kendalltau(np.arange(n), x).statistic
    s = float(np.rint(tau_b * np.sqrt(n0 * (n0 - n2)))) if np.isfinite(tau_b) else 0.0
    var_s = (n * (n - 1) * (2 * n + 5) - np.sum(ties * (ties - 1) * (2 * ties + 5))) / 18.0
    z = 0.0 if s == 0 or var_s <= 0 else (s - np.sign(s)) / np.sqrt(var_s)
    p = float(2.0 * stats.norm.sf(abs(z)))
    return MannKendallResult(s=s, var_s=float(var_s), z=float(z), p=p, tau=float(s / n0))


def standardised_distances(distance_mm: np.ndarray) -> np.ndarray:
    """Distances standardised per landmark by a robust centre and spread.

    Parameters
    ----------
    distance_mm : (n_reads, n_cases, n_landmarks, n_readers) float64 array
        Distance of each placement to the leave-one-out consensus; NaN if none.

    Returns
    -------
    float64 array of the same shape
        z = (d - median_l) / (1.4826 MAD_l), with the median and MAD of landmark
        l over all readers, cases and reads; NaN where the MAD is 0.

    Notes
    -----
    The median and MAD are used rather than the mean and SD so that one
    drifting or careless reader does not inflate the yardstick the others are
    measured with; 1.4826 MAD estimates the SD for normal data (common practice).
    Distances are skewed (chi-like), so z is a scale, not a normal score.
    """
    flat = np.moveaxis(distance_mm, 2, 0).reshape(distance_mm.shape[2], -1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # a landmark with no distance
        med = np.nanmedian(flat, axis=1)
        mad = np.nanmedian(np.abs(flat - med[:, None]), axis=1) * MAD_TO_SD
    mad = np.where(mad > 0, mad, np.nan)
    return (distance_mm - med[None, None, :, None]) / mad[None, None, :, None]


def _reader_series(study: DenseStudy, dist: np.ndarray, z: np.ndarray, r: int) -> tuple:
    """Time-ordered (t_ns, d, z) of reader r's placements with a distance and a time."""
    t = study.placed_at_ns[..., r].ravel()
    d = dist[..., r].ravel()
    zz = z[..., r].ravel()
    keep = np.isfinite(d) & (t != np.iinfo(np.int64).min)
    order = np.argsort(t[keep], kind="stable")
    return t[keep][order], d[keep][order], zz[keep][order]


def drift_table(study: DenseStudy, distance_mm: np.ndarray, *, k: float = 0.5,
                h: float = 5.0) -> pd.DataFrame:
    """Per-reader drift of the distance to the leave-one-out consensus over time.

    Parameters
    ----------
    study : DenseStudy
        Dense placements (times and identifiers).
    distance_mm : (2, n_cases, n_landmarks, n_readers) float64 array
        Distance of each placement (first and repeat reads) to the consensus of
        the other readers' first reads, mm; NaN where either is missing.
    k, h : float
        CUSUM reference value and decision interval, in SD units.

    Returns
    -------
    pandas.DataFrame
        One row per reader: reader, n, span_weeks, slope_mm_per_week,
        slope_ci_low, slope_ci_high, mann_kendall_tau, mann_kendall_p,
        cusum_first_alarm_at (ISO 8601 UTC, empty if none), cusum_alarms, reason.

    Notes
    -----
    The series is every placement of the reader with a known time and a
    consensus to compare with, in placed_at order, landmarks mixed. The slope is
    the least-squares slope of distance (mm) on time (weeks since the reader's
    first placement) with a 95% t interval; Mann-Kendall tests the same series
    for a monotonic trend. The CUSUM (Page 1954; two-sided, k = 0.5, h = 5,
    restarting after each alarm) runs on the distances standardised per
    landmark (:func:`standardised_distances`), so landmarks that are harder to
    place do not look like drift when a reader's worklist changes landmark mix.
    """
    z = standardised_distances(distance_mm)
    rows = []
    for r, reader in enumerate(study.readers):
        t, d, zz = _reader_series(study, distance_mm, z, r)
        row: dict[str, object] = {"reader": reader, "n": int(d.size)}
        if d.size < 3:
            row.update(reason="drift needs 3 placements with a time and a consensus")
            rows.append(row)
            continue
        weeks = (t - t[0]) / NS_PER_WEEK
        row["span_weeks"] = float(weeks[-1])
        if weeks[-1] > 0:
            fit = ols_slope(weeks, d)
            row.update(slope_mm_per_week=fit.slope, slope_ci_low=fit.ci_low,
                       slope_ci_high=fit.ci_high)
        mk = mann_kendall_large(d)
        row.update(mann_kendall_tau=mk.tau, mann_kendall_p=mk.p)
        finite = np.isfinite(zz)
        ch = cusum(zz[finite], k=k, h=h)
        row["cusum_alarms"] = ch.n_alarms
        if ch.first_alarm is not None:
            stamp = pd.Timestamp(int(t[finite][ch.first_alarm]), tz="UTC")
            row["cusum_first_alarm_at"] = stamp.isoformat()
        row["reason"] = "" if weeks[-1] > 0 else "slope needs placements at different times"
        rows.append(row)
    cols = ["reader", "n", "span_weeks", "slope_mm_per_week", "slope_ci_low", "slope_ci_high",
            "mann_kendall_tau", "mann_kendall_p", "cusum_first_alarm_at", "cusum_alarms",
            "reason"]
    out = pd.DataFrame(rows).reindex(columns=cols)
    for col in ("cusum_first_alarm_at", "reason"):
        out[col] = out[col].astype(object).where(out[col].notna(), "")
    out["cusum_alarms"] = out["cusum_alarms"].fillna(0).astype(np.int64)
    return out
