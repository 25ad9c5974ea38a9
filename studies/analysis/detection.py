"""Scoring an automatic landmark detector against the readers.

Radial-error summaries (mean radial error, successful detection rate) of the
detector's points against a reference, and the Williams index, which asks
whether the detector agrees with the readers as well as the readers agree with
each other. Distances are Euclidean, in mm, between points in world mm (RAS+);
the callers compute them, so nothing here depends on the frame.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

__all__ = [
    "DEFAULT_RADII_MM",
    "DetectionInputError",
    "WilliamsResult",
    "detection_summary",
    "success_rate_curve",
    "williams_index",
]

DEFAULT_RADII_MM: tuple[float, ...] = (2.0, 2.5, 3.0, 4.0)

AGREES_AS_WELL = "agrees with the readers as well as they agree with each other"
AGREES_LESS = "agrees with the readers less well than they agree with each other"
AGREES_BETTER = "closer to the readers than they are to each other"


class DetectionInputError(ValueError):
    """Raised when distances or radii cannot be used; the message quotes the value."""


@dataclass(frozen=True)
class WilliamsResult:
    """Williams index of a detector (rater 0) against a group of readers.

    Attributes
    ----------
    index : float
        I' (Chalana & Kim 1997 disagreement form); 1 means the detector is as close to
        the readers as they are to each other, above 1 closer, below 1 farther.
    ci_low, ci_high : float
        95% interval index +/- 1.96 SE from the jackknife over cases.
    se : float
        Jackknife standard error of the index.
    verdict : str
        Plain words: one of the three agreement phrases, or why there is no index.
    """

    index: float
    ci_low: float
    ci_high: float
    se: float
    verdict: str


def _errors(errors_mm: object) -> np.ndarray:
    try:
        arr = np.asarray(errors_mm, dtype=np.float64).ravel()
    except (TypeError, ValueError) as exc:
        raise DetectionInputError(f"errors_mm must be numeric, got {errors_mm!r}") from exc
    arr = arr[~np.isnan(arr)]
    if (arr < 0).any() or np.isinf(arr).any():
        bad = arr[(arr < 0) | np.isinf(arr)][:3]
        raise DetectionInputError(f"errors_mm must be finite and >= 0, got {bad!r}")
    return arr


def _radii(radii_mm: object) -> np.ndarray:
    radii = np.atleast_1d(np.asarray(radii_mm, dtype=np.float64))
    if radii.ndim != 1 or not np.isfinite(radii).all() or (radii < 0).any():
        raise DetectionInputError(f"radii_mm must be finite numbers >= 0, got {radii_mm!r}")
    return radii


def success_rate_curve(errors_mm: object, radii_mm: object, *, strict: bool = True) -> np.ndarray:
    """Fraction of radial errors within each radius.

    Parameters
    ----------
    errors_mm : (n,) array-like, float, mm
        Radial errors; NaNs (missing points) are ignored.
    radii_mm : (m,) array-like, float, mm
        Radii, e.g. ``np.linspace(0, 5, 51)`` for a curve.
    strict : bool, default True
        Count errors strictly below the radius ("<"); False counts "<=".

    Returns
    -------
    (m,) ndarray, float64
        Fractions 0..1, NaN for every radius when no error remains.
    """
    errors = np.sort(_errors(errors_mm))
    radii = _radii(radii_mm)
    if errors.size == 0:
        return np.full(radii.shape, np.nan)
    side = "left" if strict else "right"
    return np.searchsorted(errors, radii, side=side) / errors.size


def detection_summary(
    errors_mm: object,
    radii_mm: Sequence[float] = DEFAULT_RADII_MM,
    strict: bool = True,
) -> dict[str, float]:
    """Mean radial error and successful detection rates of one set of points.

    Parameters
    ----------
    errors_mm : (n,) array-like, float, mm
        Radial errors, the Euclidean distance between each detected point and its
        reference point (both world mm). NaNs are ignored.
    radii_mm : sequence of float, mm, default (2.0, 2.5, 3.0, 4.0)
        Radii of the successful detection rates.
    strict : bool, default True
        SDR counts errors strictly below the radius ("<"); False counts "<=".

    Returns
    -------
    dict
        ``n`` (errors used), ``mre_mm`` (mean), ``sd_mm`` (SD, n - 1 denominator;
        NaN when n < 2), ``median_mm``, and ``sdr_<r>mm`` per radius with the dot
        written as an underscore (``sdr_2mm``, ``sdr_2_5mm``, ``sdr_3mm``,
        ``sdr_4mm``), as fractions 0..1. All NaN but n when no error remains.

    Notes
    -----
    MRE = mean of R_i; SDR_z = #{i : R_i < z} / N. The radii 2, 2.5, 3 and 4 mm follow
    the ISBI 2015 cephalometric challenge evaluation (common practice); whether the
    challenge used "<" or "<=" is not settled, so both are offered.

    References
    ----------
    1. Wang C-W, Huang C-T, Lee J-H, et al. A benchmark for comparison of dental
       radiography analysis algorithms. Med Image Anal 2016;31:63-76 (from memory).
    """
    errors = _errors(errors_mm)
    radii = _radii(radii_mm)
    n = int(errors.size)
    nan = float("nan")
    out: dict[str, float] = {
        "n": n,
        "mre_mm": float(errors.mean()) if n else nan,
        "sd_mm": float(errors.std(ddof=1)) if n >= 2 else nan,
        "median_mm": float(np.median(errors)) if n else nan,
    }
    rates = success_rate_curve(errors, radii, strict=strict)
    for radius, rate in zip(radii.tolist(), rates.tolist(), strict=True):
        out["sdr_" + f"{radius:g}".replace(".", "_") + "mm"] = float(rate)
    return out


def _check_distances(d0: object, dpair: object) -> tuple[np.ndarray, np.ndarray]:
    d0_arr = np.asarray(d0, dtype=np.float64)
    dpair_arr = np.asarray(dpair, dtype=np.float64)
    if d0_arr.ndim != 2:
        raise DetectionInputError(f"d0 must have shape (n_cases, n_readers), got {d0_arr.shape}")
    n_cases, n_readers = d0_arr.shape
    if dpair_arr.shape != (n_cases, n_readers, n_readers):
        raise DetectionInputError(
            f"dpair must have shape {(n_cases, n_readers, n_readers)}, got {dpair_arr.shape}"
        )
    for name, arr in (("d0", d0_arr), ("dpair", dpair_arr)):
        bad = arr[np.isinf(arr) | (arr < 0)]
        if bad.size:
            raise DetectionInputError(f"{name} must hold distances >= 0 or NaN, got {bad[:3]!r}")
    if not np.allclose(dpair_arr, dpair_arr.transpose(0, 2, 1), equal_nan=True):
        raise DetectionInputError("dpair must be symmetric: dpair[c, j, k] == dpair[c, k, j]")
    return d0_arr, dpair_arr


def _index_from_means(d0_mean: np.ndarray, dpair_mean: np.ndarray) -> np.ndarray:
    """I' for each row of mean distances: (m, R) and (m, R, R) -> (m,)."""
    upper = np.triu_indices(dpair_mean.shape[-1], k=1)
    pairs = dpair_mean[:, upper[0], upper[1]]
    with np.errstate(divide="ignore", invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN rows give NaN, as wanted
        num = np.nanmean(1.0 / d0_mean, axis=1)
        den = np.nanmean(1.0 / pairs, axis=1)
        index = num / den
    zero = (d0_mean == 0).any(axis=1) | (pairs == 0).any(axis=1)
    return np.where(zero | ~np.isfinite(index), np.nan, index)


def _mean_over_cases(values: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Mean over axis 0 of all cases, and of all cases but one (jackknife), NaN-aware."""
    present = ~np.isnan(values)
    filled = np.where(present, values, 0.0)
    total, count = filled.sum(axis=0), present.sum(axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        full = np.where(count > 0, total / count, np.nan)
        left_out = (total - filled) / (count - present)
        left_out = np.where(count - present > 0, left_out, np.nan)
    return full, left_out, count


def williams_index(d0: object, dpair: object) -> WilliamsResult:
    """Williams index of a detector against n readers, with a jackknife 95% CI.

    Parameters
    ----------
    d0 : (n_cases, n_readers) array-like, float, mm
        d0[c, j] is the distance between the detector's and reader j's point on
        case c; NaN when either is missing.
    dpair : (n_cases, n_readers, n_readers) array-like, float, mm
        dpair[c, j, k] is the distance between readers j and k on case c; NaN when
        either is missing. Must be symmetric; the diagonal is not used.

    Returns
    -------
    WilliamsResult
        index, ci_low, ci_high, se, verdict.

    Notes
    -----
    D_0j is the mean of d0[:, j] over the cases where both placed the point, and
    D_jk the mean of dpair[:, j, k] likewise. The index is
    I' = mean_j (1 / D_0j) / mean_{j<k} (1 / D_jk): the detector's mean agreement
    (reciprocal disagreement) with the readers over the readers' mean agreement
    with each other. Pairs that share no case are left out of their mean. The SE
    is the jackknife over cases: leave case c out, recompute I'_(-c), and
    SE^2 = ((C - 1) / C) sum_c (I'_(-c) - mean I'_(-.))^2; the interval is
    I' +/- 1.96 SE. Verdict: an interval entirely below 1 means the detector
    agrees less well than the readers agree with each other, entirely above 1 that
    it is closer, otherwise (the interval includes 1) that it agrees as well. The
    index is undefined (NaN) with fewer than 2 readers or when a mean distance is
    0; the verdict then says why.

    References
    ----------
    1. Williams GW. Comparing the joint agreement of several raters with another
       rater. Biometrics 1976;32(3):619-627. doi:10.2307/2529750 (DOI from memory).
    2. Chalana V, Kim Y. A methodology for evaluation of boundary detection
       algorithms on medical images. IEEE Trans Med Imaging 1997;16(5):642-652.
       doi:10.1109/42.640755
    """
    d0_arr, dpair_arr = _check_distances(d0, dpair)
    n_cases, n_readers = d0_arr.shape
    nan = float("nan")
    if n_readers < 2:
        reason = f"no index: it needs at least 2 readers, got {n_readers}"
        return WilliamsResult(nan, nan, nan, nan, reason)
    d0_full, d0_loo, _ = _mean_over_cases(d0_arr)
    pair_full, pair_loo, _ = _mean_over_cases(dpair_arr)
    index = float(_index_from_means(d0_full[None], pair_full[None])[0])
    if np.isnan(index):
        return WilliamsResult(nan, nan, nan, nan, _why_undefined(d0_full, pair_full))
    loo = _index_from_means(d0_loo, pair_loo)
    if n_cases < 2 or np.isnan(loo).any():
        reason = "no confidence interval: the jackknife needs at least 2 cases that each"
        reason += " leave a defined index when left out"
        return WilliamsResult(index, nan, nan, nan, reason)
    se = float(np.sqrt((n_cases - 1) / n_cases * np.sum((loo - loo.mean()) ** 2)))
    low, high = index - 1.96 * se, index + 1.96 * se
    if high < 1.0:
        verdict = AGREES_LESS
    elif low > 1.0:
        verdict = AGREES_BETTER
    else:
        verdict = AGREES_AS_WELL
    return WilliamsResult(index, low, high, se, verdict)


def _why_undefined(d0_mean: np.ndarray, pair_mean: np.ndarray) -> str:
    upper = np.triu_indices(pair_mean.shape[-1], k=1)
    pairs = pair_mean[upper]
    if (d0_mean == 0).any() or (pairs == 0).any():
        return "no index: a mean distance is 0 mm (points coincide on every shared case)"
    if np.isnan(d0_mean).all():
        return "no index: the detector and the readers share no case"
    return "no index: no two readers share a case"
