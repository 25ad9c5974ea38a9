"""Benchmark of the analysis core: run with ``python tests/benchmarks/bench_analysis.py``.

Prints one JSON object per line: {"name", "value", "unit", "target", "better", ...}.

* analysis.full_176k.seconds: run_analysis (validation to the last table, default
  geomedian consensus, no predictions) on a simulated study of 1,000 cases x 20
  landmarks x 8 readers plus 10% repeat reads (176,000 placements); best of 3 runs,
  CPU time of this process (numpy/BLAS limited to one thread), wall time alongside.
* analysis.ratio_vs_reference: time of the straightforward per-landmark loop in
  tests/references/reference_agreement.py (pandas groupby, scipy pdist,
  pingouin.intraclass_corr, statsmodels fleiss_kappa) over the time of the vectorised
  agreement code computing the same figures, both from the same validated table in this run
  (the first 5 of the 20 landmarks of the 176k study, to keep the bench short).
* analysis.scaling_exponent: slope of log(time) on log(placements) over runs at about
  10k, 100k and 1M placements.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")  # one core, before numpy is imported

import json  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

from studies.analysis.agreement import (  # noqa: E402
    agreement_by_case,
    agreement_by_landmark,
    pairwise_distances_mm,
)
from studies.analysis.pipeline import run_analysis  # noqa: E402
from studies.analysis.simulate import ReaderModel, simulate_study  # noqa: E402
from studies.analysis.table import to_dense, validate_placements  # noqa: E402
from tests.references.reference_agreement import reference_agreement_by_landmark  # noqa: E402

N_LANDMARKS, N_READERS, REPEAT = 20, 8, 0.1
RATIO_LANDMARKS = 5


def readers() -> list[ReaderModel]:
    """Eight invented readers: different precision, one biased, one drifting, one careless."""
    out = [ReaderModel(name=f"reader{i}", sd_mm=0.8 + 0.15 * i, absent_rate=0.01)
           for i in range(N_READERS)]
    out[2] = ReaderModel(name="reader2", sd_mm=1.0, bias_mm=(0.8, 0.0, -0.5), absent_rate=0.01)
    out[5] = ReaderModel(name="reader5", sd_mm=1.1, drift_mm_per_week=(0.0, 0.15, 0.0))
    out[7] = ReaderModel(name="reader7", sd_mm=1.2, outlier_rate=0.02, outlier_mm=12.0)
    return out


def study(n_cases: int, seed: int = 20261201):
    return simulate_study(n_cases, N_LANDMARKS, readers(), repeat_fraction=REPEAT,
                          truly_absent_rate=0.01, seed=seed).placements


def timed(fn, repeat: int = 1) -> tuple[float, float]:
    """Best CPU and wall seconds of ``repeat`` calls."""
    cpu, wall = [], []
    for _ in range(repeat):
        c0, w0 = time.process_time(), time.perf_counter()
        fn()
        cpu.append(time.process_time() - c0)
        wall.append(time.perf_counter() - w0)
    return min(cpu), min(wall)


def emit(name: str, value: float, unit: str, target: float, better: str, **extra) -> None:
    print(json.dumps({"name": name, "value": round(value, 4), "unit": unit, "target": target,
                      "better": better, **extra}), flush=True)


def ours_agreement(clean) -> None:
    s = to_dense(clean)
    by_case = agreement_by_case(s, pairwise_distances_mm(s.points_mm[0]))
    agreement_by_landmark(s, by_case)


def main() -> None:
    warnings.simplefilter("ignore")  # pingouin/pandas deprecation chatter
    placements = study(1000)
    run_analysis(placements)  # warm-up (imports, caches)
    cpu, wall = timed(lambda: run_analysis(placements), repeat=3)
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else None
    emit("analysis.full_176k.seconds", cpu, "s", 1.0, "lower", placements=len(placements),
         wall_seconds=round(wall, 4), load_average_1min=load)

    # The reference loop costs ~0.1 s per landmark per 1,000 cases and dominates the bench:
    # both sides run on the same first RATIO_LANDMARKS landmarks of the study (all cases,
    # readers and reads), so the ratio compares equal work without extrapolation.
    subset = placements[placements["landmark"].isin(
        sorted(placements["landmark"].unique())[:RATIO_LANDMARKS])]
    clean = validate_placements(subset)
    ours_cpu, _ = timed(lambda: ours_agreement(clean), repeat=3)
    ref_cpu, _ = timed(lambda: reference_agreement_by_landmark(clean), repeat=1)
    emit("analysis.ratio_vs_reference", ref_cpu / ours_cpu, "x", 20.0, "higher",
         placements=len(clean), landmarks=RATIO_LANDMARKS,
         reference_seconds=round(ref_cpu, 4), vectorised_seconds=round(ours_cpu, 4))

    sizes, times = [], []
    for n_cases in (57, 568, 5682):  # x 20 landmarks x 8 readers x 1.1 = 10k, 100k, 1M
        table = study(n_cases, seed=n_cases)
        run_analysis(table)
        cpu, _ = timed(lambda t=table: run_analysis(t), repeat=2 if n_cases < 5000 else 1)
        sizes.append(len(table))
        times.append(cpu)
    slope = float(np.polyfit(np.log(sizes), np.log(times), 1)[0])
    emit("analysis.scaling_exponent", slope, "1", 1.1, "lower", placements=sizes,
         seconds=[round(t, 4) for t in times])


if __name__ == "__main__":
    main()
