"""run_analysis: the tables and columns of the issue, the summary, progress and parameters."""

from __future__ import annotations

import json

import numpy as np
import pytest

from studies.analysis.pipeline import AnalysisParameterError, run_analysis
from tests.analysis.placement_factory import make_placements

REQUIRED = {
    "agreement_by_landmark": ["landmark", "n_cases", "mean_pairwise_mm", "sd_pairwise_mm",
                              "median_pairwise_mm", "p95_pairwise_mm", "sd_x_mm", "sd_y_mm",
                              "sd_z_mm", "icc2_1_x", "icc2_1_y", "icc2_1_z", "icc3_1_x",
                              "icc3_1_y", "icc3_1_z", "kappa_absent"],
    "agreement_by_case": ["case", "landmark", "centroid_x_mm", "centroid_y_mm", "centroid_z_mm",
                          "mean_pairwise_mm", "max_pairwise_mm", "loo_mm_reader_a"],
    "consensus": ["case", "landmark", "method", "x_mm", "y_mm", "z_mm", "se_mm", "cov_xx",
                  "cov_xy", "cov_xz", "cov_yy", "cov_yz", "cov_zz", "n_readers", "flagged",
                  "reasons"],
    "repeatability": ["reader", "landmark", "n_pairs", "mean_distance_mm", "sw_x_mm", "sw_y_mm",
                      "sw_z_mm", "rc_x_mm", "rc_y_mm", "rc_z_mm", "icc_retest_x",
                      "icc_retest_y", "icc_retest_z"],
    "reader_bias": ["reader", "landmark", "n", "bias_x_mm", "bias_y_mm", "bias_z_mm",
                    "t2_p_value"],
    "drift": ["reader", "n", "slope_mm_per_week", "slope_ci_low", "slope_ci_high",
              "mann_kendall_p", "cusum_first_alarm_at", "cusum_alarms"],
}


@pytest.fixture(scope="module")
def study():
    df, truth = make_placements(n_cases=20, n_landmarks=3, n_readers=5, absent_rate=0.03, seed=44)
    return df, truth


def test_it_returns_every_table_with_the_columns_of_the_issue(study):
    df, _ = study
    result = run_analysis(df)
    assert list(result.tables) == list(REQUIRED)
    for name, columns in REQUIRED.items():
        missing = set(columns) - set(result.tables[name].columns)
        assert not missing, (name, missing)
    assert len(result.tables["consensus"]) == 20 * 3
    assert len(result.tables["repeatability"]) == 5 * 3
    assert len(result.tables["drift"]) == 5


def test_it_returns_a_json_serialisable_summary_with_counts_and_parameters(study):
    df, _ = study
    result = run_analysis(df, consensus="weighted", tolerance_mm=2.5)
    text = json.dumps(result.summary, allow_nan=False)
    back = json.loads(text)
    assert back["counts"]["placements"] == len(df)
    assert back["counts"]["readers"] == 5 and back["counts"]["repeat_pairs"] > 0
    assert back["parameters"] == {"consensus": "weighted", "tolerance_mm": 2.5,
                                  "outlier_multiple": 3.0}
    assert (result.tables["consensus"]["method"] == "weighted").all()


def test_it_puts_the_consensus_near_the_truth(study):
    """Five readers with SD 1 mm per axis: the geometric median is within ~1 mm of the truth
    (its SE is about sqrt(3 * 3 pi/8 / 5) = 0.84 mm radially)."""
    df, truth = study
    cons = run_analysis(df).tables["consensus"]
    est = cons[["x_mm", "y_mm", "z_mm"]].to_numpy().reshape(truth.shape)
    err = np.linalg.norm(est - truth, axis=-1)
    assert np.nanmean(err) < 1.2
    assert np.nanmean(cons["se_mm"]) == pytest.approx(0.84, rel=0.35)


def test_it_reports_progress_in_order(study):
    df, _ = study
    seen = []
    run_analysis(df, progress=lambda f, m: seen.append((f, m)))
    fractions = [f for f, _ in seen]
    assert fractions == sorted(fractions) and fractions[-1] == 1.0
    assert all(isinstance(m, str) and m for _, m in seen)


@pytest.mark.parametrize(
    ("kwargs", "quoted"),
    [({"consensus": "trimmed"}, "'trimmed'"), ({"tolerance_mm": -1.0}, "-1.0"),
     ({"outlier_multiple": float("nan")}, "nan")],
)
def test_it_rejects_bad_parameters(study, kwargs, quoted):
    df, _ = study
    with pytest.raises(AnalysisParameterError, match=quoted):
        run_analysis(df, **kwargs)


def test_it_flags_a_planted_outlier_and_a_visibility_disagreement(study):
    df, _ = study
    df = df.copy()
    hit = (df["case"] == "case003") & (df["landmark"] == "LM1") & (df["reader"] == "reader_e") \
        & (df["read"] == 1)
    df.loc[hit, "x_mm"] += 15.0
    gone = (df["case"] == "case007") & (df["landmark"] == "LM2") & (df["reader"] == "reader_b") \
        & (df["read"] == 1)
    df.loc[gone, ["x_mm", "y_mm", "z_mm"]] = np.nan
    df.loc[gone, "absent"] = 1
    cons = run_analysis(df).tables["consensus"].set_index(["case", "landmark"])
    assert "outlier: reader_e" in cons.loc[("case003", "LM1"), "reasons"]
    assert cons.loc[("case003", "LM1"), "flagged"]
    assert "visibility" in cons.loc[("case007", "LM2"), "reasons"]
    assert cons.loc[("case007", "LM2"), "n_absent"] == 1
