"""Planning a reader study: expected precision and reading workload.

Closed forms and a seeded simulation used by the study-design page to show,
before a study opens, how precise its consensus points and agreement figures
are likely to be and how much reading it asks of each reader. Placement
errors are modelled as isotropic 3D Gaussians in world mm with per-axis SD s.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = [
    "PlanningInputError",
    "design_preview",
    "expected_consensus_mre",
    "pairwise_ci_width",
    "repeats_for",
]

MAXWELL_MEAN_FACTOR = 2.0 * math.sqrt(2.0 / math.pi)


class PlanningInputError(ValueError):
    """Raised when a design parameter is out of range; the message quotes it."""


def _positive_int(name: str, value: object, minimum: int = 1) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise PlanningInputError(f"{name} must be an integer >= {minimum}, got {value!r}")
    return int(value)


def _non_negative(name: str, value: object) -> float:
    try:
        number = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError) as exc:
        raise PlanningInputError(f"{name} must be a number >= 0, got {value!r}") from exc
    if not math.isfinite(number) or number < 0:
        raise PlanningInputError(f"{name} must be a finite number >= 0, got {value!r}")
    return number


def expected_consensus_mre(sd_axis_mm: float, k: int) -> float:
    """Expected radial error (mm) of the mean of k readers' points.

    Parameters
    ----------
    sd_axis_mm : float, mm
        Per-axis SD s of one reader's placement error (world mm).
    k : int
        Number of readers whose points are averaged.

    Returns
    -------
    float, mm
        2 (s / sqrt k) sqrt(2 / pi).

    Notes
    -----
    The mean of k independent isotropic Gaussian errors of per-axis SD s is an
    isotropic Gaussian of per-axis SD s / sqrt(k); its length follows a Maxwell
    distribution with scale a = s / sqrt(k), whose mean is 2 a sqrt(2 / pi).
    Assumes unbiased, independent readers of equal SD; bias does not average out.

    References
    ----------
    1. Johnson NL, Kotz S, Balakrishnan N. Continuous Univariate Distributions,
       vol. 1, 2nd ed. New York: Wiley; 1994. Chi distribution, 3 df (from memory).
    """
    s = _non_negative("sd_axis_mm", sd_axis_mm)
    k = _positive_int("k", k)
    return MAXWELL_MEAN_FACTOR * s / math.sqrt(k)


def pairwise_ci_width(
    n_cases: int, k: int, sd_axis_mm: float, n_sim: int = 500, seed: int = 0
) -> dict[str, float]:
    """Spread of a landmark's mean pairwise reader distance over n cases x k readers.

    Parameters
    ----------
    n_cases : int
        Cases in the study.
    k : int
        Readers per case (at least 2).
    sd_axis_mm : float, mm
        Per-axis SD of one reader's placement error.
    n_sim : int, default 500
        Simulated studies.
    seed : int, default 0
        Seed of the numpy Generator; the same arguments give the same result.

    Returns
    -------
    dict
        ``expected_mean_pairwise_mm``: closed-form mean distance between two readers,
        2 (s sqrt 2) sqrt(2 / pi); ``ci_low`` and ``ci_high``: the 2.5th and 97.5th
        percentiles (mm) of the simulated mean pairwise distance; ``width_mm``: their
        difference.

    Notes
    -----
    The difference of two readers' errors is Gaussian with per-axis SD s sqrt(2), so
    the distance between them is Maxwell with scale s sqrt(2). Each simulated study
    draws n_cases x k error vectors, takes the mean over the k (k - 1) / 2 reader pairs
    of each case and then over cases; the percentiles over n_sim studies give the
    range within which 95% of such studies' figures fall. Pairs on one case share
    readers, so they are not independent; the simulation accounts for that.
    """
    n_cases = _positive_int("n_cases", n_cases)
    k = _positive_int("k", k, minimum=2)
    n_sim = _positive_int("n_sim", n_sim, minimum=2)
    s = _non_negative("sd_axis_mm", sd_axis_mm)
    rng = np.random.default_rng(seed)
    first, second = np.triu_indices(k, k=1)
    # Simulated studies in blocks of about 2 million coordinates, to bound memory.
    block = max(1, 2_000_000 // (n_cases * first.size * 3))
    mean_pairwise = np.empty(n_sim)
    for start in range(0, n_sim, block):
        stop = min(n_sim, start + block)
        errors = rng.standard_normal((stop - start, n_cases, k, 3))
        diff = errors[:, :, first, :] - errors[:, :, second, :]
        dist = np.sqrt(np.einsum("scpa,scpa->scp", diff, diff))
        mean_pairwise[start:stop] = s * dist.mean(axis=(1, 2))
    low, high = np.percentile(mean_pairwise, [2.5, 97.5])
    return {
        "expected_mean_pairwise_mm": MAXWELL_MEAN_FACTOR * s * math.sqrt(2.0),
        "ci_low": float(low),
        "ci_high": float(high),
        "width_mm": float(high - low),
    }


def repeats_for(first_reads: int, repeat_fraction: float) -> int:
    """Repeat reads for a reader with ``first_reads`` first reads.

    The fraction of a reader's cases read again, rounded half up:
    floor(repeat_fraction * first_reads + 0.5). The simulator uses the same rule.
    """
    fraction = _non_negative("repeat_fraction", repeat_fraction)
    if fraction > 1:
        raise PlanningInputError(f"repeat_fraction must lie in [0, 1], got {repeat_fraction!r}")
    return math.floor(fraction * first_reads + 0.5)


def design_preview(
    n_cases: int,
    n_readers: int,
    k: int,
    repeat_fraction: float,
    minutes_per_read: float,
    sd_axis_mm: float,
) -> dict[str, float]:
    """Workload and expected precision of a balanced study design.

    Parameters
    ----------
    n_cases : int
        Cases in the study.
    n_readers : int
        Readers invited.
    k : int
        Readers per case, 2 <= k <= n_readers.
    repeat_fraction : float
        Fraction (0..1) of each reader's cases read a second time after the washout.
    minutes_per_read : float, minutes
        Expected reading time of one read (all landmarks of one case).
    sd_axis_mm : float, mm
        Expected per-axis SD of one reader's placement error.

    Returns
    -------
    dict
        ``first_reads_total`` (n_cases k), ``repeat_reads_total``, ``total_reads``;
        ``reads_per_reader_min`` / ``_max`` (first reads plus repeats);
        ``hours_per_reader_min`` / ``_max``; ``expected_consensus_mre_mm`` (see
        `expected_consensus_mre`); ``expected_mean_pairwise_mm``,
        ``pairwise_ci_low_mm``, ``pairwise_ci_high_mm`` and ``pairwise_ci_width_mm``
        (see `pairwise_ci_width`, default simulation budget and seed).

    Notes
    -----
    A balanced design gives each reader floor or ceil of n_cases k / n_readers first
    reads ((n_cases k) mod n_readers readers get the larger number); each reader then
    repeats `repeats_for` of their own first reads.
    """
    n_cases = _positive_int("n_cases", n_cases)
    n_readers = _positive_int("n_readers", n_readers, minimum=2)
    k = _positive_int("k", k, minimum=2)
    if k > n_readers:
        raise PlanningInputError(f"k must not exceed n_readers ({n_readers}), got {k!r}")
    minutes = _non_negative("minutes_per_read", minutes_per_read)
    first_total = n_cases * k
    low_first, n_high = divmod(first_total, n_readers)
    high_first = low_first + (1 if n_high else 0)
    low_reads = low_first + repeats_for(low_first, repeat_fraction)
    high_reads = high_first + repeats_for(high_first, repeat_fraction)
    repeats_total = (n_readers - n_high) * repeats_for(low_first, repeat_fraction) + (
        n_high * repeats_for(high_first, repeat_fraction)
    )
    spread = pairwise_ci_width(n_cases, k, sd_axis_mm)
    return {
        "first_reads_total": first_total,
        "repeat_reads_total": repeats_total,
        "total_reads": first_total + repeats_total,
        "reads_per_reader_min": low_reads,
        "reads_per_reader_max": high_reads,
        "hours_per_reader_min": low_reads * minutes / 60.0,
        "hours_per_reader_max": high_reads * minutes / 60.0,
        "expected_consensus_mre_mm": expected_consensus_mre(sd_axis_mm, k),
        "expected_mean_pairwise_mm": spread["expected_mean_pairwise_mm"],
        "pairwise_ci_low_mm": spread["ci_low"],
        "pairwise_ci_high_mm": spread["ci_high"],
        "pairwise_ci_width_mm": spread["width_mm"],
    }
