"""Intra-reader repeatability from repeat reads: within-subject SD and repeatability coefficient.

Each pair is one reader's first and repeat placement of one landmark on one
case (world mm, RAS+). Figures are per reader and landmark, per world axis.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .icc import icc_single
from .table import DenseStudy

__all__ = ["REPEATABILITY_FACTOR", "repeatability_table", "within_subject_sd"]

#: Repeatability coefficient factor: 1.96 * sqrt(2) = 2.77 (Bland & Altman 1996).
REPEATABILITY_FACTOR = 2.77
AXES = ("x", "y", "z")


def within_subject_sd(first: np.ndarray, repeat: np.ndarray, axis: int = 0) -> np.ndarray:
    """Within-subject SD from duplicate measurements.

    Parameters
    ----------
    first, repeat : float64 arrays of the same shape
        Two measurements of each subject (any unit, e.g. mm along one world
        axis); pairs with a NaN are left out.
    axis : int, default 0
        The subject axis.

    Returns
    -------
    float64 array
        s_w = sqrt(sum d^2 / (2 n)) with d the within-pair differences, over
        ``axis``; NaN where no complete pair remains.

    Notes
    -----
    With two measurements per subject the residual mean square of a one-way
    ANOVA is sum d^2 / (2 n), so s_w is its square root (Bland & Altman 1996).

    References
    ----------
    1. Bland JM, Altman DG. Statistics notes: measurement error. BMJ
       1996;313:744. doi:10.1136/bmj.313.7059.744
    """
    d = np.asarray(first, dtype=np.float64) - np.asarray(repeat, dtype=np.float64)
    ok = np.isfinite(d)
    n = ok.sum(axis=axis)
    with np.errstate(invalid="ignore", divide="ignore"):
        sw = np.sqrt(np.where(ok, d * d, 0.0).sum(axis=axis) / (2.0 * n))
    return np.where(n > 0, sw, np.nan)


def repeatability_table(study: DenseStudy) -> pd.DataFrame:
    """Per reader and landmark repeatability of repeat reads.

    Parameters
    ----------
    study : DenseStudy
        Dense placements; read axis 0 is the first read, 1 the repeat.

    Returns
    -------
    pandas.DataFrame
        One row per reader x landmark: reader, landmark, n_pairs (cases where
        both reads placed the landmark), n_visibility_changed (cases where one
        read marked it not visible and the other placed it), mean_distance_mm
        (mean 3-D distance between the two placements), sw_x_mm, sw_y_mm,
        sw_z_mm (within-subject SD per world axis), rc_x_mm, rc_y_mm, rc_z_mm
        (repeatability coefficient 2.77 s_w: 95% of differences between two
        reads are expected within it), icc_retest_x/y/z, reason.

    Notes
    -----
    icc_retest is ICC(2,1) (two-way, absolute agreement, single measurement;
    McGraw & Wong's ICC(A,1)) with the two reads as the two occasions and the
    cases as targets, so a systematic shift between reads lowers it. It needs
    two complete pairs. Readers or landmarks without repeat reads get NaN and a
    reason.

    References
    ----------
    1. Bland JM, Altman DG. Statistics notes: measurement error. BMJ
       1996;313:744. doi:10.1136/bmj.313.7059.744
    2. Bland JM, Altman DG. Measuring agreement in method comparison studies.
       Stat Methods Med Res 1999;8(2):135-160. doi:10.1177/096228029900800204
       (DOI from memory)
    3. Koo TK, Li MY. A guideline of selecting and reporting intraclass
       correlation coefficients for reliability research. J Chiropr Med
       2016;15(2):155-163 (from memory).
    """
    placed = study.placed
    pair = placed[0] & placed[1]  # (C, L, R)
    first = np.where(pair[..., None], study.points_mm[0], np.nan)
    repeat = np.where(pair[..., None], study.points_mm[1], np.nan)
    n_pairs = pair.sum(axis=0)  # (L, R)
    both_read = study.read[0] & study.read[1]
    changed = (both_read & (study.absent[0] != study.absent[1])).sum(axis=0)
    dist = np.sqrt(((first - repeat) ** 2).sum(axis=-1))
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_d = np.where(pair, dist, 0.0).sum(axis=0) / n_pairs
    sw = within_subject_sd(first, repeat, axis=0)  # (L, R, 3)
    ratings = np.stack([first, repeat], axis=-1)  # (C, L, R, 3, 2)
    icc = icc_single(np.moveaxis(ratings, 0, -2), use=np.moveaxis(pair, 0, -1)[..., None, :])
    n_lm, n_rd = n_pairs.shape
    out: dict[str, object] = {
        "reader": np.repeat(study.readers.to_numpy(dtype=object), n_lm),
        "landmark": np.tile(study.landmarks.to_numpy(dtype=object), n_rd),
        "n_pairs": n_pairs.T.ravel(),
        "n_visibility_changed": changed.T.ravel(),
    }
    out["mean_distance_mm"] = np.where(n_pairs > 0, mean_d, np.nan).T.ravel()
    for a, name in enumerate(AXES):
        out[f"sw_{name}_mm"] = sw[..., a].T.ravel()
    for a, name in enumerate(AXES):
        out[f"rc_{name}_mm"] = (REPEATABILITY_FACTOR * sw[..., a]).T.ravel()
    for a, name in enumerate(AXES):
        out[f"icc_retest_{name}"] = icc.icc2_1[..., a].T.ravel()
    reason = np.select([n_pairs == 0, n_pairs == 1],
                       ["no repeat read with both placements", "ICC needs two repeat pairs"],
                       default="")
    out["reason"] = reason.T.ravel()
    return pd.DataFrame(out)
