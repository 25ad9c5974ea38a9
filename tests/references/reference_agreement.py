"""Straightforward reference for the per-landmark agreement figures.

A plain loop over landmarks with pandas groupby, scipy's pdist, pingouin.intraclass_corr
(0.7.0) and statsmodels' fleiss_kappa (0.15.0). It is deliberately simple, not fast: the
tests compare studies.analysis.agreement with it, and the benchmark times it side by side
with the vectorised code.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pingouin
from scipy.spatial.distance import pdist
from statsmodels.stats.inter_rater import fleiss_kappa

AXES = ("x", "y", "z")


def _icc(long: pd.DataFrame, axis: str) -> tuple[float, float]:
    table = pingouin.intraclass_corr(long, targets="case", raters="reader",
                                     ratings=f"{axis}_mm").set_index("Type")["ICC"]
    two = table.get("ICC(A,1)", table.get("ICC2"))
    three = table.get("ICC(C,1)", table.get("ICC3"))
    return float(two), float(three)


def reference_agreement_by_landmark(placements: pd.DataFrame) -> pd.DataFrame:
    """Per landmark: n_cases, mean/sd/median/p95 of the per-case mean pairwise distance,
    pooled per-axis SDs, ICC(2,1) and ICC(3,1) per axis on complete cases, Fleiss' kappa
    on absent-versus-placed. ``placements`` is a validated table (first and repeat reads)."""
    first = placements[placements["read"] == 1]
    rows = []
    for landmark, lm_rows in first.groupby("landmark", observed=True):
        placed = lm_rows[~lm_rows["absent"].astype(bool)]
        per_case = placed.groupby("case", observed=True)
        mean_pw = per_case.apply(
            lambda g: pdist(g[["x_mm", "y_mm", "z_mm"]].to_numpy()).mean() if len(g) > 1
            else np.nan, include_groups=False).dropna()
        row = {"landmark": landmark, "n_cases": len(mean_pw),
               "mean_pairwise_mm": mean_pw.mean(), "sd_pairwise_mm": mean_pw.std(ddof=1),
               "median_pairwise_mm": mean_pw.median(),
               "p95_pairwise_mm": np.percentile(mean_pw, 95)}
        sizes = per_case.size()
        multi = placed[placed["case"].map(sizes) > 1]
        for axis in AXES:
            centre = multi.groupby("case", observed=True)[f"{axis}_mm"].transform("mean")
            dev = multi[f"{axis}_mm"] - centre
            row[f"sd_{axis}_mm"] = np.sqrt((dev**2).sum() / (sizes[sizes > 1] - 1).sum())
        readers = placed["reader"].unique()
        counts = placed.groupby("case", observed=True)["reader"].nunique()
        complete = placed[placed["case"].isin(counts[counts == len(readers)].index)]
        long = complete.astype({"case": str, "reader": str})
        for axis in AXES:
            row[f"icc2_1_{axis}"], row[f"icc3_1_{axis}"] = _icc(long, axis)
        table = pd.crosstab(lm_rows["case"], lm_rows["absent"].astype(bool)).reindex(
            columns=[False, True], fill_value=0)
        row["kappa_absent"] = fleiss_kappa(table.to_numpy())
        rows.append(row)
    return pd.DataFrame(rows)
