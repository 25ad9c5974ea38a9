"""Recovery tests: the whole analysis on simulated studies with known truth.

Each study comes from studies.analysis.simulate with a fixed seed, so the true
reader noise, bias and drift and the true landmark points are known. The
tests run studies.analysis.pipeline.run_analysis and check that its estimates
recover the truth: 95% intervals cover the true value in at least 90% of the
simulations (nominal 95%, so 90% leaves room for Monte Carlo noise: with 200
simulations the binomial SD of a 95% coverage is 1.5 points).

Expected values are derived here from the simulation model, with the
distribution facts checked against scipy 1.17.1 (noncentral chi-square,
Hotelling's F form, chi-square).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from scipy.special import erf

from studies.analysis.pipeline import run_analysis
from studies.analysis.simulate import ReaderModel, predictions_from, simulate_study
from studies.analysis.trend import ols_slope

XYZ = ["x_mm", "y_mm", "z_mm"]
START = pd.Timestamp("2026-01-05T08:00:00Z")
N_SIM = 200
DRIFT = np.array([0.0, 0.6, 0.0])  # mm per week
BIAS = np.array([1.5, 0.0, -1.0])  # mm
MIXED_READERS = [
    ReaderModel("steady-a", sd_mm=1.0),
    ReaderModel("steady-b", sd_mm=1.0),
    ReaderModel("biased", sd_mm=1.0, bias_mm=BIAS),
    ReaderModel("noisy", sd_mm=2.5),
    ReaderModel("drifting", sd_mm=1.0, drift_mm_per_week=DRIFT),
]


def expected_distance_mm(shift_mm: np.ndarray, sd_mm: float) -> np.ndarray:
    """Mean length of N(shift, sd^2 I) in 3-D: the noncentral chi (3 df) mean,
    sd [sqrt(2/pi) exp(-l^2/2) + (l + 1/l) erf(l/sqrt 2)] with l = |shift| / sd."""
    lam = np.maximum(np.asarray(shift_mm, dtype=float) / sd_mm, 1e-9)
    core = np.sqrt(2 / np.pi) * np.exp(-(lam**2) / 2) + (lam + 1 / lam) * erf(lam / np.sqrt(2))
    return sd_mm * core


def weeks_of(placements: pd.DataFrame) -> np.ndarray:
    """Weeks from the simulation start to each placement (placed_at, ISO 8601 UTC)."""
    seconds = (pd.to_datetime(placements["placed_at"], utc=True) - START).dt.total_seconds()
    return seconds.to_numpy() / (7 * 86400)


def drifting_readers_expected_slope(placements: pd.DataFrame) -> float:
    """E[OLS slope | times] of the drifting reader's distance to the mean of the others.

    The residual is the reader's error minus the mean of the 4 others' errors, so it is
    N(mu(t), s^2 I) with mu(t) = bias - mean(other biases) + drift t and
    s^2 = 1 + (1 + 1 + 1 + 2.5^2) / 16; the OLS slope is linear in y, so its expectation
    given the times is the OLS slope of E[distance | t]."""
    mine = placements[placements["reader"] == "drifting"]
    t = weeks_of(mine)
    others = [r for r in MIXED_READERS if r.name != "drifting"]
    sd = np.sqrt(1.0 + sum(r.sd_mm**2 for r in others) / len(others) ** 2)
    shift = -np.mean([r.bias_mm for r in others], axis=0) + np.outer(t, DRIFT)
    return ols_slope(t, expected_distance_mm(np.linalg.norm(shift, axis=1), sd)).slope


@pytest.fixture(scope="module")
def mixed_runs() -> list[dict]:
    """200 seeded studies (12 cases x 5 landmarks x 5 readers, 8 weeks, mean consensus)."""
    runs = []
    for seed in range(N_SIM):
        study = simulate_study(12, 5, MIXED_READERS, weeks=8, seed=seed)
        result = run_analysis(study.placements, consensus="mean")
        runs.append(
            {
                "drift": result.tables["drift"].set_index("reader"),
                "bias": result.tables["reader_bias"],
                "expected_slope": drifting_readers_expected_slope(study.placements),
                "drifting_weeks": weeks_of(
                    study.placements[study.placements["reader"] == "drifting"]
                ),
            }
        )
    return runs


def test_it_uses_the_right_mean_distance_for_a_shifted_gaussian():
    """The expected-distance helper equals sd * E[sqrt(X)], X ~ noncentral chi-square
    (3 df, noncentrality l^2), from scipy 1.17.1 stats.ncx2.expect (tolerance 1e-6)."""
    for shift, sd in ((0.0, 1.0), (0.8, 1.3), (4.0, 0.7)):
        ref = sd * stats.ncx2(df=3, nc=(shift / sd) ** 2 + 1e-12).expect(np.sqrt)
        assert expected_distance_mm(np.array([shift]), sd)[0] == pytest.approx(ref, abs=1e-6)


def test_it_covers_the_drifting_readers_true_slope(mixed_runs):
    """Drift table, 95% CI of slope_mm_per_week for a reader drifting 0.6 mm/week: covers
    the slope implied by the simulation model (see drifting_readers_expected_slope) in at
    least 90% of 200 simulations; the estimates average within 4 Monte Carlo SE of it."""
    covered = [
        run["drift"].loc["drifting", "slope_ci_low"]
        <= run["expected_slope"]
        <= run["drift"].loc["drifting", "slope_ci_high"]
        for run in mixed_runs
    ]
    assert np.mean(covered) >= 0.90
    error = [run["drift"].loc["drifting", "slope_mm_per_week"] - run["expected_slope"]
             for run in mixed_runs]  # fmt: skip
    assert abs(np.mean(error)) < 4 * np.std(error) / np.sqrt(N_SIM)


def test_it_covers_a_zero_slope_for_readers_who_do_not_drift(mixed_runs):
    """Readers without drift (steady, biased, noisy): their distance to the others' mean does
    not depend on their own read times, so the true slope is 0; the 95% CI covers 0 in at
    least 90% of 4 x 200 reader-simulations."""
    covered = [
        run["drift"].loc[r, "slope_ci_low"] <= 0.0 <= run["drift"].loc[r, "slope_ci_high"]
        for run in mixed_runs
        for r in ("steady-a", "steady-b", "biased", "noisy")
    ]
    assert np.mean(covered) >= 0.90


def test_it_raises_cusum_alarms_for_the_drifting_reader_and_rarely_for_steady_ones(mixed_runs):
    """Tabular CUSUM (k = 0.5, h = 5; Page 1954) on per-landmark standardised distances: the
    drifting reader alarms in at least 90% of 200 simulations; each steady reader in at
    most 25% (60 placements each; an in-control ARL of 465 would give about 12%, and
    distances are skewed, so the threshold leaves room: observed about 15-18%)."""
    alarm = {r.name: np.mean([run["drift"].loc[r.name, "cusum_alarms"] > 0
                              for run in mixed_runs]) for r in MIXED_READERS}  # fmt: skip
    assert alarm["drifting"] >= 0.90
    assert alarm["steady-a"] <= 0.25 and alarm["steady-b"] <= 0.25


def test_it_recovers_the_biased_readers_offset(mixed_runs):
    """Reader bias table: the biased reader's residual against the mean of the other four
    has expectation bias - (drift * mean time of the drifting reader) / 4 (the drifting
    reader is one of the four). Over 200 simulations the mean bias_x/y/z_mm (averaged over
    landmarks) is within 4 Monte Carlo SE of that, and Hotelling's T2 rejects zero bias
    (p < 0.05) on at least 90% of the reader x landmark rows."""
    got, want, p_values = [], [], []
    for run in mixed_runs:
        rows = run["bias"][run["bias"]["reader"] == "biased"]
        got.append(rows[["bias_x_mm", "bias_y_mm", "bias_z_mm"]].mean().to_numpy())
        want.append(BIAS - DRIFT * run["drifting_weeks"].mean() / 4)
        p_values.extend(rows["t2_p_value"].tolist())
    diff = np.asarray(got) - np.asarray(want)
    assert np.all(np.abs(diff.mean(axis=0)) < 4 * diff.std(axis=0) / np.sqrt(N_SIM))
    assert np.mean(np.asarray(p_values) < 0.05) >= 0.90


def consensus_errors(method: str, n_readers: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Errors (n, 3) of the consensus points against truth and their covariances (n, 3, 3)."""
    readers = [ReaderModel(f"reader-{i}", sd_mm=1.0) for i in range(n_readers)]
    study = simulate_study(N_SIM, 2, readers, seed=seed)
    table = run_analysis(study.placements, consensus=method).tables["consensus"]
    merged = table.merge(study.truth, on=["case", "landmark"], suffixes=("", "_true"))
    error = merged[XYZ].to_numpy() - merged[[c + "_true" for c in XYZ]].to_numpy()
    names = ["xx", "xy", "xz", "xy", "yy", "yz", "xz", "yz", "zz"]
    cov = merged[[f"cov_{n}" for n in names]].to_numpy().reshape(-1, 3, 3)
    return error, cov


@pytest.mark.parametrize("method", ["mean", "geomedian"])
def test_it_covers_true_points_with_the_unweighted_consensus_uncertainty(method):
    """Consensus table cov_* for 5 unbiased readers (SD 1 mm): the 95% region
    e' cov^-1 e <= (n-1) p / (n-p) F_0.95(p, n-p) (Hotelling's T2, n = 5 readers, p = 3;
    scipy 1.17.1 stats.f) covers the true point for at least 90% of 400 consensus points
    (200 cases x 2 landmarks; each point uses only its own readers, so the points are
    independent simulations). Exact for the mean; asymptotic for the geometric median."""
    error, cov = consensus_errors(method, 5, seed=11)
    t2 = np.einsum("ni,ni->n", error, np.linalg.solve(cov, error[..., None])[..., 0])
    limit = 4 * 3 / 2 * stats.f.ppf(0.95, 3, 2)
    assert np.mean(t2 <= limit) >= 0.90


def test_it_covers_true_points_with_the_weighted_consensus_uncertainty():
    """Weighted consensus: reader variances are estimated over 200 cases, so the covariance
    is nearly known and the chi-square(3) 95% region (scipy 1.17.1 stats.chi2) covers the
    true point for at least 90% of 400 consensus points."""
    error, cov = consensus_errors("weighted", 5, seed=12)
    t2 = np.einsum("ni,ni->n", error, np.linalg.solve(cov, error[..., None])[..., 0])
    assert np.mean(t2 <= stats.chi2.ppf(0.95, 3)) >= 0.90


def test_it_gives_the_weighted_consensus_a_lower_error_when_one_reader_is_noisy():
    """Four readers at SD 1 mm and one at 4 mm: inverse-variance weights should nearly
    ignore the noisy reader (expected MRE about 2 sqrt(2/pi) / sqrt(4.06) = 0.79 mm against
    2 sqrt(2/pi) sqrt(4 + 16) / 5 = 1.43 mm for the plain mean). In each of 10 seeded
    studies (20 cases x 3 landmarks) the weighted MRE against truth is lower."""
    readers = [ReaderModel(f"reader-{i}", sd_mm=1.0) for i in range(4)]
    readers.append(ReaderModel("noisy", sd_mm=4.0))
    for seed in range(10):
        study = simulate_study(20, 3, readers, seed=100 + seed)
        mre = {}
        for method in ("mean", "weighted"):
            table = run_analysis(study.placements, consensus=method).tables["consensus"]
            merged = table.merge(study.truth, on=["case", "landmark"], suffixes=("", "_true"))
            diff = merged[XYZ].to_numpy() - merged[[c + "_true" for c in XYZ]].to_numpy()
            mre[method] = np.linalg.norm(diff, axis=1).mean()
        assert mre["weighted"] < mre["mean"], seed


def test_it_recovers_each_readers_noise_from_repeat_reads():
    """Repeatability table sw_x/y/z_mm: for a steady reader the two reads differ by
    N(0, 2 sd^2) per axis, so n s_w^2 / sd^2 ~ chi-square(n) with n = n_pairs. The 95%
    chi-square interval (scipy 1.17.1) around each reader's true SD covers the estimate for
    at least 90% of reader x landmark x axis cells (4 readers of SD 0.8-2.5 mm)."""
    readers = [ReaderModel(f"reader-{sd}", sd_mm=sd) for sd in (0.8, 1.0, 1.5, 2.5)]
    study = simulate_study(60, 4, readers, repeat_fraction=0.5, weeks=8, seed=21)
    table = run_analysis(study.placements).tables["repeatability"]
    sd_true = table["reader"].str.removeprefix("reader-").astype(float).to_numpy()
    n = table["n_pairs"].to_numpy()
    inside = []
    for axis in "xyz":
        ratio = n * table[f"sw_{axis}_mm"].to_numpy() ** 2 / sd_true**2
        inside.append((ratio >= stats.chi2.ppf(0.025, n)) & (ratio <= stats.chi2.ppf(0.975, n)))
    assert (n == 30).all()
    assert np.mean(inside) >= 0.90


def test_it_tells_a_detector_as_good_as_the_readers_from_a_poor_one():
    """Williams index (Chalana & Kim 1997) per landmark, 40 cases x 4 readers at SD 1 mm:
    a detector with the readers' own error (SD 1 mm) gets a CI containing 1 on most
    landmarks (at least 3 of 4); one with SD 4 mm gets 'less well' on every landmark,
    and its MRE in the detector table is larger than every reader's."""
    readers = [ReaderModel(f"reader-{i}", sd_mm=1.0) for i in range(4)]
    study = simulate_study(40, 4, readers, seed=31)
    verdicts, mre = {}, {}
    for sd in (1.0, 4.0):
        pred = predictions_from(study.truth, sd_mm=sd, bias_mm=[0.0, 0.0, 0.0], seed=32)
        result = run_analysis(study.placements, pred)
        verdicts[sd] = result.tables["williams"]["verdict"].tolist()
        mre[sd] = result.tables["detector"].groupby("rater")["mre_mm"].mean()
    as_well = "agrees with the readers as well as they agree with each other"
    assert sum(v == as_well for v in verdicts[1.0]) >= 3
    assert all(v == "agrees with the readers less well than they agree with each other"
               for v in verdicts[4.0])  # fmt: skip
    assert mre[4.0]["detector"] > mre[4.0].drop("detector").max()
