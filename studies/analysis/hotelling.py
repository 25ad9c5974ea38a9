"""Hotelling's one-sample T-squared test for a mean vector.

Used to ask whether a reader's 3D residuals (world mm, RAS+) against the
consensus have a systematic offset: the null hypothesis is that the mean
residual vector is zero.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

__all__ = ["HotellingInputError", "HotellingResult", "hotelling_one_sample"]


class HotellingInputError(ValueError):
    """Raised when the sample or the hypothesised mean cannot be used; the message quotes it."""


@dataclass(frozen=True)
class HotellingResult:
    """One-sample Hotelling's T-squared test.

    Attributes
    ----------
    t2 : float
        Hotelling's T-squared statistic.
    f : float
        The equivalent F statistic, (n - p) / (p (n - 1)) * T2.
    df1, df2 : float
        Degrees of freedom of F: p and n - p.
    p_value : float
        Upper-tail probability of F(df1, df2) at ``f``.
    """

    t2: float
    f: float
    df1: float
    df2: float
    p_value: float


def _nan_result(p: int, n: int) -> HotellingResult:
    nan = float("nan")
    return HotellingResult(t2=nan, f=nan, df1=float(p), df2=float(n - p), p_value=nan)


def hotelling_one_sample(x: object, mu0: object = None) -> HotellingResult:
    """Test whether the mean vector of a multivariate sample equals ``mu0``.

    Parameters
    ----------
    x : (n, p) array-like, float
        One observation per row (for reader bias: residual vectors in world
        mm, RAS+, so p = 3). Rows with any NaN are dropped.
    mu0 : (p,) array-like, float, optional
        Hypothesised mean in the same units and frame as ``x``; zeros when None.

    Returns
    -------
    HotellingResult
        t2, f, df1, df2, p_value. All statistics are NaN (no exception) when
        n <= p after dropping NaN rows, or when the sample covariance is
        singular (for example all points on a plane).

    Notes
    -----
    With sample mean xbar and sample covariance S (denominator n - 1),
    T2 = n (xbar - mu0)' S^-1 (xbar - mu0). Under multivariate normality and
    the null hypothesis, (n - p) / (p (n - 1)) T2 follows an F distribution
    with p and n - p degrees of freedom. Assumes independent observations;
    residuals from one reader on different cases usually are.

    References
    ----------
    1. Hotelling H. The generalization of Student's ratio. Ann Math Stat
       1931;2(3):360-378. doi:10.1214/aoms/1177732979
    2. Johnson RA, Wichern DW. Applied Multivariate Statistical Analysis, 6th ed.
       Upper Saddle River: Pearson; 2007. Section 5.2 (from memory).
    """
    try:
        arr = np.asarray(x, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise HotellingInputError(f"x must be a numeric (n, p) array, got {x!r}") from exc
    if arr.ndim != 2 or arr.shape[1] < 1:
        raise HotellingInputError(f"x must have shape (n, p) with p >= 1, got {arr.shape}")
    if np.isinf(arr).any():
        raise HotellingInputError("x must be finite or NaN, got an infinite value")
    p = arr.shape[1]
    if mu0 is None:
        mu = np.zeros(p)
    else:
        mu = np.asarray(mu0, dtype=np.float64)
        if mu.shape != (p,) or not np.isfinite(mu).all():
            raise HotellingInputError(f"mu0 must be {p} finite numbers, got {mu0!r}")
    arr = arr[~np.isnan(arr).any(axis=1)]
    n = arr.shape[0]
    if n <= p:
        return _nan_result(p, n)
    diff = arr.mean(axis=0) - mu
    cov = np.atleast_2d(np.cov(arr, rowvar=False, ddof=1))
    eigen = np.linalg.eigvalsh(cov)  # symmetric: cheaper than a rank by SVD
    if eigen[0] <= eigen[-1] * p * np.finfo(np.float64).eps:
        return _nan_result(p, n)
    t2 = float(n * diff @ np.linalg.solve(cov, diff))
    f = (n - p) / (p * (n - 1)) * t2
    p_value = float(special.fdtrc(p, n - p, f))  # F upper tail, as scipy.stats.f.sf
    return HotellingResult(t2=t2, f=float(f), df1=float(p), df2=float(n - p), p_value=p_value)
