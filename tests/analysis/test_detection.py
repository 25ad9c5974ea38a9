"""Tests for studies.analysis.detection: MRE/SDR summaries and the Williams index.

Expected values: the shared check-values notes section 7 (toy error vector,
computed) and section 5 (three Williams index worked examples, computed from
the Chalana & Kim 1997 disagreement form with the jackknife over cases).
"""

from __future__ import annotations

import numpy as np
import pytest

from studies.analysis.detection import (
    DetectionInputError,
    detection_summary,
    success_rate_curve,
    williams_index,
)

TOY_ERRORS_MM = [0.0, 1.5, 2.0, 2.4, 3.0, 2.0 * np.sqrt(3.0)]


def distances(points_crk3: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Split (n_cases, 1 + n_readers, 3) points (detector first) into d0 and dpair."""
    pts = np.asarray(points_crk3, dtype=float)
    diff = pts[:, :, None, :] - pts[:, None, :, :]
    dist = np.linalg.norm(diff, axis=-1)
    return dist[:, 0, 1:], dist[:, 1:, 1:]


def example_3_points() -> np.ndarray:
    r1 = [(0, 0, 0), (0, 0, 0), (1, 1, 1), (0, 0, 0)]
    r2 = [(1, 0, 0), (2, 0, 0), (1, 1, 0), (0, 3, 0)]
    r3 = [(0, 1, 0), (0, 0, 2), (0, 1, 1), (0, 0, 1)]
    a = [(0, 0, 1), (1, 1, 0), (1, 0, 1), (2, 0, 0)]
    return np.stack([a, r1, r2, r3], axis=1).astype(float)


def test_it_reproduces_the_toy_summary_with_strict_radii():
    """check-values 7 toy vector [COMPUTED]: MRE 2.0607, SD 1.2273 (n - 1), SDR with
    '<' = 0.3333, 0.6667, 0.6667, 1 at 2, 2.5, 3, 4 mm (printed to 4 dp, tolerance 5e-5)."""
    out = detection_summary(TOY_ERRORS_MM)
    assert out["n"] == 6
    assert out["mre_mm"] == pytest.approx(2.0607, abs=5e-5)
    assert out["sd_mm"] == pytest.approx(1.2273, abs=5e-5)
    assert out["median_mm"] == pytest.approx(2.2, abs=1e-12)
    expected = {"sdr_2mm": 1 / 3, "sdr_2_5mm": 2 / 3, "sdr_3mm": 2 / 3, "sdr_4mm": 1.0}
    for key, value in expected.items():
        assert out[key] == pytest.approx(value, abs=1e-12), key


def test_it_reproduces_the_toy_summary_with_inclusive_radii():
    """check-values 7 toy vector, '<=' column: 0.5, 0.6667, 0.8333, 1 (exact fractions)."""
    out = detection_summary(TOY_ERRORS_MM, strict=False)
    got = [out[k] for k in ("sdr_2mm", "sdr_2_5mm", "sdr_3mm", "sdr_4mm")]
    np.testing.assert_allclose(got, [0.5, 2 / 3, 5 / 6, 1.0], atol=1e-12)


def test_it_ignores_nans_and_returns_nans_when_empty():
    """Contract: NaN errors (missing points) are ignored; an empty input gives n = 0 and
    NaN everywhere else, with no exception."""
    out = detection_summary([*TOY_ERRORS_MM, np.nan])
    assert out["n"] == 6 and out["mre_mm"] == pytest.approx(2.0607, abs=5e-5)
    empty = detection_summary([np.nan])
    assert empty["n"] == 0
    assert all(np.isnan(v) for k, v in empty.items() if k != "n")


def test_it_draws_a_curve_that_matches_the_summary():
    """Consistency: the 0-5 mm curve is non-decreasing, equals the summary at the four
    radii, and reaches 1 past the largest error (exact)."""
    radii = np.linspace(0.0, 5.0, 51)
    curve = success_rate_curve(TOY_ERRORS_MM, radii)
    assert np.all(np.diff(curve) >= 0) and curve[-1] == 1.0 and curve[0] == 0.0
    assert curve[20] == pytest.approx(1 / 3) and curve[30] == pytest.approx(2 / 3)


def test_it_rejects_negative_errors():
    """Input contract: a ValueError subclass whose message quotes the bad value."""
    with pytest.raises(DetectionInputError, match="-1"):
        detection_summary([1.0, -1.0])


def test_it_reproduces_williams_example_1():
    """check-values 5, example 1 [COMPUTED]: one case, readers at (0,0,0), (2,0,0),
    (0,2,0), detector at (1,1,0): I' = 3 / (sqrt 2 + 0.5) = 1.567223 (tolerance 1e-6).
    A single case has no jackknife interval."""
    pts = np.array([[[1, 1, 0], [0, 0, 0], [2, 0, 0], [0, 2, 0]]], dtype=float)
    result = williams_index(*distances(pts))
    assert result.index == pytest.approx(1.567223, abs=1e-6)
    assert np.isnan(result.se) and "confidence interval" in result.verdict


def test_it_gives_exactly_one_when_all_distances_are_equal():
    """check-values 5, example 2: detector at the apex of the regular tetrahedron over a
    unit equilateral triangle of readers; all distances 1, so I' = 1 (tolerance 1e-12)."""
    apex = (0.5, np.sqrt(3) / 6, np.sqrt(2 / 3))
    pts = np.array([[apex, (0, 0, 0), (1, 0, 0), (0.5, np.sqrt(3) / 2, 0)]], dtype=float)
    assert williams_index(*distances(pts)).index == pytest.approx(1.0, abs=1e-12)


def test_it_reproduces_the_jackknife_example():
    """check-values 5, example 3 [COMPUTED]: I' = 0.975792, jackknife SE = 0.124980,
    95% CI 0.730832 to 1.220752 (contains 1, so 'as well as'); tolerance 1e-6."""
    result = williams_index(*distances(example_3_points()))
    assert result.index == pytest.approx(0.975792, abs=1e-6)
    assert result.se == pytest.approx(0.124980, abs=1e-6)
    assert result.ci_low == pytest.approx(0.730832, abs=1e-6)
    assert result.ci_high == pytest.approx(1.220752, abs=1e-6)
    assert result.verdict == "agrees with the readers as well as they agree with each other"


def test_it_reproduces_the_leave_one_case_out_values():
    """check-values 5, example 3: leave-one-case-out I' = 0.989477, 0.860936, 0.989477,
    1.061006 (tolerance 1e-6), computed here by calling the index on 3 of the 4 cases."""
    pts = example_3_points()
    loo = [williams_index(*distances(np.delete(pts, c, axis=0))).index for c in range(4)]
    np.testing.assert_allclose(loo, [0.989477, 0.860936, 0.989477, 1.061006], atol=1e-6)


def test_it_does_not_depend_on_the_order_of_readers():
    """Property: permuting readers leaves index and SE unchanged (tolerance 1e-12)."""
    d0, dpair = distances(example_3_points())
    order = [2, 0, 1]
    permuted = williams_index(d0[:, order], dpair[:, order][:, :, order])
    plain = williams_index(d0, dpair)
    assert (permuted.index, permuted.se) == pytest.approx((plain.index, plain.se), abs=1e-12)


def test_it_averages_each_pair_over_the_cases_both_placed():
    """Missing points: a NaN distance is left out of that pair's mean only. Hand check:
    drop reader 3 on case 1 and compare with I' from the means taken by hand (1e-12)."""
    d0, dpair = distances(example_3_points())
    d0[0, 2] = np.nan
    dpair[0, 2, :] = dpair[0, :, 2] = np.nan
    d_0j = np.nanmean(d0, axis=0)
    d_jk = [np.nanmean(dpair[:, a, b]) for a, b in ((0, 1), (0, 2), (1, 2))]
    expected = np.mean(1 / d_0j) / np.mean(1 / np.asarray(d_jk))
    assert williams_index(d0, dpair).index == pytest.approx(expected, abs=1e-12)


def test_it_says_less_well_when_the_detector_is_far_off():
    """Verdict rule (Zavaletta et al. 2007, check-values 5): a CI entirely below 1 means
    the detector agrees less well. Seeded: readers SD 1 mm per axis, detector SD 4 mm."""
    rng = np.random.default_rng(2)
    truth = rng.uniform(-50, 50, size=(30, 1, 3))
    readers = truth + rng.normal(0, 1.0, size=(30, 3, 3))
    detector = truth + rng.normal(0, 4.0, size=(30, 1, 3))
    result = williams_index(*distances(np.concatenate([detector, readers], axis=1)))
    assert result.ci_high < 1.0
    assert result.verdict == "agrees with the readers less well than they agree with each other"


def test_it_says_closer_when_the_detector_sits_at_the_readers_centre():
    """Verdict rule: a CI entirely above 1 means the detector is closer to the readers
    than they are to each other. Seeded: detector at the true point, readers SD 1 mm."""
    rng = np.random.default_rng(4)
    truth = rng.uniform(-50, 50, size=(30, 1, 3))
    readers = truth + rng.normal(0, 1.0, size=(30, 4, 3))
    result = williams_index(*distances(np.concatenate([truth, readers], axis=1)))
    assert result.ci_low > 1.0
    assert result.verdict == "closer to the readers than they are to each other"


def test_it_guards_zero_distance_and_a_single_reader():
    """check-values 5, example 4: a detector on a reader's point in every case makes
    D_0j = 0 and the index undefined; one reader has no reader pairs. NaN, no exception."""
    pts = example_3_points()
    pts[:, 0] = pts[:, 1]
    zero = williams_index(*distances(pts))
    assert np.isnan(zero.index) and "0 mm" in zero.verdict
    d0, dpair = distances(example_3_points()[:, :2])
    single = williams_index(d0, dpair)
    assert np.isnan(single.index) and "at least 2 readers" in single.verdict


def test_it_rejects_mismatched_shapes_and_asymmetric_pairs():
    """Input contract: ValueError subclass naming the problem and quoting the shape."""
    d0, dpair = distances(example_3_points())
    with pytest.raises(DetectionInputError, match=r"\(4, 3, 3\)"):
        williams_index(d0, dpair[:, :2, :2])
    dpair[0, 0, 1] += 1.0
    with pytest.raises(DetectionInputError, match="symmetric"):
        williams_index(d0, dpair)
