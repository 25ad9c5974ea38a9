"""The whole analysis of a placements table, from validation to the result tables.

:func:`run_analysis` is what the background task and the command-line entry
point both call. It takes the long placements table (see
:mod:`studies.analysis.table`) and, optionally, a detector's predictions, and
returns every result table plus a JSON-serialisable summary.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .agreement import agreement_by_case, agreement_by_landmark, pairwise_distances_mm
from .consensus import METHODS, estimate_consensus, leave_one_out_centres
from .flags import consensus_table
from .readers import bias_table, drift_table
from .repeatability import repeatability_table
from .scoring import dense_predictions, detector_table, validate_predictions, williams_table
from .table import DenseStudy, to_dense, validate_placements

__all__ = ["TABLE_NAMES", "AnalysisParameterError", "AnalysisResult", "run_analysis"]

#: Result tables, keyed as the CSV file stems; detector and williams need predictions.
TABLE_NAMES: tuple[str, ...] = (
    "agreement_by_landmark", "agreement_by_case", "consensus", "repeatability",
    "reader_bias", "drift", "detector", "williams",
)


class AnalysisParameterError(ValueError):
    """An analysis parameter is out of range; the message quotes it."""


@dataclass
class AnalysisResult:
    """Result of :func:`run_analysis`.

    Attributes
    ----------
    tables : dict of str to pandas.DataFrame
        Keyed by CSV file stem: agreement_by_landmark, agreement_by_case,
        consensus, repeatability, reader_bias, drift, and detector, williams
        when predictions were given.
    summary : dict
        JSON-serialisable counts, parameters and headline figures (NaN as None).
    """

    tables: dict[str, pd.DataFrame] = field(default_factory=dict)
    summary: dict = field(default_factory=dict)


def _check_parameters(consensus: str, tolerance_mm: float, outlier_multiple: float) -> None:
    if consensus not in METHODS:
        raise AnalysisParameterError(
            f"consensus must be one of {', '.join(METHODS)}, got {consensus!r}")
    for name, value in (("tolerance_mm", tolerance_mm), ("outlier_multiple", outlier_multiple)):
        if not isinstance(value, (int, float)) or not math.isfinite(value) or value <= 0:
            raise AnalysisParameterError(f"{name} must be a finite number > 0, got {value!r}")


def _num(value: object) -> object:
    """Plain JSON value: numpy scalars to Python, NaN to None."""
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return None if not np.isfinite(value) else float(value)
    return value


def _median(series: pd.Series) -> object:
    values = series.to_numpy(dtype=np.float64)
    values = values[np.isfinite(values)]
    return _num(float(np.median(values))) if values.size else None


def _summary(study: DenseStudy, clean: pd.DataFrame, tables: dict[str, pd.DataFrame],
             params: dict) -> dict:
    agree, cons = tables["agreement_by_landmark"], tables["consensus"]
    drift, rep = tables["drift"], tables["repeatability"]
    n_case, n_lm, n_rd = study.shape
    headline = {
        "median_mean_pairwise_mm": _median(agree["mean_pairwise_mm"]),
        "median_icc2_1": _median(pd.concat([agree[f"icc2_1_{a}"] for a in "xyz"])),
        "median_kappa_absent": _median(agree["kappa_absent"]),
        "n_flagged": int(cons["flagged"].sum()),
        "share_flagged": _num(float(cons["flagged"].mean())) if len(cons) else None,
        "median_rc_mm": _median(pd.concat([rep[f"rc_{a}_mm"] for a in "xyz"])),
        "readers_with_cusum_alarm": [str(r) for r in drift.loc[drift["cusum_alarms"] > 0,
                                                               "reader"]],
    }
    if "detector" in tables:
        det = tables["detector"]
        first = det[det["rater"] == params["detector"]]
        headline["detector_median_mre_mm"] = _median(first["mre_mm"])
        headline["williams_verdicts"] = {
            str(k): int(v) for k, v in tables["williams"]["verdict"].value_counts().items()}
    return {
        "counts": {
            "placements": len(clean),
            "first_reads": int((clean["read"] == 1).sum()),
            "repeat_reads": int((clean["read"] == 2).sum()),
            "absent": int(clean["absent"].sum()),
            "cases": n_case, "landmarks": n_lm, "readers": n_rd,
            "repeat_pairs": int((study.placed[0] & study.placed[1]).sum()),
        },
        "parameters": params,
        "headline": headline,
    }


def run_analysis(
    placements: pd.DataFrame,
    predictions: pd.DataFrame | None = None,
    *,
    consensus: str = "geomedian",
    tolerance_mm: float = 3.0,
    outlier_multiple: float = 3.0,
    progress: Callable[[float, str], None] | None = None,
) -> AnalysisResult:
    """Run agreement, consensus, repeatability, reader bias, drift and detector scoring.

    Parameters
    ----------
    placements : pandas.DataFrame
        Long placements table (world mm, RAS+), see
        :func:`studies.analysis.table.validate_placements`.
    predictions : pandas.DataFrame, optional
        Detector points: case, landmark, x_mm, y_mm, z_mm, optional detector.
    consensus : {"geomedian", "mean", "median", "weighted"}
        Consensus method for the consensus table and for every leave-one-out
        reference (reader bias, drift, reader and detector scores).
    tolerance_mm : float, default 3.0
        Spread that flags a consensus point; the smallest outlier distance.
    outlier_multiple : float, default 3.0
        Outlier threshold in multiples of the group's robust spread.
    progress : callable, optional
        Called as progress(fraction, message) after each step.

    Returns
    -------
    AnalysisResult
        tables and summary (see :class:`AnalysisResult`).

    Raises
    ------
    PlacementTableError
        Invalid placements or predictions (names the row and column).
    AnalysisParameterError
        A parameter out of range.

    Notes
    -----
    Agreement and consensus use first reads only; repeatability pairs each
    first read with its repeat; drift follows every placement (both reads) of a
    reader in time. Degenerate input (one reader, one case, all points absent,
    a landmark nobody placed) gives NaN figures with a reason column, never an
    exception.
    """
    _check_parameters(consensus, tolerance_mm, outlier_multiple)

    def report(fraction: float, message: str) -> None:
        if progress is not None:
            progress(fraction, message)

    clean = validate_placements(placements)
    study = to_dense(clean)
    report(0.1, "placements validated")
    pts, placed = study.points_mm[0], study.placed[0]
    pairwise = pairwise_distances_mm(pts)
    tables: dict[str, pd.DataFrame] = {}
    tables["agreement_by_case"] = agreement_by_case(study, pairwise)
    tables["agreement_by_landmark"] = agreement_by_landmark(study, tables["agreement_by_case"])
    report(0.3, "agreement computed")
    estimate = estimate_consensus(pts, placed, consensus)
    loo = leave_one_out_centres(pts, placed, estimate)
    mean_pw = tables["agreement_by_case"]["mean_pairwise_mm"].to_numpy().reshape(placed.shape[:2])
    tables["consensus"] = consensus_table(study, estimate, mean_pw, tolerance_mm=tolerance_mm,
                                          outlier_multiple=outlier_multiple)
    report(0.55, "consensus points computed")
    tables["repeatability"] = repeatability_table(study)
    residual = np.where(placed[..., None], pts, np.nan) - loo
    tables["reader_bias"] = bias_table(study, residual)
    all_pts = np.where(study.placed[..., None], study.points_mm, np.nan)
    distance = np.sqrt(((all_pts - loo[None]) ** 2).sum(axis=-1))
    tables["drift"] = drift_table(study, distance)
    report(0.8, "repeatability, bias and drift computed")
    params = {"consensus": consensus, "tolerance_mm": float(tolerance_mm),
              "outlier_multiple": float(outlier_multiple)}
    if predictions is not None:
        pred_clean, detector = validate_predictions(predictions, study)
        pred = dense_predictions(pred_clean, study)
        tables["detector"] = detector_table(study, pred, estimate.centre_mm, distance[0], detector)
        tables["williams"] = williams_table(study, pred, pairwise)
        params["detector"] = detector
        report(0.95, "detector scored")
    summary = _summary(study, clean, tables, params)
    report(1.0, "done")
    ordered = {name: tables[name] for name in TABLE_NAMES if name in tables}
    return AnalysisResult(tables=ordered, summary=summary)
