"""Trend and drift statistics for one series in time order.

Three tools used by the reader-drift table: the Mann-Kendall trend test, a
tabular CUSUM on standardised values, and an ordinary least-squares slope with
a t-based confidence interval. All take plain arrays; nothing here knows about
readers, cases or landmarks.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import special

__all__ = [
    "CusumResult",
    "MannKendallResult",
    "SlopeResult",
    "TrendInputError",
    "cusum",
    "mann_kendall",
    "ols_slope",
]


class TrendInputError(ValueError):
    """Raised when a series or a parameter cannot be used; the message quotes it."""


@dataclass(frozen=True)
class MannKendallResult:
    """Mann-Kendall trend test on one series.

    Attributes
    ----------
    s : float
        Kendall's S = sum over i < j of sign(x_j - x_i).
    var_s : float
        Variance of S under no trend, with the tie correction.
    z : float
        Normal score with the continuity correction: (S - 1)/sqrt(var_s) for S > 0,
        (S + 1)/sqrt(var_s) for S < 0, 0 for S = 0.
    p : float
        Two-sided p-value from the standard normal distribution.
    tau : float
        Kendall's tau-a = S / (n (n - 1) / 2).
    """

    s: float
    var_s: float
    z: float
    p: float
    tau: float


@dataclass(frozen=True)
class CusumResult:
    """Two-sided tabular CUSUM of a standardised series.

    Attributes
    ----------
    upper : (n,) ndarray, float64
        Upper sums C+_i (in units of the standardised series).
    lower : (n,) ndarray, float64
        Lower sums C-_i, reported as non-negative numbers.
    alarm_index : (m,) ndarray, int64
        0-based indices of the observations at which C+ or C- exceeded h.
    first_alarm : int or None
        The first entry of ``alarm_index``, or None when there was no alarm.
    n_alarms : int
        ``len(alarm_index)``.
    """

    upper: np.ndarray
    lower: np.ndarray
    alarm_index: np.ndarray
    first_alarm: int | None
    n_alarms: int


@dataclass(frozen=True)
class SlopeResult:
    """Least-squares straight line y = intercept + slope * t.

    Attributes
    ----------
    slope : float
        Units of y per unit of t (for drift: mm per week).
    intercept : float
        Fitted y at t = 0.
    ci_low, ci_high : float
        Two-sided (1 - alpha) confidence interval of the slope, t distribution
        with n - 2 degrees of freedom; NaN when n < 3.
    n : int
        Number of (t, y) pairs used (pairs with a NaN are dropped).
    """

    slope: float
    intercept: float
    ci_low: float
    ci_high: float
    n: int


def _as_series(x: object, name: str) -> np.ndarray:
    try:
        arr = np.asarray(x, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise TrendInputError(f"{name} must be numeric, got {x!r}") from exc
    if arr.ndim != 1:
        raise TrendInputError(f"{name} must be one-dimensional, got shape {arr.shape}")
    if np.isinf(arr).any():
        raise TrendInputError(f"{name} must be finite or NaN, got {arr[np.isinf(arr)][:3]!r}")
    return arr


def _kendall_s(arr: np.ndarray) -> float:
    """S = sum over i < j of sign(x_j - x_i), in row blocks of at most ~4 million pairs."""
    n = arr.size
    block = max(1, 4_000_000 // n)
    total = 0.0
    for start in range(0, n, block):
        rows = np.arange(start, min(n, start + block))
        signs = np.sign(arr[None, :] - arr[rows, None])
        total += float(np.sum(np.where(np.arange(n)[None, :] > rows[:, None], signs, 0.0)))
    return total


def mann_kendall(x: object) -> MannKendallResult:
    """Mann-Kendall test for a monotonic trend in a series taken in time order.

    Parameters
    ----------
    x : (n,) array-like, float
        Values in time order (any unit). NaNs are dropped before the test.

    Returns
    -------
    MannKendallResult
        s, var_s, z, p, tau (all NaN when fewer than 3 values remain).

    Notes
    -----
    S is the number of later-minus-earlier pairs that go up minus those that go
    down. Under no trend, with tie groups of sizes t (values that are exactly
    equal), Var(S) = [n(n-1)(2n+5) - sum t(t-1)(2t+5)] / 18. The normal score
    moves S one unit towards zero before dividing by sqrt(Var(S)) (continuity
    correction), and p = 2 (1 - Phi(|z|)). When every value is equal, S = 0,
    z = 0 and p = 1. Tau is tau-a, S over the number of pairs, so it differs
    from scipy's tau-b when there are ties. S takes O(n^2) time, computed in
    blocks so memory stays bounded (n = 10,000 takes about a second).

    References
    ----------
    1. Mann HB. Nonparametric tests against trend. Econometrica 1945;13(3):245-259.
       doi:10.2307/1907187 (from memory).
    2. Kendall MG. Rank Correlation Methods, 4th ed. London: Griffin; 1975.
    3. Gilbert RO. Statistical Methods for Environmental Pollution Monitoring.
       New York: Van Nostrand Reinhold; 1987. (Tie-corrected variance.)
    """
    arr = _as_series(x, "x")
    arr = arr[~np.isnan(arr)]
    n = arr.size
    if n < 3:
        nan = float("nan")
        return MannKendallResult(s=nan, var_s=nan, z=nan, p=nan, tau=nan)
    s = _kendall_s(arr)
    _, counts = np.unique(arr, return_counts=True)
    ties = counts[counts > 1].astype(np.float64)
    var_s = (n * (n - 1) * (2 * n + 5) - np.sum(ties * (ties - 1) * (2 * ties + 5))) / 18.0
    if s == 0 or var_s <= 0:
        z = 0.0
    else:
        z = (s - np.sign(s)) / np.sqrt(var_s)
    p = float(2.0 * special.ndtr(-abs(z)))  # two-sided normal tail
    tau = s / (n * (n - 1) / 2.0)
    return MannKendallResult(s=s, var_s=float(var_s), z=float(z), p=p, tau=float(tau))


def cusum(z: object, k: float = 0.5, h: float = 5.0, *, restart: bool = True) -> CusumResult:
    """Two-sided tabular CUSUM on a standardised series.

    Parameters
    ----------
    z : (n,) array-like, float
        Standardised values in time order, (x - target) / sigma, so the
        in-control mean is 0 and SD 1. NaNs are skipped: the sums carry over
        unchanged and no alarm is raised there.
    k : float, default 0.5
        Reference value (allowance) in SD units; 0.5 is tuned to detect a
        one-SD shift (common practice).
    h : float, default 5.0
        Decision interval in SD units. An alarm is raised when C+ or C-
        is strictly greater than h.
    restart : bool, default True
        After an alarm, reset both sums to 0 so the next alarm is a new
        episode (common practice when the process is checked and continued).
        With False the sums run on, every observation above h is an alarm, and
        the output is the textbook table of a chart that is never reset.

    Returns
    -------
    CusumResult
        upper, lower, alarm_index, first_alarm, n_alarms. ``upper`` and
        ``lower`` hold the sums as computed at each observation, before any
        reset, so an alarm is visible in them.

    Notes
    -----
    C+_i = max(0, z_i - k + C+_{i-1}) and C-_i = max(0, -k - z_i + C-_{i-1}),
    both starting at 0. With restart, n_alarms counts separate signals; an
    in-control series of standardised normal values gives an average run
    length of about 465 observations between signals for k = 0.5, h = 5.

    References
    ----------
    1. Page ES. Continuous inspection schemes. Biometrika 1954;41(1-2):100-115.
       doi:10.1093/biomet/41.1-2.100
    2. Montgomery DC. Introduction to Statistical Quality Control, 6th ed.
       Hoboken: Wiley; 2009. Chapter 9, Example 9.1 (edition from memory).
    """
    arr = _as_series(z, "z")
    for name, value in (("k", k), ("h", h)):
        if not np.isfinite(value) or value < 0:
            raise TrendInputError(f"{name} must be a finite number >= 0, got {value!r}")
    n = arr.size
    upper = np.zeros(n)
    lower = np.zeros(n)
    alarms: list[int] = []
    c_plus = 0.0
    c_minus = 0.0
    for i, value in enumerate(arr.tolist()):
        if not math.isnan(value):
            c_plus = max(0.0, value - k + c_plus)
            c_minus = max(0.0, -k - value + c_minus)
            if c_plus > h or c_minus > h:
                alarms.append(i)
        upper[i] = c_plus
        lower[i] = c_minus
        if restart and alarms and alarms[-1] == i:
            c_plus = 0.0
            c_minus = 0.0
    alarm_index = np.asarray(alarms, dtype=np.int64)
    return CusumResult(
        upper=upper,
        lower=lower,
        alarm_index=alarm_index,
        first_alarm=int(alarm_index[0]) if alarm_index.size else None,
        n_alarms=int(alarm_index.size),
    )


def ols_slope(t: object, y: object, alpha: float = 0.05) -> SlopeResult:
    """Least-squares slope of y against t with a t-based confidence interval.

    Parameters
    ----------
    t : (n,) array-like, float
        Times (for drift: weeks since the reader's first read).
    y : (n,) array-like, float
        Values (for drift: distance to the leave-one-out consensus, mm).
    alpha : float, default 0.05
        1 - confidence level of the interval.

    Returns
    -------
    SlopeResult
        slope, intercept, ci_low, ci_high, n. Slope and intercept are NaN when
        fewer than 2 pairs remain or all t are equal; the interval is NaN when
        fewer than 3 remain.

    Notes
    -----
    slope = sum (t - mean t)(y - mean y) / sum (t - mean t)^2, intercept =
    mean y - slope * mean t. The residual variance s^2 = RSS / (n - 2) gives
    SE(slope) = s / sqrt(sum (t - mean t)^2), and the interval is slope plus or
    minus the 1 - alpha/2 quantile of Student's t with n - 2 degrees of freedom
    times SE. Assumes independent errors of constant variance. Pairs where
    either value is NaN are dropped.

    References
    ----------
    1. Draper NR, Smith H. Applied Regression Analysis, 3rd ed. New York: Wiley;
       1998. Chapter 1 (from memory).
    """
    t_arr = _as_series(t, "t")
    y_arr = _as_series(y, "y")
    if t_arr.shape != y_arr.shape:
        raise TrendInputError(
            f"t and y must have the same length, got {t_arr.size} and {y_arr.size}"
        )
    if not 0.0 < alpha < 1.0:
        raise TrendInputError(f"alpha must lie strictly between 0 and 1, got {alpha!r}")
    keep = ~(np.isnan(t_arr) | np.isnan(y_arr))
    t_arr, y_arr = t_arr[keep], y_arr[keep]
    n = int(t_arr.size)
    nan = float("nan")
    t_c = t_arr - t_arr.mean() if n else t_arr
    sxx = float(np.sum(t_c**2))
    if n < 2 or sxx <= 0.0:
        return SlopeResult(slope=nan, intercept=nan, ci_low=nan, ci_high=nan, n=n)
    slope = float(np.sum(t_c * (y_arr - y_arr.mean())) / sxx)
    intercept = float(y_arr.mean() - slope * t_arr.mean())
    if n < 3:
        return SlopeResult(slope=slope, intercept=intercept, ci_low=nan, ci_high=nan, n=n)
    resid = y_arr - (intercept + slope * t_arr)
    se = float(np.sqrt(np.sum(resid**2) / (n - 2) / sxx))
    half = float(special.stdtrit(n - 2, 1.0 - alpha / 2.0)) * se  # Student t quantile
    return SlopeResult(
        slope=slope, intercept=intercept, ci_low=slope - half, ci_high=slope + half, n=n
    )
