"""Distance-based figures do not change under rigid motions of all points or reordered readers.

Property tests (seeded, common practice for geometric statistics): world mm RAS+ is an
arbitrary frame for agreement, so translating and rotating every point, or renaming the
readers so that they sort in another order, must leave every distance-based figure alone.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.spatial.transform import Rotation

from studies.analysis.pipeline import run_analysis
from tests.analysis.placement_factory import make_placements

DISTANCE_COLUMNS = {
    "agreement_by_landmark": ["n_cases", "mean_pairwise_mm", "sd_pairwise_mm",
                              "median_pairwise_mm", "p95_pairwise_mm", "kappa_absent"],
    "agreement_by_case": ["mean_pairwise_mm", "max_pairwise_mm"],
    "consensus": ["se_mm", "n_readers", "flagged"],
    "repeatability": ["n_pairs", "mean_distance_mm"],
    "drift": ["n", "slope_mm_per_week", "slope_ci_low", "slope_ci_high", "mann_kendall_p",
              "cusum_alarms"],
    "detector": ["n", "mre_mm", "sd_mm", "median_mm", "sdr_2mm", "sdr_4mm"],
    "williams": ["williams_index", "ci_low", "ci_high"],
}


@pytest.fixture(scope="module")
def base():
    sd = np.array([[0.7, 1.0, 1.4, 2.0], [1.0, 1.0, 1.0, 3.0]])
    df, _ = make_placements(n_cases=14, n_landmarks=2, n_readers=4, sd_mm=sd, absent_rate=0.05,
                            repeat_cases=6, seed=77)
    first = df[(df["read"] == 1) & (df["reader"] == "reader_b") & (df["absent"] == 0)]
    pred = first[["case", "landmark", "x_mm", "y_mm", "z_mm"]].copy()
    pred[["x_mm", "y_mm", "z_mm"]] += np.random.default_rng(1).normal(size=(len(pred), 3))
    return df, pred


def transform(df: pd.DataFrame, rot: np.ndarray, shift: np.ndarray) -> pd.DataFrame:
    out = df.copy()
    xyz = out[["x_mm", "y_mm", "z_mm"]].to_numpy()
    out[["x_mm", "y_mm", "z_mm"]] = xyz @ rot.T + shift
    return out


def by_key(table: pd.DataFrame, name: str) -> pd.DataFrame:
    keys = [k for k in ("case", "landmark", "reader", "rater") if k in table.columns]
    return table.set_index(keys).sort_index()[DISTANCE_COLUMNS[name]]


@pytest.mark.parametrize("method", ["mean", "median", "geomedian", "weighted"])
def test_it_is_unchanged_by_a_rotation_and_translation(base, method):
    """Seeded random rotation plus a 200 mm shift; coordinate-wise median is rotation-
    dependent, so for it only translation is applied."""
    df, pred = base
    rot = Rotation.random(random_state=5).as_matrix() if method != "median" else np.eye(3)
    shift = np.array([200.0, -150.0, 80.0])
    ref = run_analysis(df, pred, consensus=method)
    moved = run_analysis(transform(df, rot, shift), transform(pred, rot, shift), consensus=method)
    for name in DISTANCE_COLUMNS:
        pd.testing.assert_frame_equal(by_key(moved.tables[name], name),
                                      by_key(ref.tables[name], name), atol=1e-6, rtol=1e-7)


def test_it_is_unchanged_by_reordering_the_readers(base):
    """Readers renamed so that they sort in reverse order, and the rows shuffled."""
    df, pred = base
    names = {"reader_a": "z_last", "reader_b": "y_third", "reader_c": "x_second",
             "reader_d": "w_first"}
    shuffled = df.assign(reader=df["reader"].map(names)).sample(frac=1.0, random_state=3)
    ref = run_analysis(df, pred)
    other = run_analysis(shuffled, pred)
    for name in DISTANCE_COLUMNS:
        a, b = ref.tables[name].copy(), other.tables[name].copy()
        for t in (a, b):
            for col in ("reader", "rater"):
                if col in t.columns:
                    t[col] = t[col].astype(str).map(lambda v: names.get(v, v))
        pd.testing.assert_frame_equal(by_key(b, name), by_key(a, name), atol=1e-9, rtol=1e-9)
