"""Ingest benchmark: a 300-slice 512 x 512 int16 DICOM series against nibabel, same voxels.

Prints one JSON object per line: {"name", "value", "unit", "target"}. Both readers run in
the same process, alternately, on files already in the page cache; each time is the
fastest of the repeats (the usual way to take out noise from other load on the machine),
in wall-clock seconds and, for the ratio, also in process CPU seconds. Peak memory is
measured in separate, untimed passes with tracemalloc (numpy reports its buffers to it),
relative to the volume's size in bytes.

- ingest.dicom_300x512.seconds: headers (stop_before_pixels), plan, checks, pixels and
  rescale into a Volume (studies.imaging.sources.discover + dicom.read_series).
- ingest.dicom_300x512.nifti_seconds: nibabel.load(mmap=False) + np.asanyarray(dataobj)
  of an uncompressed NIfTI holding the same voxels.
- ingest.dicom_300x512.ratio_vs_nifti: the ratio of the two (target at most 3), and
  .ratio_vs_nifti_cpu the same in CPU time.
- ingest.dicom_300x512.peak_memory_ratio: peak traced memory of the whole import (read,
  then write the case files) / volume bytes (target at most 2.5);
  .read_peak_memory_ratio the same for the read alone.
- ingest.dicom_300x512.store_seconds: writing the case files (canonical NIfTI and the
  compressed viewer copies, studies.imaging.storage), for information.
"""

from __future__ import annotations

import gc
import json
import tempfile
import time
import tracemalloc
from pathlib import Path

import nibabel as nib
import numpy as np

from studies.imaging.dicom import read_series
from studies.imaging.dicom_headers import choose_series
from studies.imaging.dicom_writer import write_series
from studies.imaging.sources import discover
from studies.imaging.storage import write_case_files

SHAPE = (512, 512, 300)
REPEATS = 5
PREFIX = "ingest.dicom_300x512"
SALT = b"bench-salt"


def emit(name: str, value: float, unit: str, target: float | None) -> None:
    figure = {"name": f"{PREFIX}.{name}", "value": round(value, 4), "unit": unit, "target": target}
    print(json.dumps(figure), flush=True)


def make_inputs(root: Path) -> tuple[Path, Path, np.ndarray]:
    rng = np.random.default_rng(20261201)
    stored = rng.integers(0, 3000, size=SHAPE, dtype=np.int16)
    affine = np.diag([0.7, 0.7, 1.0, 1.0])
    affine[:3, 3] = [-180.0, -170.0, -150.0]
    series = root / "series"
    series.mkdir()
    write_series(stored, affine, series, intercept=-1024.0)
    voxels = stored - np.int16(1024)
    nifti = root / "same_voxels.nii"
    nib.save(nib.Nifti1Image(voxels, affine), nifti)
    for path in [*series.iterdir(), nifti]:  # page cache warm for both readers
        path.read_bytes()
    return series, nifti, voxels


def read_dicom(series: Path, work: Path) -> np.ndarray:
    return read_series(choose_series(discover([series], work).series), uid_salt=SALT).data


def import_dicom(series: Path, work: Path) -> object:
    volume = read_series(choose_series(discover([series], work).series), uid_salt=SALT)
    return write_case_files(work / "data", f"peak-{time.monotonic_ns()}", volume)


def read_nifti(path: Path) -> np.ndarray:
    return np.asanyarray(nib.load(path, mmap=False).dataobj)


def timed(fn, *args) -> tuple[float, object, float]:
    gc.collect()
    cpu, start = time.process_time(), time.perf_counter()
    result = fn(*args)
    return time.perf_counter() - start, result, time.process_time() - cpu


def peak_ratio(fn, nbytes: int, *args) -> float:
    gc.collect()
    tracemalloc.start()
    result = fn(*args)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    del result
    return peak / nbytes


def main() -> None:
    with tempfile.TemporaryDirectory(prefix="cairn-bench-ingest-") as tmp:
        root = Path(tmp)
        series, nifti, voxels = make_inputs(root)
        wall: dict[str, list[float]] = {"dicom": [], "nifti": []}
        cpu: dict[str, list[float]] = {"dicom": [], "nifti": []}
        for _ in range(REPEATS):
            seconds, data, used = timed(read_dicom, series, root)
            if not np.array_equal(data, voxels):
                raise SystemExit("the DICOM import gave other voxels than were written")
            wall["dicom"].append(seconds)
            cpu["dicom"].append(used)
            del data
            seconds, data, used = timed(read_nifti, nifti)
            wall["nifti"].append(seconds)
            cpu["nifti"].append(used)
            del data
        emit("seconds", min(wall["dicom"]), "s", None)
        emit("nifti_seconds", min(wall["nifti"]), "s", None)
        emit("ratio_vs_nifti", min(wall["dicom"]) / min(wall["nifti"]), "ratio", 3.0)
        emit("ratio_vs_nifti_cpu", min(cpu["dicom"]) / min(cpu["nifti"]), "ratio", 3.0)
        emit(
            "peak_memory_ratio", peak_ratio(import_dicom, voxels.nbytes, series, root), "ratio", 2.5
        )
        emit(
            "read_peak_memory_ratio",
            peak_ratio(read_dicom, voxels.nbytes, series, root),
            "ratio",
            None,
        )
        volume = read_series(choose_series(discover([series], root).series), uid_salt=SALT)
        seconds, _, _ = timed(write_case_files, root / "data", "store", volume)
        emit("store_seconds", seconds, "s", None)


if __name__ == "__main__":
    main()
