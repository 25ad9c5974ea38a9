"""Tests for studies.analysis.simulate (seeded simulated reader study).

The simulator is checked against its own specification with independent
tools: numpy.polyfit for drift slopes, sampling-error tolerances from the
normal and binomial distributions (stated per test, about 5 standard errors so
a seeded run is far from the edge), and pandas' ISO 8601 parser for times.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from studies.analysis.planning import repeats_for
from studies.analysis.simulate import (
    PLACEMENT_COLUMNS,
    ReaderModel,
    SimulationInputError,
    predictions_from,
    simulate_study,
)

XYZ = ["x_mm", "y_mm", "z_mm"]


def residuals(study) -> pd.DataFrame:
    """Placements joined to truth, with the error vector (mm) and time in weeks."""
    merged = study.placements.merge(study.truth, on=["case", "landmark"], suffixes=("", "_true"))
    for axis in "xyz":
        merged[f"d{axis}"] = merged[f"{axis}_mm"] - merged[f"{axis}_mm_true"]
    start = pd.Timestamp("2026-01-05T08:00:00Z")
    merged["weeks"] = (pd.to_datetime(merged["placed_at"], utc=True) - start).dt.total_seconds()
    merged["weeks"] /= 7 * 86400
    return merged


def test_it_writes_exactly_the_placement_columns_and_ids():
    """Format contract of the brief: exactly the columns case, landmark, reader, read, x_mm,
    y_mm, z_mm, absent, placed_at; ids like case-0001 and L01; every (case, landmark, reader)
    once per read; 5 x 4 x 3 first reads and repeats per repeats_for."""
    readers = [ReaderModel(f"reader-{c}") for c in "abc"]
    study = simulate_study(5, 4, readers, repeat_fraction=0.4, seed=1)
    p = study.placements
    assert list(p.columns) == PLACEMENT_COLUMNS
    assert sorted(p["case"].unique()) == [f"case-{i:04d}" for i in range(1, 6)]
    assert sorted(p["landmark"].unique()) == ["L01", "L02", "L03", "L04"]
    assert (p["read"] == 1).sum() == 5 * 4 * 3
    assert (p["read"] == 2).sum() == 3 * repeats_for(5, 0.4) * 4
    assert not p.duplicated(["case", "landmark", "reader", "read"]).any()
    assert set(p["absent"].unique()) <= {0, 1} and p["read"].dtype == np.int64
    assert list(study.truth.columns) == ["case", "landmark", *XYZ, "present"]


def test_it_recovers_each_readers_noise_bias_and_drift():
    """Specification: error = N(0, sd^2 I) + bias + drift * weeks. Per reader and axis,
    numpy.polyfit(weeks, error, 1) recovers the drift slope and the intercept (bias) within
    5 standard errors, and the residual SD is within 5% (about 5 SE of an SD from 6000 values)."""
    readers = [
        ReaderModel("steady", sd_mm=1.0),
        ReaderModel("biased", sd_mm=1.0, bias_mm=[1.5, 0.0, -1.0]),
        ReaderModel("drifting", sd_mm=0.8, drift_mm_per_week=[0.0, 0.3, 0.0]),
        ReaderModel("noisy", sd_mm=3.0),
    ]
    r = residuals(simulate_study(200, 10, readers, weeks=10, seed=2))
    for model in readers:
        mine = r[r["reader"] == model.name]
        t = mine["weeks"].to_numpy()
        se_slope = model.sd_mm / (t.std() * np.sqrt(t.size))
        for axis, name in enumerate(("dx", "dy", "dz")):
            slope, intercept = np.polyfit(t, mine[name].to_numpy(), 1)
            assert abs(slope - model.drift_mm_per_week[axis]) < 5 * se_slope, model.name
            se_icpt = model.sd_mm * np.sqrt(1 / t.size + t.mean() ** 2 / (t.var() * t.size))
            assert abs(intercept - model.bias_mm[axis]) < 5 * se_icpt, model.name
        detrended = mine[["dx", "dy", "dz"]].to_numpy() - np.outer(t, model.drift_mm_per_week)
        assert np.std(detrended - model.bias_mm) == pytest.approx(model.sd_mm, rel=0.05)


def test_it_places_repeats_at_least_fourteen_days_after_the_first_read():
    """Washout contract: every read 2 starts at least 14 days after read 1 of the same case
    and reader (times parsed by pandas as ISO 8601 UTC; all strings end in 'Z')."""
    readers = [ReaderModel(f"r{i}") for i in range(4)]
    p = simulate_study(30, 3, readers, repeat_fraction=0.3, weeks=6, seed=3).placements
    assert p["placed_at"].str.endswith("Z").all()
    p = p.assign(t=pd.to_datetime(p["placed_at"], utc=True))
    start = p.groupby(["case", "reader", "read"])["t"].min().unstack("read").dropna()
    assert len(start) == 4 * repeats_for(30, 0.3)
    assert ((start[2] - start[1]) >= pd.Timedelta(days=14)).all()


def test_it_marks_absent_landmarks_with_nan_coordinates():
    """Specification: truly absent landmarks are marked absent by every reader; visible ones
    are wrongly marked absent at absent_rate = 0.1 (binomial, n = 2000 visible placements,
    tolerance 5 SE = 0.034); coordinates are NaN exactly when absent = 1."""
    readers = [ReaderModel("a", absent_rate=0.1), ReaderModel("b")]
    study = simulate_study(100, 25, readers, truly_absent_rate=0.2, seed=4)
    p = study.placements.merge(study.truth[["case", "landmark", "present"]])
    assert (p["absent"] == 1).equals(p[XYZ].isna().all(axis=1))
    assert (p.loc[~p["present"], "absent"] == 1).all()
    visible = p[p["present"]]
    rate_a = visible.loc[visible["reader"] == "a", "absent"].mean()
    assert abs(rate_a - 0.1) < 5 * np.sqrt(0.1 * 0.9 / (visible["reader"] == "a").sum())
    assert visible.loc[visible["reader"] == "b", "absent"].sum() == 0


def test_it_adds_gross_errors_of_the_stated_length():
    """Specification: with outlier_rate 0.05 and outlier_mm 20 (sd 0.5 mm), errors over 10 mm
    occur at rate 0.05 (binomial, n = 4000, tolerance 5 SE = 0.017), with lengths 20 +/- 2 mm."""
    study = simulate_study(200, 20, [ReaderModel("o", sd_mm=0.5, outlier_rate=0.05, outlier_mm=20)])
    r = residuals(study)
    length = np.linalg.norm(r[["dx", "dy", "dz"]].to_numpy(), axis=1)
    big = length > 10
    assert abs(big.mean() - 0.05) < 5 * np.sqrt(0.05 * 0.95 / length.size)
    assert np.all(np.abs(length[big] - 20) < 2)


def test_it_assigns_readers_to_cases_in_a_balanced_way():
    """Balanced design contract: 21 cases x 3 of 5 readers -> each case has 3 distinct readers
    and reader workloads differ by at most one case (63 reads over 5 readers: 12 or 13)."""
    readers = [ReaderModel(f"r{i}") for i in range(5)]
    p = simulate_study(21, 2, readers, readers_per_case=3, seed=5).placements
    per_case = p.groupby("case")["reader"].nunique()
    assert (per_case == 3).all()
    workload = p.groupby("reader")["case"].nunique()
    assert workload.sum() == 63 and workload.max() - workload.min() <= 1


def test_it_uses_given_truth_and_is_reproducible():
    """Seeded contract: with sd 0 and no bias the placements equal the given truth (exact);
    the same seed gives an identical frame and another seed a different one."""
    truth = np.arange(2 * 3 * 3, dtype=float).reshape(2, 3, 3)
    exact = simulate_study(2, 3, [ReaderModel("z", sd_mm=0.0)], truth=truth).placements
    np.testing.assert_array_equal(exact[XYZ].to_numpy(), truth.reshape(-1, 3))
    readers = [ReaderModel("a"), ReaderModel("b")]
    one = simulate_study(10, 4, readers, repeat_fraction=0.5, seed=9).placements
    pd.testing.assert_frame_equal(
        one, simulate_study(10, 4, readers, repeat_fraction=0.5, seed=9).placements
    )
    assert not one.equals(simulate_study(10, 4, readers, repeat_fraction=0.5, seed=10).placements)


def test_it_simulates_the_benchmark_sized_study():
    """Hand arithmetic: 500 cases x 32 landmarks x 10 readers with 10% repeats = 176,000
    placements (its speed is a benchmark figure, not a test)."""
    readers = [ReaderModel(f"reader-{i:02d}") for i in range(10)]
    study = simulate_study(500, 32, readers, repeat_fraction=0.1, seed=6)
    assert len(study.placements) == 176_000


def test_it_simulates_a_detector_from_the_truth():
    """predictions_from: one row per truly present landmark, columns case, landmark, x_mm,
    y_mm, z_mm, detector; mean error = bias within 5 SE and SD within 5% (n = 3 x ~1600)."""
    study = simulate_study(200, 10, [ReaderModel("a")], truly_absent_rate=0.2, seed=7)
    pred = predictions_from(study.truth, sd_mm=2.0, bias_mm=[0.5, 0.0, -0.5], seed=8)
    assert list(pred.columns) == ["case", "landmark", *XYZ, "detector"]
    present = study.truth[study.truth["present"]]
    assert len(pred) == len(present) and (pred["detector"] == "detector").all()
    err = pred[XYZ].to_numpy() - present[XYZ].to_numpy()
    se = 2.0 / np.sqrt(len(err))
    assert np.all(np.abs(err.mean(axis=0) - [0.5, 0.0, -0.5]) < 5 * se)
    assert err.std(axis=0) == pytest.approx([2.0] * 3, rel=0.05)


def test_it_rejects_bad_parameters_with_the_value_quoted():
    """Input contract: ValueError subclasses whose message quotes the bad value; valid
    models store their vectors as float tuples, so they compare by value."""
    assert ReaderModel("x", bias_mm=[1, 0, 0]) == ReaderModel("x", bias_mm=(1.0, 0.0, 0.0))
    with pytest.raises(SimulationInputError, match="drift_mm_per_week"):
        ReaderModel("x", drift_mm_per_week=[0.1, 0.2])
    with pytest.raises(SimulationInputError, match=r"1\.5"):
        ReaderModel("x", absent_rate=1.5)
    with pytest.raises(SimulationInputError, match="unique"):
        simulate_study(2, 2, [ReaderModel("x"), ReaderModel("x")])
    with pytest.raises(SimulationInputError, match="got 3"):
        simulate_study(2, 2, [ReaderModel("x"), ReaderModel("y")], readers_per_case=3)
    with pytest.raises(SimulationInputError, match="time zone"):
        simulate_study(2, 2, [ReaderModel("x")], start="2026-01-05T08:00:00")


def test_it_imports_the_statistics_modules_without_django():
    """House rule (design.md, style.md): studies.analysis imports no Django. Checked in a fresh
    interpreter, importing the five modules of this family and inspecting sys.modules."""
    import subprocess
    import sys

    modules = ", ".join(
        f"studies.analysis.{m}" for m in ("trend", "hotelling", "detection", "planning", "simulate")
    )
    code = f"import sys, {modules}; print('django' in sys.modules)"
    root = Path(__file__).resolve().parents[2]
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True, cwd=root
    )
    assert out.stdout.strip() == "False"
