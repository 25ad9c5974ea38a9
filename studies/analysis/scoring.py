"""Scoring an automatic landmark detector against the readers.

The detector's points are compared with the consensus of all readers; each
reader, for a fair yardstick, with the consensus of the *other* readers. The
Williams index asks whether the detector agrees with the readers as well as
they agree with each other. Points are world mm, RAS+.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .detection import detection_summary, williams_index
from .table import COORDINATE_COLUMNS, DenseStudy, PlacementTableError

__all__ = [
    "DEFAULT_DETECTOR",
    "dense_predictions",
    "detector_table",
    "read_predictions_csv",
    "validate_predictions",
    "williams_table",
]

DEFAULT_DETECTOR = "detector"
PREDICTION_COLUMNS = ("case", "landmark", *COORDINATE_COLUMNS)


def read_predictions_csv(path: str) -> pd.DataFrame:
    """Read a detector's predictions CSV file as text (validated later).

    Parameters
    ----------
    path : str
        CSV with columns case, landmark, x_mm, y_mm, z_mm (world mm, RAS+) and
        optionally detector.

    Returns
    -------
    pandas.DataFrame
    """
    try:
        return pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True)
    except (OSError, pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise PlacementTableError(f"cannot read predictions {path!r}: {exc}") from exc


def _coordinate(df: pd.DataFrame, name: str) -> np.ndarray:
    col = df[name]
    if pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col):
        values = col.to_numpy(dtype=np.float64, na_value=np.nan)
        text = col.astype(str)
    else:
        text = col.astype(object).where(col.notna(), "").astype(str).str.strip()
        values = pd.to_numeric(text.where(text != "", None), errors="coerce").to_numpy(
            dtype=np.float64, na_value=np.nan)
        bad = np.flatnonzero(np.isnan(values) & (text != "").to_numpy())
        if bad.size:
            raise PlacementTableError(f"predictions: not a number: {text.iloc[bad[0]]!r}",
                                      int(bad[0]) + 1, name)
    bad = np.flatnonzero(np.isinf(values))
    if bad.size:
        raise PlacementTableError(f"predictions: not a finite number: {text.iloc[bad[0]]!r}",
                                  int(bad[0]) + 1, name)
    return values


def validate_predictions(df: pd.DataFrame, study: DenseStudy) -> tuple[pd.DataFrame, str]:
    """Check a predictions table against the study.

    Parameters
    ----------
    df : pandas.DataFrame
        Columns case, landmark, x_mm, y_mm, z_mm, optional detector. A row with
        all three coordinates empty means "no prediction".
    study : DenseStudy
        The placements the predictions are scored against.

    Returns
    -------
    clean : pandas.DataFrame
        case, landmark, x_mm, y_mm, z_mm (float64), i_case, i_landmark (positions
        in the study's axes).
    detector : str
        The detector's name (the single value of the detector column, or
        ``"detector"``).

    Raises
    ------
    PlacementTableError
        Missing columns, non-numeric or infinite coordinates, only some of the
        coordinates given, a case or landmark not in the placements, a duplicate
        case x landmark, or more than one detector name. Row numbers are 1-based
        data rows of the predictions file.
    """
    missing = [c for c in PREDICTION_COLUMNS if c not in df.columns]
    if missing:
        raise PlacementTableError(f"predictions: missing column(s) {', '.join(map(repr, missing))}")
    df = df.reset_index(drop=True)
    detector = DEFAULT_DETECTOR
    if "detector" in df.columns:
        names = pd.unique(df["detector"].astype(str).str.strip())
        names = [n for n in names if n not in ("", "nan")]
        if len(names) > 1:
            raise PlacementTableError(f"predictions: one detector per file, found {names[:5]!r}")
        detector = names[0] if names else DEFAULT_DETECTOR
    xyz = np.column_stack([_coordinate(df, c) for c in COORDINATE_COLUMNS])
    partial = np.flatnonzero(np.isnan(xyz).any(axis=1) & ~np.isnan(xyz).all(axis=1))
    if partial.size:
        raise PlacementTableError("predictions: give all three coordinates or none",
                                  int(partial[0]) + 1, "x_mm")
    idx = {}
    for name, axis in (("case", study.cases), ("landmark", study.landmarks)):
        keys = df[name]
        pos = axis.get_indexer(keys)
        if (pos < 0).any():  # identifiers may have been read as text
            pos = pd.Index(axis.astype(str)).get_indexer(keys.astype(str).str.strip())
        bad = np.flatnonzero(pos < 0)
        if bad.size:
            raise PlacementTableError(
                f"predictions: {name} {keys.iloc[bad[0]]!r} is not in the placements",
                int(bad[0]) + 1, name)
        idx[name] = pos
    key = idx["case"] * max(len(study.landmarks), 1) + idx["landmark"]
    dup = np.flatnonzero(pd.Series(key).duplicated().to_numpy())
    if dup.size:
        raise PlacementTableError("predictions: a second prediction for this case and landmark",
                                  int(dup[0]) + 1, "landmark")
    clean = pd.DataFrame({"case": df["case"], "landmark": df["landmark"]})
    for a, c in enumerate(COORDINATE_COLUMNS):
        clean[c] = xyz[:, a]
    clean["i_case"], clean["i_landmark"] = idx["case"], idx["landmark"]
    return clean, detector


def dense_predictions(clean: pd.DataFrame, study: DenseStudy) -> np.ndarray:
    """(n_cases, n_landmarks, 3) float64 predicted points, world mm; NaN where none."""
    out = np.full((len(study.cases), len(study.landmarks), 3), np.nan)
    out[clean["i_case"].to_numpy(), clean["i_landmark"].to_numpy()] = clean[
        list(COORDINATE_COLUMNS)].to_numpy(dtype=np.float64)
    return out


def detector_table(study: DenseStudy, pred_mm: np.ndarray, consensus_mm: np.ndarray,
                   reader_error_mm: np.ndarray, detector: str) -> pd.DataFrame:
    """Radial errors of the detector and of each reader, per landmark.

    Parameters
    ----------
    study : DenseStudy
        Identifiers.
    pred_mm : (n_cases, n_landmarks, 3) float64 array
        Detector points, world mm; NaN where none.
    consensus_mm : (n_cases, n_landmarks, 3) float64 array
        Consensus of all readers (the detector's reference).
    reader_error_mm : (n_cases, n_landmarks, n_readers) float64 array
        Distance of each reader's first-read point to the consensus of the others.
    detector : str
        The detector's name (the rater column of its rows).

    Returns
    -------
    pandas.DataFrame
        One row per landmark and rater (the detector first, then each reader):
        landmark, rater, n, mre_mm, sd_mm, median_mm, sdr_2mm, sdr_2_5mm,
        sdr_3mm, sdr_4mm (fractions, "<" the radius), reason.

    Notes
    -----
    Radial error = Euclidean distance in mm; MRE its mean, SDR_z the share of
    errors below z mm (:func:`studies.analysis.detection.detection_summary`).
    Readers are scored against the leave-one-out consensus, so no rater is
    compared with a reference that contains its own point.
    """
    det_err = np.sqrt(((pred_mm - consensus_mm) ** 2).sum(axis=-1))
    rows = []
    for lm, landmark in enumerate(study.landmarks):
        raters = [(detector, det_err[:, lm])]
        raters += [(r, reader_error_mm[:, lm, i]) for i, r in enumerate(study.readers)]
        for name, err in raters:
            summary = detection_summary(err[np.isfinite(err)])
            reason = "" if summary["n"] else "no point with a reference to compare"
            rows.append({"landmark": landmark, "rater": name, **summary, "reason": reason})
    return pd.DataFrame(rows)


def williams_table(study: DenseStudy, pred_mm: np.ndarray, pairwise_mm: np.ndarray
                   ) -> pd.DataFrame:
    """Williams index of the detector against the readers, per landmark.

    Parameters
    ----------
    study : DenseStudy
        First reads (axis 0 of the read dimension) are used.
    pred_mm : (n_cases, n_landmarks, 3) float64 array
        Detector points, world mm; NaN where none.
    pairwise_mm : (n_cases, n_landmarks, n_readers, n_readers) float64 array
        Reader-to-reader distances of the first reads.

    Returns
    -------
    pandas.DataFrame
        One row per landmark: landmark, williams_index, ci_low, ci_high, se,
        verdict.

    Notes
    -----
    The detector is rater 0; the disagreement D between two raters is their mean
    distance over the cases both placed. The 95% CI is the jackknife over cases
    (Chalana & Kim 1997), see :func:`studies.analysis.detection.williams_index`.
    Cases the detector did not predict count only towards reader-reader means.

    References
    ----------
    1. Williams GW. Comparing the joint agreement of several raters with another
       rater. Biometrics 1976;32(3):619-627.
    2. Chalana V, Kim Y. A methodology for evaluation of boundary detection
       algorithms on medical images. IEEE Trans Med Imaging 1997;16(5):642-652.
       doi:10.1109/42.640755
    """
    pts = np.where(study.placed[0][..., None], study.points_mm[0], np.nan)
    d0 = np.sqrt(((pts - pred_mm[:, :, None, :]) ** 2).sum(axis=-1))  # (C, L, R)
    rows = []
    for lm, landmark in enumerate(study.landmarks):
        res = williams_index(d0[:, lm], pairwise_mm[:, lm])
        rows.append({"landmark": landmark, "williams_index": res.index, "ci_low": res.ci_low,
                     "ci_high": res.ci_high, "se": res.se, "verdict": res.verdict})
    return pd.DataFrame(rows)
