"""Per-placement quantities behind the figures, computed with the analysis core.

The stored result tables hold summaries; the figures need the values they summarise:
every inter-reader distance, every pair of readers' coordinates, every first/repeat pair,
each reader's standardised error in time order, each rater's radial errors. They are
recomputed here from the long placements table (see :mod:`studies.analysis.table`) with
the same core functions the pipeline uses, so they agree with the stored tables.
All coordinates are world mm, RAS+.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..analysis.agreement import pairwise_distances_mm
from ..analysis.consensus import ConsensusEstimate, estimate_consensus, leave_one_out_centres
from ..analysis.readers import NS_PER_WEEK, standardised_distances
from ..analysis.scoring import dense_predictions, validate_predictions
from ..analysis.table import DenseStudy, to_dense, validate_placements
from ..analysis.trend import CusumResult, SlopeResult, cusum, ols_slope

__all__ = [
    "AXES",
    "Derived",
    "ErrorSeries",
    "Limits",
    "ReportingInputError",
    "derive",
    "detector_errors",
    "error_series",
    "limits_of_agreement",
    "pairwise_long",
    "points_at",
    "reader_errors",
    "reader_pair_differences",
    "repeat_differences",
]

AXES = ("x", "y", "z")


class ReportingInputError(ValueError):
    """A reader, case, landmark or value that the figures cannot use; the message quotes it."""


@dataclass(frozen=True)
class Limits:
    """Bland-Altman summary of one set of differences.

    Attributes
    ----------
    n : int
        Differences used (NaN dropped).
    bias : float
        Mean difference.
    sd : float
        SD of the differences (n - 1 denominator).
    low, high : float
        bias - z sd and bias + z sd, the limits of agreement.
    """

    n: int
    bias: float
    sd: float
    low: float
    high: float


def limits_of_agreement(differences: object, z: float = 1.96) -> Limits:
    """Mean difference and limits of agreement of paired measurements.

    Parameters
    ----------
    differences : (n,) array-like, float
        Differences of the pairs (first minus second), any unit; NaNs are dropped.
    z : float, default 1.96
        Multiple of the SD for the limits (1.96 for 95% under normality).

    Returns
    -------
    Limits
        n, bias, sd, low, high; all NaN but n when fewer than 2 differences remain.

    Notes
    -----
    The limits of agreement are the mean difference plus and minus z times the SD of
    the differences; 95% of differences are expected between them when they are
    roughly normal and do not depend on the size of the measurement.

    References
    ----------
    1. Bland JM, Altman DG. Statistical methods for assessing agreement between two
       methods of clinical measurement. Lancet 1986;1(8476):307-310.
    """
    try:
        arr = np.asarray(differences, dtype=np.float64).ravel()
    except (TypeError, ValueError) as exc:
        raise ReportingInputError(f"differences must be numeric, got {differences!r}") from exc
    if not np.isfinite(z) or z <= 0:
        raise ReportingInputError(f"z must be a finite number > 0, got {z!r}")
    arr = arr[np.isfinite(arr)]
    n = int(arr.size)
    if n < 2:
        nan = float("nan")
        return Limits(n, nan, nan, nan, nan)
    bias, sd = float(arr.mean()), float(arr.std(ddof=1))
    return Limits(n, bias, sd, bias - z * sd, bias + z * sd)


@dataclass(frozen=True)
class Derived:
    """A placements table in the core's dense form, with the consensus and distances.

    Attributes
    ----------
    dense : DenseStudy
        Arrays indexed (read, case, landmark, reader).
    estimate : ConsensusEstimate
        Consensus of the first reads (``estimate.centre_mm`` is (n_cases, n_landmarks, 3)).
    loo_mm : (n_cases, n_landmarks, n_readers, 3) float64 array
        For each reader, the consensus of the other readers' first reads, world mm.
    distance_mm : (2, n_cases, n_landmarks, n_readers) float64 array
        Distance of each placement (first and repeat reads) to that leave-one-out
        consensus, mm; NaN where either is missing.
    """

    dense: DenseStudy
    estimate: ConsensusEstimate
    loo_mm: np.ndarray
    distance_mm: np.ndarray


def derive(placements: pd.DataFrame, consensus: str = "geomedian") -> Derived:
    """Validate a placements table and compute the consensus and leave-one-out distances.

    Parameters
    ----------
    placements : pandas.DataFrame
        Long placements table, world mm RAS+
        (:func:`studies.analysis.table.validate_placements`).
    consensus : str
        Consensus method, as in the run's parameters.

    Returns
    -------
    Derived
        See the class; the same intermediate values as
        :func:`studies.analysis.pipeline.run_analysis`.
    """
    dense = to_dense(validate_placements(placements))
    pts, placed = dense.points_mm[0], dense.placed[0]
    estimate = estimate_consensus(pts, placed, consensus)
    loo = leave_one_out_centres(pts, placed, estimate)
    all_pts = np.where(dense.placed[..., None], dense.points_mm, np.nan)
    distance = np.sqrt(((all_pts - loo[None]) ** 2).sum(axis=-1))
    return Derived(dense=dense, estimate=estimate, loo_mm=loo, distance_mm=distance)


def pairwise_long(derived: Derived) -> pd.DataFrame:
    """Every inter-reader distance of the first reads, one row per reader pair.

    Returns
    -------
    pandas.DataFrame
        case, landmark, reader_a, reader_b (a before b in sorted order), distance_mm.
    """
    dense = derived.dense
    dist = pairwise_distances_mm(dense.points_mm[0])  # (C, L, R, R)
    n_r = len(dense.readers)
    upper_a, upper_b = np.triu_indices(n_r, k=1)
    pairs = dist[..., upper_a, upper_b]  # (C, L, P)
    c, lm, p = np.nonzero(np.isfinite(pairs))
    return pd.DataFrame({
        "case": dense.cases.to_numpy()[c],
        "landmark": dense.landmarks.to_numpy()[lm],
        "reader_a": dense.readers.to_numpy()[upper_a[p]],
        "reader_b": dense.readers.to_numpy()[upper_b[p]],
        "distance_mm": pairs[c, lm, p],
    })


def _reader_index(dense: DenseStudy, reader: str) -> int:
    names = [str(r) for r in dense.readers]
    if str(reader) not in names:
        raise ReportingInputError(f"no reader {reader!r} in the placements; readers: {names}")
    return names.index(str(reader))


def _paired(first: np.ndarray, second: np.ndarray, dense: DenseStudy) -> pd.DataFrame:
    """Long table of per-axis means and differences where both (C, L, 3) points exist."""
    ok = np.isfinite(first).all(axis=-1) & np.isfinite(second).all(axis=-1)
    c, lm = np.nonzero(ok)
    frames = []
    for a, axis in enumerate(AXES):
        one, two = first[c, lm, a], second[c, lm, a]
        frames.append(pd.DataFrame({
            "case": dense.cases.to_numpy()[c], "landmark": dense.landmarks.to_numpy()[lm],
            "axis": axis, "mean_mm": (one + two) / 2.0, "difference_mm": one - two,
        }))
    return pd.concat(frames, ignore_index=True)


def reader_pair_differences(derived: Derived, reader_a: str, reader_b: str) -> pd.DataFrame:
    """Per-axis Bland-Altman pairs of two readers' first reads (a minus b).

    Returns
    -------
    pandas.DataFrame
        case, landmark, axis ("x", "y", "z"), mean_mm, difference_mm; one row per axis
        of every case and landmark both readers placed.
    """
    dense = derived.dense
    if str(reader_a) == str(reader_b):
        raise ReportingInputError(f"choose two different readers, got {reader_a!r} twice")
    ia, ib = _reader_index(dense, reader_a), _reader_index(dense, reader_b)
    pts = np.where(dense.placed[0][..., None], dense.points_mm[0], np.nan)
    return _paired(pts[:, :, ia], pts[:, :, ib], dense)


def repeat_differences(derived: Derived, reader: str) -> pd.DataFrame:
    """Per-axis Bland-Altman pairs of one reader's first read minus their repeat read.

    Returns
    -------
    pandas.DataFrame
        Same columns as :func:`reader_pair_differences`.
    """
    dense = derived.dense
    r = _reader_index(dense, reader)
    pts = np.where(dense.placed[..., None], dense.points_mm, np.nan)
    return _paired(pts[0, :, :, r], pts[1, :, :, r], dense)


@dataclass(frozen=True)
class ErrorSeries:
    """One reader's standardised errors in time order, their trend and CUSUM.

    Attributes
    ----------
    weeks : (n,) float64 array
        Weeks since the reader's first placement with a time.
    z : (n,) float64 array
        Distance to the leave-one-out consensus, standardised per landmark.
    trend : SlopeResult
        Least-squares line of z on weeks.
    cusum : CusumResult
        Two-sided tabular CUSUM of z (k = 0.5, h = 5, restarting after an alarm).
    h : float
        The CUSUM decision interval.
    """

    weeks: np.ndarray
    z: np.ndarray
    trend: SlopeResult
    cusum: CusumResult
    h: float


def error_series(derived: Derived, reader: str, *, k: float = 0.5, h: float = 5.0
                 ) -> ErrorSeries:
    """A reader's standardised error over time, as the drift table computes it.

    Notes
    -----
    The distances of every placement (first and repeat reads) to the leave-one-out
    consensus are standardised per landmark by the median and 1.4826 MAD
    (:func:`studies.analysis.readers.standardised_distances`), put in placed_at order,
    and fed to the CUSUM with the drift table's k and h, so the alarms are the same.
    """
    dense = derived.dense
    r = _reader_index(dense, reader)
    z_all = standardised_distances(derived.distance_mm)
    t = dense.placed_at_ns[..., r].ravel()
    zz = z_all[..., r].ravel()
    keep = np.isfinite(zz) & (t != np.iinfo(np.int64).min)
    order = np.argsort(t[keep], kind="stable")
    t, zz = t[keep][order], zz[keep][order]
    weeks = (t - t[0]) / NS_PER_WEEK if t.size else t.astype(np.float64)
    return ErrorSeries(weeks=weeks.astype(np.float64), z=zz, trend=ols_slope(weeks, zz),
                       cusum=cusum(zz, k=k, h=h), h=h)


def reader_errors(derived: Derived) -> dict[str, np.ndarray]:
    """Each reader's first-read radial errors against the consensus of the others (mm).

    Returns
    -------
    dict of str to (n,) float64 array
        Reader to the finite distances, as in the detector table's reader rows.
    """
    dist = derived.distance_mm[0]
    return {str(r): dist[..., i][np.isfinite(dist[..., i])]
            for i, r in enumerate(derived.dense.readers)}


def detector_errors(derived: Derived, predictions: pd.DataFrame) -> tuple[str, np.ndarray]:
    """The detector's radial errors against the all-reader consensus (mm).

    Parameters
    ----------
    predictions : pandas.DataFrame
        case, landmark, x_mm, y_mm, z_mm, optional detector (world mm RAS+).

    Returns
    -------
    name : str
        The detector's name.
    errors : (n,) float64 array
        Distances of its points to the consensus, where both exist.
    """
    clean, name = validate_predictions(predictions, derived.dense)
    pred = dense_predictions(clean, derived.dense)
    err = np.sqrt(((pred - derived.estimate.centre_mm) ** 2).sum(axis=-1))
    return name, err[np.isfinite(err)]


def _position(index: pd.Index, value: str, what: str) -> int:
    names = [str(v) for v in index]
    if str(value) not in names:
        raise ReportingInputError(f"no {what} {value!r} in the placements")
    return names.index(str(value))


def points_at(derived: Derived, case: str, landmark: str) -> tuple[pd.DataFrame, np.ndarray]:
    """The readers' points for one case and landmark, and their consensus.

    Returns
    -------
    points : pandas.DataFrame
        reader, read (1 or 2), x_mm, y_mm, z_mm: every placed point, world mm RAS+.
    centre_mm : (3,) float64 array
        The consensus of the first reads (NaN when nobody placed the point).
    """
    dense = derived.dense
    c = _position(dense.cases, case, "case")
    lm = _position(dense.landmarks, landmark, "landmark")
    rows = []
    for k in range(2):
        for r, reader in enumerate(dense.readers):
            if dense.placed[k, c, lm, r]:
                x, y, z = dense.points_mm[k, c, lm, r]
                rows.append({"reader": str(reader), "read": k + 1, "x_mm": x, "y_mm": y,
                             "z_mm": z})
    points = pd.DataFrame(rows, columns=["reader", "read", "x_mm", "y_mm", "z_mm"])
    return points, derived.estimate.centre_mm[c, lm].astype(np.float64)
