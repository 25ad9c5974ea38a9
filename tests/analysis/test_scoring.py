"""Detector scoring: radial errors, SDR, and the Williams index with its jackknife CI."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from studies.analysis.agreement import pairwise_distances_mm
from studies.analysis.pipeline import run_analysis
from studies.analysis.scoring import dense_predictions, validate_predictions, williams_table
from studies.analysis.table import PlacementTableError, to_dense, validate_placements

# Jackknife vector of check-values.md section 5, example 3 ([COMPUTED], not published):
# 4 cases, 3 readers and an automatic method, mm.
R1 = [(0, 0, 0), (0, 0, 0), (1, 1, 1), (0, 0, 0)]
R2 = [(1, 0, 0), (2, 0, 0), (1, 1, 0), (0, 3, 0)]
R3 = [(0, 1, 0), (0, 0, 2), (0, 1, 1), (0, 0, 1)]
A = [(0, 0, 1), (1, 1, 0), (1, 0, 1), (2, 0, 0)]


def worked_example() -> tuple[pd.DataFrame, pd.DataFrame]:
    rows = []
    for reader, pts in (("r1", R1), ("r2", R2), ("r3", R3)):
        for c, (x, y, z) in enumerate(pts):
            rows.append({"case": f"c{c}", "landmark": "L", "reader": reader, "read": 1,
                         "x_mm": x, "y_mm": y, "z_mm": z, "absent": 0,
                         "placed_at": f"2026-03-0{c + 1}T10:00:00Z"})
    pred = pd.DataFrame([{"case": f"c{c}", "landmark": "L", "x_mm": x, "y_mm": y, "z_mm": z,
                          "detector": "net-7"} for c, (x, y, z) in enumerate(A)])
    return pd.DataFrame(rows), pred


def test_it_reproduces_the_worked_williams_index_and_jackknife_interval():
    """I' = 0.975792, jackknife SE 0.124980, 95% CI 0.730832 to 1.220752 (contains 1);
    check-values.md section 5 example 3, to 1e-6."""
    placements, pred = worked_example()
    study = to_dense(validate_placements(placements))
    clean, name = validate_predictions(pred, study)
    table = williams_table(study, dense_predictions(clean, study),
                           pairwise_distances_mm(study.points_mm[0]))
    row = table.iloc[0]
    assert name == "net-7"
    assert row["williams_index"] == pytest.approx(0.975792, abs=1e-6)
    assert row["se"] == pytest.approx(0.124980, abs=1e-6)
    assert row["ci_low"] == pytest.approx(0.730832, abs=1e-6)
    assert row["ci_high"] == pytest.approx(1.220752, abs=1e-6)
    assert "as well" in row["verdict"]


def test_it_scores_detector_against_all_readers_and_readers_against_the_others():
    """Detector error = |A - consensus of r1..r3|; reader error = |R - consensus of the other
    two|; MRE and SDR (< radius) by hand for the mean consensus."""
    placements, pred = worked_example()
    result = run_analysis(placements, pred, consensus="mean")
    det = result.tables["detector"].set_index("rater")
    mean = (np.array(R1) + np.array(R2) + np.array(R3)) / 3
    err = np.linalg.norm(np.array(A) - mean, axis=1)
    assert det.loc["net-7", "n"] == 4
    assert det.loc["net-7", "mre_mm"] == pytest.approx(err.mean())
    assert det.loc["net-7", "median_mm"] == pytest.approx(np.median(err))
    assert det.loc["net-7", "sdr_2mm"] == pytest.approx((err < 2).mean())
    r2_err = np.linalg.norm(np.array(R2) - (np.array(R1) + np.array(R3)) / 2, axis=1)
    assert det.loc["r2", "mre_mm"] == pytest.approx(r2_err.mean())
    assert det.loc["r2", "sd_mm"] == pytest.approx(r2_err.std(ddof=1))
    assert list(det.index) == ["net-7", "r1", "r2", "r3"]
    assert set(result.tables["williams"].columns) >= {"landmark", "williams_index", "ci_low",
                                                     "ci_high", "verdict"}


@pytest.mark.parametrize(
    ("change", "message"),
    [
        (lambda p: p.assign(case=["c0", "c1", "c2", "c9"]), "'c9' is not in the placements"),
        (lambda p: p.assign(x_mm=["1", "a", "0", "2"]), "not a number: 'a'"),
        (lambda p: p.assign(case=["c0", "c0", "c2", "c3"]), "second prediction"),
        (lambda p: p.assign(detector=["a", "b", "a", "a"]), "one detector per file"),
        (lambda p: p.drop(columns="z_mm"), "'z_mm'"),
    ],
)
def test_it_rejects_bad_predictions_with_a_clear_message(change, message):
    placements, pred = worked_example()
    study = to_dense(validate_placements(placements))
    with pytest.raises(PlacementTableError, match=message):
        validate_predictions(change(pred.astype({"x_mm": object})), study)


def test_it_treats_a_prediction_without_coordinates_as_missing():
    placements, pred = worked_example()
    pred = pred.astype(object)
    pred.loc[1, ["x_mm", "y_mm", "z_mm"]] = ""
    result = run_analysis(placements, pred.drop(columns="detector"))
    det = result.tables["detector"].set_index("rater")
    assert det.loc["detector", "n"] == 3
