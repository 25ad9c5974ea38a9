"""A seeded, simulated multi-reader landmark study with known truth.

Each invented reader places each landmark at the true point plus an isotropic
Gaussian error, a fixed bias, a bias that grows with time (drift), the odd
gross error and the odd landmark wrongly marked not visible. The output has
the same long format as the placements the analysis reads, so the statistics
can be checked against known values and the demo has data to show. All
coordinates are world mm, RAS+.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from studies.analysis.planning import repeats_for

__all__ = [
    "PLACEMENT_COLUMNS",
    "ReaderModel",
    "SimulatedStudy",
    "SimulationInputError",
    "predictions_from",
    "simulate_study",
]

PLACEMENT_COLUMNS = [
    "case", "landmark", "reader", "read", "x_mm", "y_mm", "z_mm", "absent", "placed_at",
]  # fmt: skip
WASHOUT_DAYS = 14.0
SECONDS_PER_LANDMARK = 30.0
HEAD_BOX_MM = np.array([[-70.0, 70.0], [-90.0, 90.0], [-60.0, 80.0]])  # R, A, S extents


class SimulationInputError(ValueError):
    """Raised when a simulation parameter is out of range; the message quotes it."""


def _vector3(name: str, value: object) -> np.ndarray:
    try:
        arr = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise SimulationInputError(f"{name} must be 3 finite numbers (mm), got {value!r}") from exc
    if arr.shape != (3,) or not np.isfinite(arr).all():
        raise SimulationInputError(f"{name} must be 3 finite numbers (mm), got {value!r}")
    return arr


def _rate(name: str, value: float) -> float:
    if not 0.0 <= value <= 1.0:
        raise SimulationInputError(f"{name} must lie in [0, 1], got {value!r}")
    return float(value)


@dataclass(frozen=True)
class ReaderModel:
    """How one simulated reader errs.

    Attributes
    ----------
    name : str
        Reader name, unique within a study.
    sd_mm : float, mm
        Per-axis SD of the isotropic Gaussian placement error.
    bias_mm : (3,) array-like, float, mm
        Constant offset (world mm, RAS+) added to every placement; stored as a tuple.
    drift_mm_per_week : (3,) array-like, float, mm per week
        Offset added per week since the start of the study (bias grows linearly).
    absent_rate : float
        Probability of wrongly marking a visible landmark not visible.
    outlier_rate : float
        Probability that a placement is a gross error.
    outlier_mm : float, mm
        Length of a gross error, added in a uniformly random direction.
    """

    name: str
    sd_mm: float = 1.0
    bias_mm: tuple[float, float, float] = (0.0, 0.0, 0.0)
    drift_mm_per_week: tuple[float, float, float] = (0.0, 0.0, 0.0)
    absent_rate: float = 0.0
    outlier_rate: float = 0.0
    outlier_mm: float = 15.0

    def __post_init__(self) -> None:
        if not isinstance(self.name, str) or not self.name:
            raise SimulationInputError(f"name must be a non-empty string, got {self.name!r}")
        for name in ("sd_mm", "outlier_mm"):
            value = getattr(self, name)
            if not np.isfinite(value) or value < 0:
                raise SimulationInputError(f"{name} must be a finite number >= 0, got {value!r}")
        # Stored as tuples of float so models compare and hash by value.
        bias = tuple(_vector3("bias_mm", self.bias_mm).tolist())
        drift = tuple(_vector3("drift_mm_per_week", self.drift_mm_per_week).tolist())
        object.__setattr__(self, "bias_mm", bias)
        object.__setattr__(self, "drift_mm_per_week", drift)
        _rate("absent_rate", self.absent_rate)
        _rate("outlier_rate", self.outlier_rate)


@dataclass(frozen=True)
class SimulatedStudy:
    """A simulated study.

    Attributes
    ----------
    placements : DataFrame
        One row per read and landmark: case (str, "case-0001"), landmark (str, "L01"),
        reader (str), read (int, 1 first, 2 repeat), x_mm, y_mm, z_mm (float, world mm
        RAS+, NaN when absent), absent (int, 1 marked not visible), placed_at (str,
        ISO 8601 UTC ending in "Z").
    truth : DataFrame
        case, landmark, x_mm, y_mm, z_mm (true point, world mm RAS+), present (bool).
    readers : list of ReaderModel
        The reader models, in the order given.
    """

    placements: pd.DataFrame
    truth: pd.DataFrame
    readers: list[ReaderModel]


def _truth_points(
    rng: np.random.Generator, n_cases: int, n_landmarks: int, truth: np.ndarray | None
) -> np.ndarray:
    if truth is not None:
        arr = np.asarray(truth, dtype=np.float64)
        if arr.shape != (n_cases, n_landmarks, 3) or not np.isfinite(arr).all():
            raise SimulationInputError(
                f"truth must be finite with shape {(n_cases, n_landmarks, 3)}, got {arr.shape}"
            )
        return arr
    template = rng.uniform(HEAD_BOX_MM[:, 0], HEAD_BOX_MM[:, 1], size=(n_landmarks, 3))
    offset = rng.normal(0.0, 5.0, size=(n_cases, 1, 3))
    return template + offset + rng.normal(0.0, 3.0, size=(n_cases, n_landmarks, 3))


def _assign(rng: np.random.Generator, n_cases: int, n_readers: int, per_case: int) -> np.ndarray:
    """(n_cases, per_case) reader indices; balanced: counts differ by at most one."""
    case_order = rng.permutation(n_cases)
    reader_order = rng.permutation(n_readers)
    slots = (np.arange(n_cases)[:, None] * per_case + np.arange(per_case)) % n_readers
    assigned = np.empty((n_cases, per_case), dtype=np.int64)
    assigned[case_order] = reader_order[slots]
    return assigned


def _reads(
    rng: np.random.Generator,
    assigned: np.ndarray,
    n_readers: int,
    repeat_fraction: float,
    span_days: float,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Case, reader, read number and start time (days) of every read."""
    per_case = assigned.shape[1]
    case = np.repeat(np.arange(assigned.shape[0]), per_case)
    reader = assigned.ravel()
    first_span = span_days - WASHOUT_DAYS if repeat_fraction > 0 and span_days > 28 else span_days
    start = rng.uniform(0.0, first_span, size=case.size)
    repeat_rows = []
    for r in range(n_readers):
        mine = np.flatnonzero(reader == r)
        n_repeat = repeats_for(mine.size, repeat_fraction)
        repeat_rows.append(rng.choice(mine, size=n_repeat, replace=False))
    rep = np.concatenate(repeat_rows).astype(np.int64)
    room = np.maximum(span_days - start[rep] - WASHOUT_DAYS, 0.0)
    rep_start = start[rep] + WASHOUT_DAYS + rng.uniform(0.0, 1.0, size=rep.size) * room
    return (
        np.concatenate([case, case[rep]]),
        np.concatenate([reader, reader[rep]]),
        np.concatenate([np.ones(case.size, np.int64), np.full(rep.size, 2, np.int64)]),
        np.concatenate([start, rep_start]),
    )


def _errors(
    rng: np.random.Generator, readers: list[ReaderModel], reader: np.ndarray, weeks: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """(m, 3) placement errors (mm) and (m,) wrongly-absent flags for placement rows."""
    sd = np.array([r.sd_mm for r in readers])[reader]
    bias = np.stack([r.bias_mm for r in readers])[reader]
    drift = np.stack([r.drift_mm_per_week for r in readers])[reader]
    error = rng.standard_normal((reader.size, 3)) * sd[:, None] + bias + drift * weeks[:, None]
    outlier_rate = np.array([r.outlier_rate for r in readers])[reader]
    outlier = rng.random(reader.size) < outlier_rate
    direction = rng.standard_normal((reader.size, 3))
    direction /= np.linalg.norm(direction, axis=1, keepdims=True)
    length = np.array([r.outlier_mm for r in readers])[reader]
    error += np.where(outlier[:, None], direction * length[:, None], 0.0)
    absent_rate = np.array([r.absent_rate for r in readers])[reader]
    return error, rng.random(reader.size) < absent_rate


def _check_study_args(
    n_cases: int, n_landmarks: int, readers: list[ReaderModel], per_case: int, weeks: float
) -> None:
    for name, value in (("n_cases", n_cases), ("n_landmarks", n_landmarks)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
            raise SimulationInputError(f"{name} must be an integer >= 1, got {value!r}")
    if not readers or not all(isinstance(r, ReaderModel) for r in readers):
        raise SimulationInputError(
            f"readers must be a non-empty list of ReaderModel, got {readers!r}"
        )
    names = [r.name for r in readers]
    if len(set(names)) != len(names):
        raise SimulationInputError(f"reader names must be unique, got {names!r}")
    if not 1 <= per_case <= len(readers):
        raise SimulationInputError(
            f"readers_per_case must lie in [1, {len(readers)}], got {per_case!r}"
        )
    if not np.isfinite(weeks) or weeks <= 0:
        raise SimulationInputError(f"weeks must be a finite number > 0, got {weeks!r}")


def _utc_start(start: str) -> np.datetime64:
    try:
        stamp = pd.Timestamp(start)
    except (TypeError, ValueError) as exc:
        raise SimulationInputError(f"start must be an ISO 8601 time, got {start!r}") from exc
    if stamp.tzinfo is None:
        raise SimulationInputError(f"start must carry a time zone (e.g. 'Z'), got {start!r}")
    return np.datetime64(stamp.tz_convert("UTC").tz_localize(None).as_unit("s"), "s")


def _ids(prefix: str, n: int, width: int) -> np.ndarray:
    return np.array([f"{prefix}{i + 1:0{width}d}" for i in range(n)], dtype=object)


def _truth_frame(points: np.ndarray, present: np.ndarray) -> pd.DataFrame:
    n_cases, n_landmarks, _ = points.shape
    flat = points.reshape(-1, 3)
    return pd.DataFrame(
        {
            "case": np.repeat(_ids("case-", n_cases, 4), n_landmarks),
            "landmark": np.tile(_ids("L", n_landmarks, 2), n_cases),
            "x_mm": flat[:, 0],
            "y_mm": flat[:, 1],
            "z_mm": flat[:, 2],
            "present": present.ravel(),
        }
    )


def simulate_study(
    n_cases: int,
    n_landmarks: int,
    readers: list[ReaderModel],
    *,
    repeat_fraction: float = 0.0,
    readers_per_case: int | None = None,
    truly_absent_rate: float = 0.0,
    weeks: float = 8.0,
    start: str = "2026-01-05T08:00:00Z",
    seed: int = 0,
    truth: np.ndarray | None = None,
) -> SimulatedStudy:
    """Simulate a multi-reader landmark study with known true points.

    Parameters
    ----------
    n_cases, n_landmarks : int
        Size of the study.
    readers : list of ReaderModel
        The readers and how each errs.
    repeat_fraction : float, default 0.0
        Fraction of each reader's cases read again (rounded half up, as in
        `studies.analysis.planning.repeats_for`).
    readers_per_case : int or None, default None
        Readers per case; None means every reader reads every case. Otherwise a
        balanced random assignment (reader workloads differ by at most one case).
    truly_absent_rate : float, default 0.0
        Probability that a landmark is truly not visible on a case; every reader
        then marks it not visible.
    weeks : float, default 8.0
        Length of the reading period. First reads start uniformly over it (over all
        but the last 14 days when there are repeats and the period is over 28 days);
        each repeat starts at least 14 days after its first read, inside the period
        when there is room.
    start : str, default "2026-01-05T08:00:00Z"
        ISO 8601 start of the period, with a time zone.
    seed : int, default 0
        Seed of the numpy Generator; the same arguments give the same study.
    truth : (n_cases, n_landmarks, 3) ndarray, float, world mm RAS+, optional
        True points; by default a random landmark layout in a head-sized box
        (140 x 180 x 140 mm), shifted by N(0, 5 mm) per case and N(0, 3 mm) per point.

    Returns
    -------
    SimulatedStudy
        placements, truth, readers (see `SimulatedStudy`).

    Notes
    -----
    A placement is truth + N(0, sd^2 I) + bias + drift * t, with t the weeks from
    ``start`` to the read; with probability outlier_rate a vector of length
    outlier_mm in a uniform random direction is added. A visible landmark is
    marked not visible with probability absent_rate. Landmarks of one read are
    placed 30 s apart. Rows are ordered by case, reader, read and landmark.
    """
    per_case = len(readers) if readers_per_case is None else readers_per_case
    _check_study_args(n_cases, n_landmarks, readers, per_case, weeks)
    _rate("repeat_fraction", repeat_fraction)
    _rate("truly_absent_rate", truly_absent_rate)
    origin = _utc_start(start)
    rng = np.random.default_rng(seed)
    points = _truth_points(rng, n_cases, n_landmarks, truth)
    present = rng.random((n_cases, n_landmarks)) >= truly_absent_rate
    assigned = _assign(rng, n_cases, len(readers), per_case)
    case, reader, read, start_days = _reads(rng, assigned, len(readers), repeat_fraction, weeks * 7)
    order = np.lexsort((read, reader, case))
    case, reader, read, start_days = case[order], reader[order], read[order], start_days[order]

    landmark = np.tile(np.arange(n_landmarks), case.size)
    case, reader, read = (np.repeat(a, n_landmarks) for a in (case, reader, read))
    seconds = np.repeat(start_days, n_landmarks) * 86400.0 + landmark * SECONDS_PER_LANDMARK
    error, wrongly_absent = _errors(rng, readers, reader, seconds / (7 * 86400.0))
    absent = ~present[case, landmark] | wrongly_absent
    xyz = np.where(absent[:, None], np.nan, points[case, landmark] + error)
    stamps = origin + np.round(seconds).astype("timedelta64[s]")
    placements = pd.DataFrame(
        {
            "case": _ids("case-", n_cases, 4)[case],
            "landmark": _ids("L", n_landmarks, 2)[landmark],
            "reader": np.array([r.name for r in readers], dtype=object)[reader],
            "read": read,
            "x_mm": xyz[:, 0],
            "y_mm": xyz[:, 1],
            "z_mm": xyz[:, 2],
            "absent": absent.astype(np.int64),
            # naive formatting plus "Z" is several times faster than timezone="UTC"
            "placed_at": np.strings.add(np.datetime_as_string(stamps), "Z"),
        }
    )
    return SimulatedStudy(placements, _truth_frame(points, present), list(readers))


def predictions_from(
    truth: pd.DataFrame,
    sd_mm: float,
    bias_mm: object,
    seed: int,
    name: str = "detector",
) -> pd.DataFrame:
    """Simulate an automatic detector's points from the true points.

    Parameters
    ----------
    truth : DataFrame
        ``SimulatedStudy.truth``: case, landmark, x_mm, y_mm, z_mm, present.
    sd_mm : float, mm
        Per-axis SD of the detector's isotropic Gaussian error.
    bias_mm : (3,) array-like, float, mm
        Constant offset (world mm, RAS+).
    seed : int
        Seed of the numpy Generator.
    name : str, default "detector"
        Written to the ``detector`` column.

    Returns
    -------
    DataFrame
        case, landmark, x_mm, y_mm, z_mm (world mm RAS+), detector; one row per truly
        present landmark (the detector gives no point where there is none).
    """
    needed = {"case", "landmark", "x_mm", "y_mm", "z_mm", "present"}
    if not isinstance(truth, pd.DataFrame) or not needed <= set(truth.columns):
        got = list(truth.columns) if isinstance(truth, pd.DataFrame) else type(truth).__name__
        raise SimulationInputError(f"truth must be a DataFrame with {sorted(needed)}, got {got}")
    if not np.isfinite(sd_mm) or sd_mm < 0:
        raise SimulationInputError(f"sd_mm must be a finite number >= 0, got {sd_mm!r}")
    bias = _vector3("bias_mm", bias_mm)
    rows = truth[truth["present"].astype(bool)]
    rng = np.random.default_rng(seed)
    xyz = rows[["x_mm", "y_mm", "z_mm"]].to_numpy(np.float64)
    xyz = xyz + bias + rng.normal(0.0, 1.0, size=xyz.shape) * sd_mm
    return pd.DataFrame(
        {
            "case": rows["case"].to_numpy(),
            "landmark": rows["landmark"].to_numpy(),
            "x_mm": xyz[:, 0],
            "y_mm": xyz[:, 1],
            "z_mm": xyz[:, 2],
            "detector": name,
        }
    )
