"""Inter-reader agreement tables against hand computation and a pandas/pingouin/statsmodels loop."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from studies.analysis.agreement import (
    agreement_by_case,
    agreement_by_landmark,
    leave_one_out_centroid,
    pairwise_distances_mm,
)
from studies.analysis.table import to_dense, validate_placements
from tests.analysis.placement_factory import make_placements
from tests.references.reference_agreement import reference_agreement_by_landmark


def one_group_study() -> pd.DataFrame:
    rows = [("c1", "L", "a", 0, 0, 0), ("c1", "L", "b", 3, 0, 0), ("c1", "L", "c", 0, 4, 0)]
    df = pd.DataFrame(rows, columns=["case", "landmark", "reader", "x_mm", "y_mm", "z_mm"])
    return df.assign(read=1, absent=0, placed_at="2026-03-02T09:00:00Z")


def test_it_computes_pairwise_distances_centroid_and_leave_one_out_distances_by_hand():
    """A 3-4-5 right triangle: pairwise 3, 4, 5 mm; LOO centroid of a is (1.5, 2, 0)."""
    study = to_dense(validate_placements(one_group_study()))
    by_case = agreement_by_case(study)
    row = by_case.iloc[0]
    assert row["mean_pairwise_mm"] == pytest.approx(4.0)
    assert row["max_pairwise_mm"] == pytest.approx(5.0)
    np.testing.assert_allclose(row[["centroid_x_mm", "centroid_y_mm", "centroid_z_mm"]]
                               .to_numpy(dtype=float), [1.0, 4 / 3, 0.0])
    assert row["loo_mm_a"] == pytest.approx(2.5)  # |(0,0,0) - (1.5,2,0)|
    assert row["loo_mm_b"] == pytest.approx(np.hypot(3, 2))  # |(3,0,0) - (0,2,0)|
    assert row["n_placed"] == 3 and row["reason"] == ""


def test_it_gives_nan_distances_where_a_point_is_missing():
    pts = np.array([[0, 0, 0], [np.nan] * 3, [1, 0, 0]], dtype=float)
    d = pairwise_distances_mm(pts)
    assert d[0, 2] == 1.0 and np.isnan(d[0, 1])
    loo = leave_one_out_centroid(pts, np.isfinite(pts).all(axis=1))
    np.testing.assert_allclose(loo[0], [1, 0, 0])


def test_it_matches_the_reference_loop_with_pingouin_and_statsmodels():
    """tests/references/reference_agreement.py: pandas groupby + scipy pdist +
    pingouin.intraclass_corr 0.7.0 + statsmodels fleiss_kappa 0.15.0; agreement to 1e-9."""
    sd = np.array([[0.8, 1.0, 1.5, 2.0, 1.2], [0.5, 0.6, 0.6, 0.9, 2.5], [1, 1, 1, 1, 1.0]])
    df, _ = make_placements(n_cases=25, n_landmarks=3, n_readers=5, sd_mm=sd, absent_rate=0.08,
                            seed=17)
    clean = validate_placements(df)
    study = to_dense(clean)
    ours = agreement_by_landmark(study, agreement_by_case(study)).set_index("landmark")
    ref = reference_agreement_by_landmark(clean).set_index("landmark")
    columns = [c for c in ref.columns if c != "n_cases"]
    assert (ours["n_cases"] == ref["n_cases"]).all()
    pd.testing.assert_frame_equal(ours[columns], ref[columns], check_exact=False, atol=1e-9,
                                  rtol=1e-9, check_names=False, check_index_type=False)


def test_it_counts_complete_cases_and_readers_for_the_icc():
    df, _ = make_placements(n_cases=10, n_landmarks=1, n_readers=3, seed=2)
    gone = (df["case"] == "case004") & (df["reader"] == "reader_b")
    df.loc[gone, ["x_mm", "y_mm", "z_mm"]] = None
    df.loc[gone, "absent"] = 1
    study = to_dense(validate_placements(df))
    by_lm = agreement_by_landmark(study, agreement_by_case(study))
    assert by_lm.loc[0, "n_icc_cases"] == 9 and by_lm.loc[0, "n_icc_readers"] == 3
    assert by_lm.loc[0, "n_cases"] == 10  # case004 still has two placed points
