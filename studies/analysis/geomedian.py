"""Geometric median (spatial L1 median) by Weiszfeld's iteration, vectorised.

One call solves every case x landmark group of a study at once: a fixed
iteration budget, with a convergence mask so that finished groups drop out
of the work set.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = [
    "WeiszfeldResult",
    "geometric_median",
    "leave_one_out_median",
    "nan_median",
    "polish_median",
    "solve_sym3",
]

_CHUNK_ELEMENTS = 32768
_PASSES = (2, 3, 5, 10**9)  # iterations per pass; the last takes what is left


@dataclass(frozen=True)
class WeiszfeldResult:
    """Result of :func:`geometric_median`.

    Attributes
    ----------
    median_mm : (..., 3) float64 array
        The geometric median of each group (same unit and frame as the input);
        NaN for a group with no valid point.
    n_iter : (...) int64 array
        Iterations used by each group.
    converged : (...) bool array
        True where the last step moved less than the tolerance, or where the
        Vardi-Zhang rule showed that the current data point is the median.
    """

    median_mm: np.ndarray
    n_iter: np.ndarray
    converged: np.ndarray


def nan_median(values: np.ndarray, axis: int) -> np.ndarray:
    """Median along ``axis`` ignoring NaN (NaN where all are NaN); faster than np.nanmedian.

    Parameters
    ----------
    values : float64 array
        Any shape.
    axis : int
        Axis to reduce.

    Returns
    -------
    float64 array
        ``values`` with ``axis`` removed.
    """
    srt = np.sort(values, axis=axis)  # NaN sort to the end
    count = np.isfinite(srt).sum(axis=axis, keepdims=True)
    lo = np.maximum((count - 1) // 2, 0)
    hi = np.maximum(count // 2, 0)
    hi = np.minimum(hi, srt.shape[axis] - 1)
    med = 0.5 * (np.take_along_axis(srt, lo, axis) + np.take_along_axis(srt, hi, axis))
    med = np.where(count > 0, med, np.nan)
    return np.squeeze(med, axis=axis)


def leave_one_out_median(values: np.ndarray) -> np.ndarray:
    """For each element, the median of the other non-NaN elements along the last axis.

    Parameters
    ----------
    values : (..., n) float64 array
        NaN marks a missing value (it is not among the "others" of anyone).

    Returns
    -------
    (..., n) float64 array
        Median of the remaining values; for a NaN element, the median of all
        values; NaN where nothing remains.

    Notes
    -----
    One sort per row: removing the element of rank j shifts the ranks above j
    down by one, so the q-th smallest of the others is sorted[q + (q >= j)].
    """
    values = np.ascontiguousarray(values)
    n = values.shape[-1]
    order = np.argsort(values, axis=-1)  # NaN last
    srt = np.take_along_axis(values, order, axis=-1)
    rank = np.empty_like(order)
    np.put_along_axis(rank, order, np.broadcast_to(np.arange(n), order.shape), axis=-1)
    finite = np.isfinite(values)
    rest = finite.sum(axis=-1, keepdims=True) - finite  # number of others
    j = np.where(finite, rank, n)  # rank of the element left out (n: none)
    lo = np.maximum((rest - 1) // 2, 0)
    hi = rest // 2
    a = np.take_along_axis(srt, np.minimum(lo + (lo >= j), n - 1), axis=-1)
    b = np.take_along_axis(srt, np.minimum(hi + (hi >= j), n - 1), axis=-1)
    return np.where(rest > 0, 0.5 * (a + b), np.nan)


def solve_sym3(h: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Solve H s = v for many symmetric 3x3 matrices H at once, by cofactors.

    Parameters
    ----------
    h : (6, ...) float64 array
        The entries H00, H01, H02, H11, H12, H22.
    v : (3, ...) float64 array
        Right-hand sides.

    Returns
    -------
    s : (3, ...) float64 array
        Solutions (inf/NaN where H is singular).
    det : (...) float64 array
        Determinants of H.
    """
    a, b, c, d, e, f = h
    c00, c01, c02 = d * f - e * e, c * e - b * f, b * e - c * d
    c11, c12, c22 = a * f - c * c, b * c - a * e, a * d - b * b
    det = a * c00 + b * c01 + c * c02
    with np.errstate(invalid="ignore", divide="ignore"):
        s = np.stack([
            c00 * v[0] + c01 * v[1] + c02 * v[2],
            c01 * v[0] + c11 * v[1] + c12 * v[2],
            c02 * v[0] + c12 * v[1] + c22 * v[2],
        ]) / det
    return s, det


def _objective(x: np.ndarray, ok: np.ndarray, y: np.ndarray) -> np.ndarray:
    diff = x - y[:, None, :]
    dist = np.sqrt(diff[0] * diff[0] + diff[1] * diff[1] + diff[2] * diff[2])
    return np.where(ok, dist, 0.0).sum(axis=0)


def _newton_step(
    unit: np.ndarray, inv: np.ndarray, wsum: np.ndarray, pull: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Newton step H^-1 g for the sum of distances, H = sum (I - u u^T) / d.

    unit (3, n, b) unit vectors (0 for unused points), inv (n, b) = 1/d, wsum (b,) = sum inv,
    pull (3, b) = sum of unit vectors. Returns the step (3, b) and det H (b,).
    """
    h = np.stack([
        wsum - (inv * unit[i] * unit[j]).sum(axis=0) if i == j
        else -(inv * unit[i] * unit[j]).sum(axis=0)
        for i, j in ((0, 0), (0, 1), (0, 2), (1, 1), (1, 2), (2, 2))
    ])
    return solve_sym3(h, pull)


def _step(
    x: np.ndarray, ok: np.ndarray, y: np.ndarray, eps: np.ndarray, newton: bool
) -> tuple[np.ndarray, np.ndarray]:
    """One Weiszfeld step with the Vardi-Zhang rule, or a Newton step if it does better.

    x is (3, n, b) with zeros at unused points, ok (n, b), y (3, b), eps (b,).
    Returns the new y (3, b) and a (b,) mask of groups whose y is optimal.
    """
    diff = x - y[:, None, :]
    dist = np.sqrt(diff[0] * diff[0] + diff[1] * diff[1] + diff[2] * diff[2])
    at_point = ok & (dist <= eps)
    live = ok & ~at_point
    inv = np.zeros_like(dist)
    np.divide(1.0, dist, out=inv, where=live)
    wsum = inv.sum(axis=0)
    diff *= inv  # unit vectors u_i from y to the points
    pull = diff.sum(axis=1)  # (3, b): sum of the unit vectors, minus the gradient
    eta = at_point.sum(axis=0).astype(np.float64)
    r = np.sqrt((pull * pull).sum(axis=0))
    with np.errstate(invalid="ignore", divide="ignore"):
        step = pull / wsum  # T(y) - y
        frac = np.where(eta > 0, np.minimum(1.0, eta / r), 0.0)
    frac = np.where(np.isfinite(frac), frac, 1.0)
    new = np.where(wsum > 0, y + (1.0 - frac) * step, y)
    stay = (eta > 0) & (r <= eta)  # optimality at a data point (Vardi & Zhang 2000)
    if newton:
        s, det = _newton_step(diff, inv, wsum, pull)
        trial = y + s
        good = (eta == 0) & (det > 1e-12 * wsum**3) & np.isfinite(trial).all(axis=0)
        if good.any():
            f_now = (dist * ok).sum(axis=0)
            f_trial = _objective(x, ok, np.where(good, trial, y))
            good &= f_trial < f_now
            new = np.where(good, trial, new)
    return new, stay


def _nearest_point_is_median(
    xs: np.ndarray, oks: np.ndarray, ys: np.ndarray, eps: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Vardi-Zhang test at each group's data point nearest to y: (is_median, point)."""
    diff = xs - ys[:, None, :]
    dist = np.where(oks, np.sqrt((diff * diff).sum(axis=0)), np.inf)
    k = dist.argmin(axis=0)
    cols = np.arange(xs.shape[2])
    point = xs[:, k, cols]
    _, stay = _step(xs, oks, point, eps, newton=False)
    return stay, point


def _solve_chunk(
    x: np.ndarray, ok: np.ndarray, y: np.ndarray, max_iter: int, tol_mm: float, newton: bool,
    first: int = 0,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Iterate one chunk of (b, n, 3) groups; returns y (b, 3), n_iter, converged."""
    b = len(y)
    extent = np.abs(x).max(axis=(1, 2)) if x.shape[1] else np.zeros(b)
    eps_all = np.maximum(1e-12 * extent, 1e-12)
    n_iter = np.zeros(b, dtype=np.int64)
    converged = np.zeros(b, dtype=bool)
    y_out = y.copy()
    idx = np.arange(b)
    xs = np.ascontiguousarray(np.transpose(x, (2, 1, 0)))  # (3, n, b)
    oks, ys, eps = np.ascontiguousarray(ok.T), np.ascontiguousarray(y.T), eps_all
    going = np.ones(b, dtype=bool)
    for it in range(first, first + max_iter):
        if not going.any():
            break
        if going.sum() < 0.7 * going.size:  # compact the working set
            y_out[idx] = ys.T
            idx, xs, oks = idx[going], xs[:, :, going], oks[:, going]
            ys, eps = ys[:, going], eps[going]
            going = np.ones(idx.size, dtype=bool)
        if it % 4 == 3:  # a median on a data point is reached only slowly: test for it
            at_point, point = _nearest_point_is_median(xs, oks, ys, eps)
            at_point &= going
            ys = np.where(at_point, point, ys)
            converged[idx[at_point]] = True
            going &= ~at_point
        new, stay = _step(xs, oks, ys, eps, newton)
        move = np.sqrt(((new - ys) ** 2).sum(axis=0))
        ys = np.where(going, new, ys)
        n_iter[idx[going]] += 1
        done = going & (stay | (move < tol_mm))
        converged[idx[done]] = True
        going &= ~done
    y_out[idx] = ys.T
    return y_out, n_iter, converged


def _polish_chunk(x: np.ndarray, ok: np.ndarray, y: np.ndarray, error_mm: float
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """One Newton step for (b, n, 3) groups.

    Returns the new y (b, 3), a mask of groups whose step was small enough to stop (done),
    and a mask of groups where the step was taken but more are needed (going on).
    """
    xs = np.ascontiguousarray(np.transpose(x, (2, 1, 0)))
    oks, ys = np.ascontiguousarray(ok.T), np.ascontiguousarray(y.T)
    diff = xs - ys[:, None, :]
    dist = np.sqrt(diff[0] * diff[0] + diff[1] * diff[1] + diff[2] * diff[2])
    live = oks & (dist > 1e-9)
    inv = np.zeros_like(dist)
    np.divide(1.0, dist, out=inv, where=live)
    wsum = inv.sum(axis=0)
    diff *= inv
    pull = diff.sum(axis=1)
    step, det = _newton_step(diff, inv, wsum, pull)
    length = np.sqrt((step * step).sum(axis=0))
    nearest = np.where(live, dist, np.inf).min(axis=0)
    with np.errstate(invalid="ignore"):
        usable = ((live == oks).all(axis=0) & (det > 1e-12 * wsum**3)
                  & np.isfinite(length) & (nearest >= 2.0 * length))
        done = usable & (length * length <= error_mm * nearest)
    new = np.where(usable, ys + step, ys)
    return new.T, done, usable & ~done


def polish_median(
    points_mm: np.ndarray, init_mm: np.ndarray, *, error_mm: float = 1e-4, tol_mm: float = 1e-4,
    newton_steps: int = 3,
) -> np.ndarray:
    """Geometric medians from good starting points: one Newton step, exact solve where unsafe.

    Parameters
    ----------
    points_mm : (..., n, 3) float64 array
        Groups of points, world mm; NaN rows are ignored.
    init_mm : (..., 3) float64 array
        Starting points close to the medians (e.g. a one-step update of a related median).
    error_mm : float, default 1e-4
        A group stops once the estimated error left after its Newton step is below this (mm).
    tol_mm : float, default 1e-4
        Tolerance of :func:`geometric_median` for the groups that are iterated.
    newton_steps : int, default 3
        Plain Newton steps tried before a group is handed to the safeguarded solver.

    Returns
    -------
    (..., 3) float64 array
        The medians.

    Notes
    -----
    Near its minimum the sum of distances is smooth on a ball whose radius is the
    distance d_min to the nearest data point, and a Newton step of length s
    leaves an error of order s^2 / d_min. Up to ``newton_steps`` plain Newton
    steps are taken (each only if it stays within d_min / 2); a group stops when
    s^2 <= error_mm * d_min. All other groups (a data point
    close by, two or fewer points, a singular Hessian, no convergence) are solved
    with :func:`geometric_median` from where they are.
    """
    pts = np.asarray(points_mm, dtype=np.float64)
    batch, n = pts.shape[:-2], pts.shape[-2]
    if n == 0 or pts.size == 0:
        return np.full((*batch, 3), np.nan)
    ok = np.isfinite(pts).all(axis=-1).reshape(-1, n)
    x = np.where(ok[..., None], pts.reshape(-1, n, 3), 0.0)
    y = np.array(init_mm, dtype=np.float64).reshape(-1, 3)
    safe = np.zeros(len(y), dtype=bool)
    todo = np.flatnonzero(ok.any(axis=1))
    chunk = max(256, _CHUNK_ELEMENTS // n)
    for _ in range(newton_steps):
        going = np.zeros(todo.size, dtype=bool)
        for start in range(0, todo.size, chunk):
            idx = todo[start:start + chunk]
            y[idx], done, more = _polish_chunk(x[idx], ok[idx], y[idx], error_mm)
            safe[idx] = done
            going[start:start + chunk] = more
        todo = todo[going]
        if todo.size == 0:
            break
    rest = np.flatnonzero(~safe & ok.any(axis=1))
    if rest.size:
        y[rest] = geometric_median(np.where(ok[rest, :, None], x[rest], np.nan),
                                   init_mm=y[rest], tol_mm=tol_mm).median_mm
    y[~ok.any(axis=1)] = np.nan
    return y.reshape(*batch, 3)


def geometric_median(
    points_mm: np.ndarray,
    valid: np.ndarray | None = None,
    init_mm: np.ndarray | None = None,
    *,
    max_iter: int = 200,
    tol_mm: float = 1e-9,
    newton: bool = True,
) -> WeiszfeldResult:
    """Geometric median of many small point sets at once.

    Parameters
    ----------
    points_mm : (..., n, 3) float64 array
        Groups of n points, world mm (RAS+, though any frame works: the median
        is equivariant under rigid motions). NaN rows are ignored.
    valid : (..., n) bool array, optional
        Points to use; default every point whose coordinates are finite.
    init_mm : (..., 3) float64 array, optional
        Starting points; default the coordinate-wise median of each group.
    max_iter : int, default 200
        Iteration budget per group (every fourth iteration also tests whether
        the nearest data point is the median).
    tol_mm : float, default 1e-9
        A group has converged when a step moves it less than this (mm).
    newton : bool, default True
        Try a Newton step on the sum of distances at every iteration and take it
        when it lowers the sum more than nothing (safeguarded acceleration).

    Returns
    -------
    WeiszfeldResult
        median_mm, n_iter, converged.

    Notes
    -----
    The geometric median minimises the sum of Euclidean distances to the
    points. Weiszfeld's map replaces y with the average of the points weighted
    by 1 / ||x_i - y||. When y sits on eta data points, the Vardi-Zhang rule
    applies: with r the norm of the sum of unit vectors from y to the other
    points, y is the median if r <= eta; otherwise
    y <- (1 - eta/r) T(y) + (eta/r) y, where T(y) is the Weiszfeld map over the
    other points. This makes the iteration converge from any start, also when
    the median is a data point. To speed up the linear convergence of the plain
    map, each iteration also tries a Newton step y + H^-1 g, with g the sum of
    unit vectors from y to the points and H = sum_i (I - u_i u_i^T) / ||x_i - y||
    the Hessian of the sum of distances; it replaces the Weiszfeld step only
    where it lowers the sum of distances below its current value, so every
    iteration is a descent step and the Vardi-Zhang rule still decides at a data
    point. A point counts as coinciding with y when it is
    within ``1e-12`` times the group's extent (or 1e-12 mm).

    References
    ----------
    1. Weiszfeld E. Sur le point pour lequel la somme des distances de n points
       donnes est minimum. Tohoku Math J 1937;43:355-386 (from memory).
    2. Weiszfeld E, Plastria F. On the point for which the sum of the distances
       to n given points is minimum. Ann Oper Res 2009;167:7-41.
       doi:10.1007/s10479-008-0352-z (DOI from memory)
    3. Vardi Y, Zhang C-H. The multivariate L1-median and associated data depth.
       PNAS 2000;97(4):1423-1426. doi:10.1073/pnas.97.4.1423
    """
    pts = np.asarray(points_mm, dtype=np.float64)
    if pts.ndim < 2 or pts.shape[-1] != 3:
        raise ValueError(f"points_mm must have shape (..., n, 3), got {pts.shape!r}")
    batch, n = pts.shape[:-2], pts.shape[-2]
    if n == 0 or pts.size == 0:  # no points at all: nothing to solve
        return WeiszfeldResult(np.full((*batch, 3), np.nan), np.zeros(batch, dtype=np.int64),
                               np.ones(batch, dtype=bool))
    ok = np.isfinite(pts).all(axis=-1)
    if valid is not None:
        ok &= np.asarray(valid, dtype=bool)
    x = np.where(ok[..., None], pts, np.nan).reshape(-1, n, 3)
    ok = ok.reshape(-1, n)
    if init_mm is None:
        y = nan_median(x, axis=1)
    else:
        y = np.array(init_mm, dtype=np.float64).reshape(-1, 3)
        if y.shape != (len(x), 3):
            raise ValueError(f"init_mm must have shape {(*batch, 3)!r}, got {init_mm.shape!r}")
        bad_init = ~np.isfinite(y).all(axis=1)
        y[bad_init] = nan_median(x[bad_init], axis=1)
    empty = ~ok.any(axis=1)
    y[empty] = np.nan
    x = np.where(ok[..., None], x, 0.0)
    n_iter = np.zeros(len(y), dtype=np.int64)
    converged = empty.copy()
    todo = np.flatnonzero(~empty)
    chunk = max(256, _CHUNK_ELEMENTS // max(n, 1))  # keep the work arrays in cache
    left = max_iter
    for budget in _PASSES:  # regroup the unfinished groups between passes
        budget = min(budget, left)
        for start in range(0, todo.size, chunk):
            idx = todo[start:start + chunk]
            y[idx], it, converged[idx] = _solve_chunk(
                x[idx], ok[idx], y[idx], budget, tol_mm, newton, first=int(n_iter[idx[0]]))
            n_iter[idx] += it
        todo = np.flatnonzero(~converged)
        left -= budget
        if todo.size == 0 or left <= 0:
            break
    return WeiszfeldResult(y.reshape(*batch, 3), n_iter.reshape(batch), converged.reshape(batch))
