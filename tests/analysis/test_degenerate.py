"""Degenerate studies give NaN figures with reasons, never an exception."""

from __future__ import annotations

import numpy as np
import pandas as pd

from studies.analysis.pipeline import run_analysis
from tests.analysis.placement_factory import make_placements


def test_it_handles_a_single_reader():
    df, _ = make_placements(n_cases=6, n_landmarks=2, n_readers=1, repeat_cases=3, seed=1)
    result = run_analysis(df)
    agree = result.tables["agreement_by_landmark"]
    assert agree["mean_pairwise_mm"].isna().all() and agree["icc2_1_x"].isna().all()
    assert agree["reason"].str.contains("no case with two placed points").all()
    cons = result.tables["consensus"]
    assert (cons["note"] == "single reader").all() and cons["se_mm"].isna().all()
    assert not cons["flagged"].any()
    assert result.tables["reader_bias"]["reason"].str.startswith("no residual").all()
    assert result.tables["repeatability"]["n_pairs"].eq(3).all()
    assert result.tables["drift"]["reason"].str.contains("3 placements").all()


def test_it_handles_every_point_absent():
    df, _ = make_placements(n_cases=5, n_landmarks=2, n_readers=3, repeat_cases=2, seed=2)
    df[["x_mm", "y_mm", "z_mm"]] = np.nan
    df["absent"] = 1
    result = run_analysis(df)
    cons = result.tables["consensus"]
    assert cons[["x_mm", "y_mm", "z_mm"]].isna().all().all()
    assert (cons["note"] == "all readers marked it not visible").all()
    agree = result.tables["agreement_by_landmark"]
    assert agree["kappa_absent"].isna().all()
    assert agree["reason"].str.contains("all ratings alike").all()
    assert result.summary["headline"]["median_mean_pairwise_mm"] is None


def test_it_handles_a_single_case():
    df, _ = make_placements(n_cases=1, n_landmarks=2, n_readers=4, repeat_cases=1, seed=3)
    result = run_analysis(df)
    agree = result.tables["agreement_by_landmark"]
    assert (agree["n_cases"] == 1).all()
    assert np.isfinite(agree["mean_pairwise_mm"]).all() and agree["sd_pairwise_mm"].isna().all()
    assert agree["icc3_1_z"].isna().all()
    assert agree["reason"].str.contains("ICC needs two complete cases").all()
    assert np.isfinite(result.tables["consensus"]["x_mm"]).all()


def test_it_handles_a_landmark_nobody_placed():
    df, _ = make_placements(n_cases=8, n_landmarks=3, n_readers=3, seed=4)
    nobody = df["landmark"] == "LM2"
    df.loc[nobody, ["x_mm", "y_mm", "z_mm"]] = np.nan
    df.loc[nobody, "absent"] = 1
    pred = df[(df["read"] == 1) & (df["reader"] == "reader_a")][
        ["case", "landmark", "x_mm", "y_mm", "z_mm"]].fillna(0.0)
    result = run_analysis(df, pred)
    agree = result.tables["agreement_by_landmark"].set_index("landmark")
    assert np.isnan(agree.loc["LM2", "mean_pairwise_mm"])
    assert np.isfinite(agree.loc["LM0", "mean_pairwise_mm"])
    williams = result.tables["williams"].set_index("landmark")
    assert np.isnan(williams.loc["LM2", "williams_index"])
    assert williams.loc["LM2", "verdict"].startswith("no index")
    det = result.tables["detector"].set_index(["landmark", "rater"])
    assert det.loc[("LM2", "detector"), "n"] == 0
    assert det.loc[("LM2", "detector"), "reason"] != ""


def test_it_handles_a_landmark_missing_from_some_readers_worklists():
    """An incomplete design: reader_c never read case000..case003."""
    df, _ = make_placements(n_cases=8, n_landmarks=1, n_readers=3, repeat_cases=0, seed=6)
    skip = (df["reader"] == "reader_c") & df["case"].isin([f"case00{i}" for i in range(4)])
    result = run_analysis(df[~skip].reset_index(drop=True))
    agree = result.tables["agreement_by_landmark"]
    assert agree.loc[0, "n_icc_cases"] == 4 and agree.loc[0, "n_cases"] == 8
    assert pd.notna(agree.loc[0, "kappa_absent"]) or "alike" in agree.loc[0, "reason"]
