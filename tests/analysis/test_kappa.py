"""Fleiss' kappa against the Wikipedia worked example, Fleiss (1971) and statsmodels."""

from __future__ import annotations

import numpy as np
import pytest
from statsmodels.stats.inter_rater import aggregate_raters
from statsmodels.stats.inter_rater import fleiss_kappa as sm_fleiss_kappa

from studies.analysis.kappa import fleiss_kappa

# Wikipedia "Fleiss' kappa" worked example: 10 subjects, 14 raters, 5 categories.
WIKIPEDIA = np.array([
    [0, 0, 0, 0, 14], [0, 2, 6, 4, 2], [0, 0, 3, 5, 6], [0, 3, 9, 2, 0], [2, 2, 8, 1, 1],
    [7, 7, 0, 0, 0], [3, 2, 6, 3, 0], [2, 5, 3, 2, 2], [6, 5, 2, 1, 0], [0, 2, 2, 3, 7],
])
# Fleiss (1971): 30 patients x 6 diagnoses (R irr::diagnoses; check-values.md section 2b).
DIAGNOSES = np.array([
    [4, 2, 2, 5, 2, 1, 3, 1, 1, 5, 1, 1, 2, 1, 2, 3, 1, 1, 2, 1, 5, 2, 2, 1, 1, 2, 1, 2, 1, 5],
    [4, 2, 3, 5, 2, 1, 3, 1, 1, 5, 4, 2, 2, 4, 2, 3, 1, 1, 2, 3, 5, 4, 2, 1, 4, 2, 1, 2, 3, 5],
    [4, 2, 3, 5, 2, 3, 3, 3, 4, 5, 4, 4, 2, 4, 4, 3, 1, 1, 4, 3, 5, 4, 4, 4, 4, 2, 1, 4, 3, 5],
    [4, 5, 3, 5, 4, 3, 3, 3, 4, 5, 4, 4, 3, 4, 4, 3, 4, 1, 4, 5, 5, 4, 5, 4, 4, 2, 1, 4, 3, 5],
    [4, 5, 3, 5, 4, 3, 5, 3, 4, 5, 4, 4, 3, 4, 4, 3, 5, 1, 4, 5, 5, 4, 5, 4, 4, 2, 5, 4, 3, 5],
    [4, 5, 5, 5, 4, 3, 5, 4, 4, 5, 4, 4, 3, 4, 5, 5, 5, 2, 4, 5, 5, 4, 5, 4, 5, 4, 5, 4, 3, 5],
]).T


def test_it_reproduces_the_wikipedia_worked_example():
    """Wikipedia table: kappa 0.210 printed; 0.20993070442195522 from statsmodels 0.15.0
    (check-values.md section 2a), to 1e-12."""
    res = fleiss_kappa(WIKIPEDIA)
    assert abs(res.kappa - 0.210) <= 0.0005
    assert res.kappa == pytest.approx(0.20993070442195522, abs=1e-12)
    assert res.p_bar == pytest.approx(0.378022, abs=1e-6)
    assert res.p_e == pytest.approx(0.212755, abs=1e-6)


def test_it_reproduces_fleiss_1971_diagnoses():
    """Fleiss 1971 data: kappa .430 (R irr prints 0.43); 0.430245 via statsmodels."""
    counts, _ = aggregate_raters(DIAGNOSES)
    res = fleiss_kappa(counts)
    assert res.kappa == pytest.approx(0.430245, abs=1e-6)
    assert res.kappa == pytest.approx(sm_fleiss_kappa(counts, method="fleiss"), abs=1e-12)


def test_it_matches_statsmodels_on_a_batch_of_random_tables():
    """statsmodels.stats.inter_rater.fleiss_kappa on 6 seeded tables (7 raters, 3 categories)."""
    rng = np.random.default_rng(11)
    ratings = rng.integers(0, 3, size=(6, 25, 7))
    ratings[:, :10] = ratings[:, :10, :1]  # some agreement beyond chance
    counts = np.stack([aggregate_raters(r, n_cat=3)[0] for r in ratings])
    res = fleiss_kappa(counts)
    for b in range(6):
        assert res.kappa[b] == pytest.approx(sm_fleiss_kappa(counts[b]), abs=1e-12)


def test_it_pools_categories_over_subjects_with_unequal_numbers_of_raters():
    """With unequal m_i, P_i uses each subject's m_i and p_j pools all ratings (common practice);
    a subject with one rating is left out. Hand computation of the formula in the docstring."""
    counts = np.array([[3, 0], [1, 1], [0, 4], [1, 0]])
    p_i = np.array([1.0, 0.0, 1.0])
    p_j = np.array([4, 5]) / 9
    expected = (p_i.mean() - (p_j**2).sum()) / (1 - (p_j**2).sum())
    res = fleiss_kappa(counts)
    assert res.n_subjects == 3
    assert res.kappa == pytest.approx(expected, abs=1e-12)


def test_it_returns_nan_when_every_rating_is_the_same():
    res = fleiss_kappa(np.array([[5, 0], [5, 0]]))
    assert np.isnan(res.kappa) and res.p_bar == 1.0


def test_it_rejects_negative_counts():
    with pytest.raises(ValueError, match="non-negative"):
        fleiss_kappa(np.array([[1, -1]]))
