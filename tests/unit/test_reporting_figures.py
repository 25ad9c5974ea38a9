"""The result figures and the quantities behind them (Django-free: no database needed)."""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from studies.analysis.pipeline import run_analysis
from studies.analysis.trend import cusum, ols_slope
from studies.reporting import figures, quantities
from studies.reporting.quantities import ErrorSeries, ReportingInputError, limits_of_agreement
from tests.analysis.placement_factory import make_placements

ROOT = Path(__file__).resolve().parents[2]
# Bland & Altman, Lancet 1986, Table 1: PEFR (l/min), first reading on each meter
# (shared check-values section 4; the same columns are in Bland's own web page).
WRIGHT1 = [494, 395, 516, 434, 476, 557, 413, 442, 650, 433, 417, 656, 267, 478, 178, 423, 427]
MINI1 = [512, 430, 520, 428, 500, 600, 364, 380, 658, 445, 432, 626, 260, 477, 259, 350, 451]
# Montgomery, Introduction to Statistical Quality Control, Example 9.1 (check-values 8b).
MONTGOMERY = [9.45, 7.99, 9.29, 11.66, 12.16, 10.18, 8.04, 11.46, 9.20, 10.34, 9.03, 11.47,
              10.51, 9.40, 10.08, 9.37, 10.62, 10.31, 8.52, 10.84, 10.90, 9.33, 12.29, 11.50,
              10.60, 11.08, 10.38, 11.62, 11.31, 10.52]


def lancet_pairs() -> pd.DataFrame:
    """The Lancet data as per-axis pairs (x only; y and z left empty)."""
    one, two = np.array(WRIGHT1, float), np.array(MINI1, float)
    return pd.DataFrame({"case": range(17), "landmark": "PEFR", "axis": "x",
                         "mean_mm": (one + two) / 2, "difference_mm": one - two})


def line(fig, gid: str):
    found = [ln for ax in fig.axes for ln in ax.lines if ln.get_gid() == gid]
    assert len(found) == 1, f"expected one line with gid {gid!r}, found {len(found)}"
    return found[0]


def group(svg: str, gid: str) -> str:
    match = re.search(rf'<g id="{re.escape(gid)}">(.*?)</g>', svg, flags=re.S)
    assert match, f"no <g id={gid!r}> in the SVG"
    return match.group(1)


def test_it_computes_the_lancet_1986_limits_of_agreement():
    """Bland & Altman 1986 Table 1, Wright minus mini meter: mean difference -2.1176 l/min
    (published -2.1), SD 38.765 (38.8); 1.96 SD limits -78.097 and 73.862 [check-values
    section 4, COMPUTED and reproduced by pingouin 0.7.0 plot_blandaltman]. Tolerance 1e-3."""
    lim = limits_of_agreement(np.array(WRIGHT1) - np.array(MINI1))
    assert lim.n == 17
    assert lim.bias == pytest.approx(-2.1176, abs=1e-4)
    assert lim.sd == pytest.approx(38.765, abs=1e-3)
    assert lim.low == pytest.approx(-78.097, abs=1e-3)
    assert lim.high == pytest.approx(73.862, abs=1e-3)


def test_it_gives_the_2_sd_limits_printed_in_1986_from_the_rounded_figures():
    """The 1986 paper prints -79.7 to 75.5 with 2 SD from the rounded mean -2.1 and SD 38.8
    [check-values section 4, SRC]; with unrounded values 2 SD gives -79.65 and 75.41."""
    lim = limits_of_agreement(np.array(WRIGHT1) - np.array(MINI1), z=2.0)
    assert lim.low == pytest.approx(-2.1 - 2 * 38.8, abs=0.1)
    assert lim.high == pytest.approx(-2.1 + 2 * 38.8, abs=0.15)


def test_it_draws_the_bland_altman_lines_at_the_published_values():
    """The drawn bias and limit lines sit at the Lancet 1986 values (check-values section 4);
    the SVG holds one element per line and the 17 subjects' markers."""
    fig = figures.bland_altman_figure(lancet_pairs(), "Wright minus mini")
    assert line(fig, "bias-x").get_ydata()[0] == pytest.approx(-2.1176, abs=1e-4)
    assert line(fig, "low-x").get_ydata()[0] == pytest.approx(-78.097, abs=1e-3)
    assert line(fig, "high-x").get_ydata()[0] == pytest.approx(73.862, abs=1e-3)
    svg = figures.svg_text(fig)
    for gid in ("bias-x", "low-x", "high-x"):
        assert svg.count(f'id="{gid}"') == 1
    assert group(svg, "pairs-x").count("<use ") == 17
    assert 'id="bias-y"' not in svg  # no y pairs: that panel says so instead of drawing lines
    assert [t.get_text() for t in fig.axes[1].texts] == ["fewer than 2 pairs"]


def test_the_same_data_give_the_same_svg_bytes():
    first = figures.bland_altman_svg(lancet_pairs(), "Wright minus mini")
    again = figures.bland_altman_svg(lancet_pairs(), "Wright minus mini")
    assert first == again
    assert "<dc:date>" not in first


def test_it_marks_the_cusum_alarm_of_montgomery_example_9_1():
    """Montgomery Example 9.1 (mu0 = 10, sigma = 1, k = 0.5, h = 5): C+ first exceeds h at
    observation 29 (C+ = 5.28) [check-values section 8b, SRC for periods 1-29]. The chart
    marks that observation and draws h; the top panel's trend is the least-squares line."""
    z = np.array(MONTGOMERY) - 10.0
    weeks = np.arange(30) / 7.0
    series = ErrorSeries(weeks=weeks, z=z, trend=ols_slope(weeks, z), cusum=cusum(z), h=5.0)
    fig = figures.error_time_figure(series, "reader")
    alarms = line(fig, "cusum-alarms")
    assert list(alarms.get_xdata()) == [29]
    assert alarms.get_ydata()[0] == pytest.approx(5.28, abs=0.005)
    assert line(fig, "cusum-h").get_ydata()[0] == 5.0
    upper = line(fig, "cusum-upper").get_ydata()
    assert upper[27] == pytest.approx(4.47, abs=0.005)  # observation 28, as printed
    trend = line(fig, "trend")
    fit = np.polyfit(weeks, z, 1)  # numpy's least squares as the reference
    assert trend.get_ydata()[-1] == pytest.approx(np.polyval(fit, weeks[-1]), abs=1e-9)


def test_it_draws_success_rates_at_the_toy_vector_values():
    """Errors 0, 1.5, 2.0, 2.4, 3.0, 2*sqrt(3) mm: with "<", the success rates at 2, 2.5, 3
    and 4 mm are 1/3, 2/3, 2/3 and 1 [check-values section 7, COMPUTED]."""
    errors = {"reader_a": np.array([0, 1.5, 2.0, 2.4, 3.0, 2 * np.sqrt(3)])}
    fig = figures.success_figure(errors, radii_mm=[2.0, 2.5, 3.0, 4.0])
    np.testing.assert_allclose(line(fig, "success-reader_a").get_ydata(),
                               [1 / 3, 2 / 3, 2 / 3, 1.0])


def test_it_draws_the_detector_as_its_own_line():
    errors = {"reader_a": np.array([1.0, 2.0]), "auto": np.array([0.5, 4.5])}
    fig = figures.success_figure(errors, detector="auto", radii_mm=[1.0, 5.0])
    np.testing.assert_allclose(line(fig, "success-auto").get_ydata(), [0.5, 1.0])
    assert "auto (detector)" in [t.get_text() for t in fig.axes[0].get_legend().get_texts()]


def test_it_draws_the_tolerance_circle_in_three_projections():
    points = pd.DataFrame({"reader": ["a", "b", "b"], "read": [1, 1, 2],
                           "x_mm": [1.0, -1.0, -0.5], "y_mm": [0.0, 2.0, 1.5],
                           "z_mm": [3.0, 0.0, 0.2]})
    fig = figures.points_figure(points, [0.0, 0.0, 0.0], 2.5, "case, landmark")
    circles = [p for ax in fig.axes for p in ax.patches if (p.get_gid() or "").startswith("tol")]
    assert [c.get_radius() for c in circles] == [2.5, 2.5, 2.5]
    coronal = line(fig, "reader-coronal-a-1")  # x horizontal, z vertical
    assert (coronal.get_xdata()[0], coronal.get_ydata()[0]) == (1.0, 3.0)
    sagittal = line(fig, "reader-sagittal-b-2")  # y horizontal, z vertical, hollow repeat
    assert (sagittal.get_xdata()[0], sagittal.get_ydata()[0]) == (1.5, 0.2)
    assert sagittal.get_markerfacecolor() == "none"
    svg = figures.svg_text(fig)
    assert all(f'id="tolerance-{v}"' in svg for v in ("axial", "coronal", "sagittal"))


def test_it_plots_every_inter_reader_distance_per_landmark():
    table, _ = make_placements(n_cases=5, n_landmarks=2, n_readers=3, repeat_cases=0)
    pairwise = quantities.pairwise_long(quantities.derive(table))
    assert len(pairwise) == 5 * 2 * 3  # 3 reader pairs per case and landmark
    svg = figures.distance_svg(pairwise)
    assert group(svg, "distances-LM0").count("<use ") == 15
    assert group(svg, "distances-LM1").count("<use ") == 15


def test_the_pair_and_repeat_differences_follow_the_placements():
    """Hand check: differences are reader a minus reader b on the same axis, and first read
    minus repeat read for one reader."""
    table, _ = make_placements(n_cases=4, n_landmarks=2, n_readers=2, repeat_cases=2)
    derived = quantities.derive(table)
    pairs = quantities.reader_pair_differences(derived, "reader_a", "reader_b")
    first = table[table["read"] == 1].set_index(["case", "landmark", "reader"])
    row = pairs[(pairs["case"] == "case002") & (pairs["landmark"] == "LM1")
                & (pairs["axis"] == "y")]
    a, b = first.loc[("case002", "LM1", "reader_a"), "y_mm"], first.loc[("case002", "LM1",
                                                                          "reader_b"), "y_mm"]
    assert row["difference_mm"].item() == pytest.approx(a - b)
    assert row["mean_mm"].item() == pytest.approx((a + b) / 2)
    repeats = quantities.repeat_differences(derived, "reader_b")
    n_repeat = ((table["read"] == 2) & (table["reader"] == "reader_b")).sum()
    assert len(repeats) == 3 * n_repeat


def test_the_error_series_alarms_match_the_drift_table():
    """The figure's CUSUM is the drift table's: same alarms for every reader."""
    table, _ = make_placements(n_cases=14, n_landmarks=3, n_readers=3, repeat_cases=4, seed=11)
    drift = run_analysis(table).tables["drift"].set_index("reader")
    derived = quantities.derive(table)
    for reader in drift.index:
        series = quantities.error_series(derived, reader)
        assert series.cusum.n_alarms == drift.loc[reader, "cusum_alarms"]
        assert series.z.size == drift.loc[reader, "n"]


def test_it_refuses_unknown_readers_and_tables_without_their_columns():
    table, _ = make_placements(n_cases=3, n_landmarks=1, n_readers=2, repeat_cases=0)
    derived = quantities.derive(table)
    with pytest.raises(ReportingInputError, match="'nobody'"):
        quantities.repeat_differences(derived, "nobody")
    with pytest.raises(ReportingInputError, match="'reader_a' twice"):
        quantities.reader_pair_differences(derived, "reader_a", "reader_a")
    with pytest.raises(ReportingInputError, match="difference_mm"):
        figures.bland_altman_figure(pd.DataFrame({"axis": [], "mean_mm": []}), "t")
    with pytest.raises(ReportingInputError, match="-1"):
        figures.points_figure(pd.DataFrame(columns=["reader", "read", "x_mm", "y_mm", "z_mm"]),
                              [0, 0, 0], -1.0, "t")


def test_the_reporting_core_imports_without_django():
    code = ("import sys\n"
            "import studies.reporting.figures, studies.reporting.methods\n"
            "import studies.reporting.quantities, studies.reporting.progress\n"
            "import studies.reporting.tables\n"
            "print(any(k.startswith('django') for k in sys.modules))\n")
    proc = subprocess.run([sys.executable, "-c", code], cwd=ROOT, capture_output=True,
                          text=True, timeout=180)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.split() == ["False"]
