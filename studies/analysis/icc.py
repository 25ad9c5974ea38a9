"""Intraclass correlation coefficients, vectorised over many rating matrices.

One call computes ICC(1,1), ICC(2,1) and ICC(3,1) (Shrout & Fleiss 1979)
for a whole stack of targets x raters matrices, e.g. every landmark and axis
of a study at once, from the two-way ANOVA mean squares.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["IccResult", "icc_single"]


@dataclass(frozen=True)
class IccResult:
    """Single-rater ICCs and the ANOVA behind them; every field has the batch shape.

    Attributes
    ----------
    icc1_1 : float64 array
        ICC(1,1), one-way random, single rater (McGraw & Wong ICC(1)).
    icc2_1 : float64 array
        ICC(2,1), two-way random, absolute agreement, single rater (ICC(A,1)).
    icc3_1 : float64 array
        ICC(3,1), two-way mixed, consistency, single rater (ICC(C,1)).
    n_targets : int64 array
        Complete targets (rows) used.
    n_raters : int
        Raters (columns) k.
    bms, wms, jms, ems : float64 array
        Between-targets, within-targets, between-raters and residual mean squares.
    """

    icc1_1: np.ndarray
    icc2_1: np.ndarray
    icc3_1: np.ndarray
    n_targets: np.ndarray
    n_raters: int
    bms: np.ndarray
    wms: np.ndarray
    jms: np.ndarray
    ems: np.ndarray


def icc_single(ratings: np.ndarray, use: np.ndarray | None = None) -> IccResult:
    """ICC(1,1), ICC(2,1) and ICC(3,1) for a stack of complete rating matrices.

    Parameters
    ----------
    ratings : (..., n_targets, n_raters) float64 array
        Ratings (any unit, e.g. mm along one world axis); leading axes are a batch.
    use : (..., n_targets) bool array, optional
        Targets to include in each matrix. Default: the rows with every rating
        finite. Rows with a non-finite rating are always left out.

    Returns
    -------
    IccResult
        Fields of the batch shape ``ratings.shape[:-2]``; NaN where fewer than
        two targets or raters remain or a denominator is zero.

    Notes
    -----
    With n complete targets and k raters, the two-way ANOVA gives the
    between-targets mean square BMS = k * sum_i (row mean_i - grand)^2 / (n-1),
    the between-raters JMS = n * sum_j (column mean_j - grand)^2 / (k-1), the
    residual EMS = sum_ij (y_ij - row_i - col_j + grand)^2 / ((n-1)(k-1)) and the
    within-targets WMS = (SS_raters + SS_residual) / (n(k-1)). Then

    * ICC(1,1) = (BMS - WMS) / (BMS + (k-1) WMS),
    * ICC(2,1) = (BMS - EMS) / (BMS + (k-1) EMS + k (JMS - EMS) / n),
    * ICC(3,1) = (BMS - EMS) / (BMS + (k-1) EMS).

    Only complete targets enter (listwise deletion), as in Shrout & Fleiss.
    Validated against the published example and ``pingouin.intraclass_corr``
    (tests/analysis/test_icc.py).

    References
    ----------
    1. Shrout PE, Fleiss JL. Intraclass correlations: uses in assessing rater
       reliability. Psychological Bulletin 1979;86(2):420-428.
       doi:10.1037/0033-2909.86.2.420
    2. McGraw KO, Wong SP. Forming inferences about some intraclass correlation
       coefficients. Psychological Methods 1996;1(1):30-46.
       doi:10.1037/1082-989X.1.1.30 (DOI from memory)
    """
    y = np.asarray(ratings, dtype=np.float64)
    if y.ndim < 2:
        raise ValueError(f"ratings must have at least 2 dimensions, got shape {y.shape!r}")
    finite = np.isfinite(y).all(axis=-1)
    use = finite if use is None else (np.asarray(use, dtype=bool) & finite)
    k = y.shape[-1]
    w = use[..., None]
    y = np.where(w, y, 0.0)
    n = use.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        nf = n.astype(np.float64)
        grand = y.sum(axis=(-2, -1)) / (nf * k)
        row = y.sum(axis=-1) / k
        col = y.sum(axis=-2) / nf[..., None]
        resid = np.where(w, y - row[..., None] - col[..., None, :] + grand[..., None, None], 0.0)
        ss_rows = k * (np.where(use, row - grand[..., None], 0.0) ** 2).sum(axis=-1)
        ss_cols = nf * ((col - grand[..., None]) ** 2).sum(axis=-1)
        ss_err = (resid**2).sum(axis=(-2, -1))
        bms = ss_rows / (nf - 1)
        jms = ss_cols / (k - 1) if k > 1 else np.full_like(nf, np.nan)
        ems = ss_err / ((nf - 1) * (k - 1)) if k > 1 else np.full_like(nf, np.nan)
        wms = (ss_cols + ss_err) / (nf * (k - 1)) if k > 1 else np.full_like(nf, np.nan)
        icc1 = (bms - wms) / (bms + (k - 1) * wms)
        icc2 = (bms - ems) / (bms + (k - 1) * ems + k * (jms - ems) / nf)
        icc3 = (bms - ems) / (bms + (k - 1) * ems)
    bad = (n < 2) | (k < 2)
    out = [np.where(bad | ~np.isfinite(v), np.nan, v) for v in (icc1, icc2, icc3)]
    return IccResult(out[0], out[1], out[2], n.astype(np.int64), k, bms, wms, jms, ems)
