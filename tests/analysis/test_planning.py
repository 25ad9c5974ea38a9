"""Tests for studies.analysis.planning (closed forms, simulation, design preview).

References: scipy 1.17.1 stats.maxwell (mean and variance of the Maxwell
distribution), seeded Monte Carlo with stated tolerances, and hand arithmetic
for the workload figures.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from studies.analysis.planning import (
    PlanningInputError,
    design_preview,
    expected_consensus_mre,
    pairwise_ci_width,
    repeats_for,
)


@pytest.mark.parametrize(("s", "k"), [(1.0, 1), (1.5, 3), (2.2, 5)])
def test_it_equals_the_maxwell_mean(s, k):
    """Reference library scipy 1.17.1: stats.maxwell.mean(scale=s/sqrt(k)) (tolerance 1e-12)."""
    expected = stats.maxwell.mean(scale=s / math.sqrt(k))
    assert expected_consensus_mre(s, k) == pytest.approx(expected, abs=1e-12)


def test_it_matches_a_monte_carlo_of_the_mean_of_k_readers():
    """Seeded Monte Carlo: 200,000 draws of the mean of k = 3 isotropic Gaussian errors
    (s = 1.5 mm); the mean radial error agrees within 0.5% (about 10 standard errors)."""
    rng = np.random.default_rng(42)
    consensus = rng.normal(0.0, 1.5, size=(200_000, 3, 3)).mean(axis=1)
    simulated = np.linalg.norm(consensus, axis=1).mean()
    assert simulated == pytest.approx(expected_consensus_mre(1.5, 3), rel=0.005)


def test_it_gives_the_closed_form_pairwise_mean_and_a_covering_interval():
    """Closed form: the distance of two readers is Maxwell with scale s sqrt 2 (scipy 1.17.1,
    tolerance 1e-12); the simulated 95% range contains it (seeded)."""
    out = pairwise_ci_width(100, 3, 1.2)
    assert out["expected_mean_pairwise_mm"] == pytest.approx(
        stats.maxwell.mean(scale=1.2 * math.sqrt(2)), abs=1e-12
    )
    assert out["ci_low"] < out["expected_mean_pairwise_mm"] < out["ci_high"]
    assert out["width_mm"] == pytest.approx(out["ci_high"] - out["ci_low"], abs=1e-15)


def test_it_matches_the_normal_approximation_for_two_readers():
    """For k = 2 the n case distances are independent Maxwell(scale s sqrt 2); by the central
    limit theorem the 95% width is about 2 * 1.96 * sqrt(var / n), var from scipy 1.17.1
    stats.maxwell.var. Seeded, n_sim = 4000; tolerance 6% (percentile noise about 2%)."""
    s, n = 1.0, 80
    out = pairwise_ci_width(n, 2, s, n_sim=4000, seed=1)
    var = stats.maxwell.var(scale=s * math.sqrt(2))
    assert out["width_mm"] == pytest.approx(2 * 1.96 * math.sqrt(var / n), rel=0.06)


def test_it_agrees_with_a_plain_loop_simulation():
    """Independent check: a slow per-study loop with another seed, computing the mean of all
    reader-pair distances with scipy.spatial.distance.pdist (scipy 1.17.1); the widths agree
    within 15% (each is estimated from 600 studies)."""
    from scipy.spatial.distance import pdist

    rng = np.random.default_rng(99)
    values = []
    for _ in range(600):
        errors = rng.normal(0, 1.0, size=(30, 4, 3))
        values.append(np.mean([pdist(case).mean() for case in errors]))
    low, high = np.percentile(values, [2.5, 97.5])
    out = pairwise_ci_width(30, 4, 1.0, n_sim=600, seed=5)
    assert out["width_mm"] == pytest.approx(high - low, rel=0.15)


def test_it_is_reproducible_and_scales_with_the_sd():
    """Seeded: the same seed gives the same figures; the errors are s times standard
    normals, so doubling s doubles every figure (tolerance 1e-12)."""
    one = pairwise_ci_width(20, 3, 1.0, n_sim=200, seed=3)
    assert one == pairwise_ci_width(20, 3, 1.0, n_sim=200, seed=3)
    two = pairwise_ci_width(20, 3, 2.0, n_sim=200, seed=3)
    for key, value in one.items():
        assert two[key] == pytest.approx(2 * value, rel=1e-12), key


def test_it_previews_the_workload_of_a_balanced_design():
    """Hand arithmetic: 50 cases x 3 readers = 150 first reads over 4 readers -> 37 or 38
    each (2 readers get 38); 20% repeats rounded half up -> 7 or 8 (0.2 * 37 = 7.4,
    0.2 * 38 = 7.6); 12 minutes a read -> 44 * 12 / 60 = 8.8 h and 46 * 12 / 60 = 9.2 h."""
    out = design_preview(50, 4, 3, 0.2, 12.0, 1.5)
    assert out["first_reads_total"] == 150
    assert (out["reads_per_reader_min"], out["reads_per_reader_max"]) == (44, 46)
    assert out["repeat_reads_total"] == 2 * 7 + 2 * 8
    assert out["total_reads"] == 180
    assert out["hours_per_reader_min"] == pytest.approx(8.8)
    assert out["hours_per_reader_max"] == pytest.approx(9.2)
    assert out["expected_consensus_mre_mm"] == pytest.approx(expected_consensus_mre(1.5, 3))
    assert out["pairwise_ci_width_mm"] == pytest.approx(pairwise_ci_width(50, 3, 1.5)["width_mm"])


def test_it_rounds_repeat_counts_half_up():
    """Documented rule floor(f * n + 0.5): 0.5 * 3 = 1.5 -> 2, 0.1 * 4 = 0.4 -> 0."""
    assert (repeats_for(3, 0.5), repeats_for(4, 0.1), repeats_for(10, 0.0)) == (2, 0, 0)


def test_it_rejects_impossible_designs():
    """Input contract: a ValueError subclass whose message quotes the offending value."""
    with pytest.raises(PlanningInputError, match="got 5"):
        design_preview(10, 4, 5, 0.1, 10, 1.0)
    with pytest.raises(PlanningInputError, match=r"1\.5"):
        design_preview(10, 4, 3, 1.5, 10, 1.0)
    with pytest.raises(PlanningInputError, match="got 1"):
        pairwise_ci_width(10, 1, 1.0)
    with pytest.raises(PlanningInputError, match=r"-0\.5"):
        expected_consensus_mre(-0.5, 3)
