"""Fleiss' kappa for agreement of many raters on a nominal scale, vectorised.

Used for agreement on "not visible": each case is a subject, each reader who
read it gives one rating (placed or absent).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["KappaResult", "fleiss_kappa"]


@dataclass(frozen=True)
class KappaResult:
    """Fleiss' kappa and its parts; every field has the batch shape.

    Attributes
    ----------
    kappa : float64 array
        (P_bar - P_e) / (1 - P_e); NaN where undefined (see :func:`fleiss_kappa`).
    p_bar : float64 array
        Mean observed agreement over subjects.
    p_e : float64 array
        Chance agreement, the sum of squared category proportions.
    n_subjects : int64 array
        Subjects with at least two ratings.
    """

    kappa: np.ndarray
    p_bar: np.ndarray
    p_e: np.ndarray
    n_subjects: np.ndarray


def fleiss_kappa(counts: np.ndarray) -> KappaResult:
    """Fleiss' kappa from subject x category counts, for a batch of tables.

    Parameters
    ----------
    counts : (..., n_subjects, n_categories) int or float array
        counts[..., i, j] = number of raters who put subject i in category j.
        Subjects rated by fewer than two raters are left out.

    Returns
    -------
    KappaResult
        Fields of the batch shape ``counts.shape[:-2]``. kappa is NaN when no
        subject has two ratings or when every rating falls in one category
        (P_e = 1: agreement is perfect but kappa is 0/0).

    Notes
    -----
    For subject i with m_i ratings, the observed agreement is
    P_i = (sum_j n_ij^2 - m_i) / (m_i (m_i - 1)), the share of agreeing rater
    pairs; P_bar is their mean over subjects. The category proportions are
    p_j = sum_i n_ij / sum_i m_i and P_e = sum_j p_j^2. kappa =
    (P_bar - P_e) / (1 - P_e). With the same m for every subject this is Fleiss'
    (1971) statistic exactly; with unequal m (incomplete reading designs) it is
    the usual generalisation that pools p_j over all ratings (common practice).

    References
    ----------
    1. Fleiss JL. Measuring nominal scale agreement among many raters.
       Psychological Bulletin 1971;76(5):378-382. doi:10.1037/h0031619
    """
    n_ij = np.asarray(counts, dtype=np.float64)
    if n_ij.ndim < 2:
        raise ValueError(f"counts must have at least 2 dimensions, got shape {n_ij.shape!r}")
    if (n_ij < 0).any() or not np.isfinite(n_ij).all():
        raise ValueError("counts must be finite and non-negative")
    m = n_ij.sum(axis=-1)
    use = m >= 2
    n_ij = np.where(use[..., None], n_ij, 0.0)
    m = np.where(use, m, 0.0)
    n_sub = use.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        p_i = np.where(use, ((n_ij**2).sum(axis=-1) - m) / (m * (m - 1)), 0.0)
        p_bar = p_i.sum(axis=-1) / n_sub
        p_j = n_ij.sum(axis=-2) / m.sum(axis=-1)[..., None]
        p_e = (p_j**2).sum(axis=-1)
        kappa = (p_bar - p_e) / (1.0 - p_e)
    undefined = (n_sub == 0) | np.isclose(p_e, 1.0, rtol=0.0, atol=1e-12)
    kappa = np.where(undefined, np.nan, kappa)
    return KappaResult(kappa, p_bar, p_e, n_sub.astype(np.int64))
