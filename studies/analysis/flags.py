"""The consensus table: consensus points with uncertainty and adjudication flags.

A case x landmark is flagged for adjudication when the readers' spread
exceeds the tolerance, when one reader's point is an outlier, or when the
readers disagree on whether the landmark is visible. Points are world mm, RAS+.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .consensus import ConsensusEstimate, outlier_mask
from .table import DenseStudy, key_label

__all__ = ["REASONS", "consensus_table"]

#: Words used in the reasons column, joined by "; ".
REASONS = {
    "spread": "spread",  # mean pairwise distance above the tolerance
    "outlier": "outlier",  # followed by ": reader[, reader]"
    "visibility": "visibility",  # some readers placed it, others marked it not visible
}


def _reason_strings(study: DenseStudy, spread: np.ndarray, outlier: np.ndarray,
                    visibility: np.ndarray) -> np.ndarray:
    """(n_cases * n_landmarks,) object array of reasons; empty where not flagged."""
    spread, visibility = spread.ravel(), visibility.ravel()
    out_flat = outlier.reshape(-1, outlier.shape[-1])
    has_out = out_flat.any(axis=1)
    # without outliers a reason is one of four texts: look it up
    table = np.array(["", REASONS["spread"], REASONS["visibility"],
                      REASONS["spread"] + "; " + REASONS["visibility"]], dtype=object)
    reasons = table[spread.astype(np.int64) + 2 * visibility.astype(np.int64)]
    labels = [key_label(r) for r in study.readers]
    for g in np.flatnonzero(has_out):  # few groups: spell out the outlying readers
        parts = [REASONS["spread"]] if spread[g] else []
        parts.append(REASONS["outlier"] + ": " + ", ".join(
            labels[i] for i in np.flatnonzero(out_flat[g])))
        if visibility[g]:
            parts.append(REASONS["visibility"])
        reasons[g] = "; ".join(parts)
    return reasons


def consensus_table(
    study: DenseStudy,
    estimate: ConsensusEstimate,
    mean_pairwise_mm: np.ndarray,
    *,
    tolerance_mm: float,
    outlier_multiple: float,
) -> pd.DataFrame:
    """One row per case x landmark with the consensus point, its uncertainty and flags.

    Parameters
    ----------
    study : DenseStudy
        Dense placements (first reads are used).
    estimate : ConsensusEstimate
        Output of :func:`studies.analysis.consensus.estimate_consensus`.
    mean_pairwise_mm : (n_cases, n_landmarks) float64 array
        Mean pairwise distance between the readers' points (the spread).
    tolerance_mm : float
        Spread above this flags the point; also the smallest outlier distance.
    outlier_multiple : float
        A reader is an outlier beyond this multiple of the robust spread
        (see :func:`studies.analysis.consensus.outlier_mask`).

    Returns
    -------
    pandas.DataFrame
        case, landmark, method, x_mm, y_mm, z_mm (world mm RAS+), se_mm
        (sqrt of the trace of the covariance), cov_xx, cov_xy, cov_xz, cov_yy,
        cov_yz, cov_zz (mm^2), n_readers (points used), n_absent (readers who
        marked it not visible), flagged (bool), reasons ("spread", "outlier:
        <readers>", "visibility", joined by "; "), note (why the point or its
        uncertainty is missing: "not read", "all readers marked it not visible",
        "single reader").
    """
    pts, placed = study.points_mm[0], study.placed[0]
    read, absent = study.read[0], study.read[0] & study.absent[0]
    n_case, n_lm, _ = study.shape
    n_placed = placed.sum(axis=-1)
    n_absent = absent.sum(axis=-1)
    with np.errstate(invalid="ignore"):
        spread = mean_pairwise_mm > tolerance_mm
    outlier = outlier_mask(pts, placed, tolerance_mm, outlier_multiple)
    visibility = (n_absent > 0) & (n_placed > 0)
    reasons = _reason_strings(study, spread, outlier, visibility)
    cov = estimate.cov_mm2
    out: dict[str, object] = {
        "case": np.repeat(study.cases.to_numpy(dtype=object), n_lm),
        "landmark": np.tile(study.landmarks.to_numpy(dtype=object), n_case),
        "method": estimate.method,
    }
    for a, name in enumerate("xyz"):
        out[f"{name}_mm"] = estimate.centre_mm[..., a].ravel()
    out["se_mm"] = estimate.se_mm.ravel()
    for i, j, name in ((0, 0, "xx"), (0, 1, "xy"), (0, 2, "xz"), (1, 1, "yy"), (1, 2, "yz"),
                       (2, 2, "zz")):
        out[f"cov_{name}"] = cov[..., i, j].ravel()
    out["n_readers"] = estimate.n_readers.ravel()
    out["n_absent"] = n_absent.ravel()
    out["flagged"] = reasons != ""
    out["reasons"] = reasons
    note = np.select(
        [read.sum(axis=-1) == 0, (n_placed == 0) & (n_absent > 0), n_placed == 1],
        ["not read", "all readers marked it not visible", "single reader"], default="")
    out["note"] = note.ravel()
    return pd.DataFrame(out)
