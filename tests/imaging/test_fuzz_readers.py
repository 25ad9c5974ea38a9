"""Fuzzing the NIfTI and DICOM readers with mutated bytes of the files the libraries ship.

Sources: nibabel's tests/data (anatomical.nii, standard.nii.gz, example_nifti2.nii.gz)
and pydicom's local test files (CT_small, MR_small and its RLE variant, rtdose, and the
five-slice CT5N series), always with ``download=False``. Hypothesis mutates their bytes
(byte sets, packed extreme numbers written over header fields, inserts, deletes,
truncation), mostly inside the header, where the readers make their decisions.

Each mutated file is read in a separate worker process with a memory cap and a per-file
time limit (CAIRN_FUZZ_SECONDS, default 10 s). Passing means, for every file: the reader
returned a volume or raised an `ImagingError` subclass with a message; it never raised
anything else, never crashed the process, never ran past the time limit, and wrote
nothing. Budget: CAIRN_FUZZ_FILES mutated files per source (default 30); derandomized,
so every run draws the same files.
"""

from __future__ import annotations

import gzip
import json
import os
import resource
import select
import shutil
import struct
import subprocess
import sys
import tempfile
import time
import traceback
from pathlib import Path

import nibabel
import pytest
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st
from pydicom.data import get_testdata_file

ROOT = Path(__file__).resolve().parents[2]
FILES_PER_SOURCE = int(os.environ.get("CAIRN_FUZZ_FILES", "30"))
SECONDS_PER_FILE = float(os.environ.get("CAIRN_FUZZ_SECONDS", "10"))
# Address-space cap of the worker: above the 4 GiB a corrupt 32-bit DICOM length makes
# pydicom reserve (untouched pages, harmless with overcommit), below a runaway.
WORKER_MEMORY_BYTES = 8 * 1024**3
NIBABEL_DATA = Path(nibabel.__file__).parent / "tests" / "data"
NIFTI1_HEADER_BYTES, NIFTI2_HEADER_BYTES, DICOM_HOT_BYTES = 352, 544, 2048
SALT = b"fuzz-salt"

_NUMBERS = [0, 1, -1, 2, 255, 32767, -32768, 65535, 2**31 - 1, -(2**31), 2**32 - 1]
_FLOATS = [0.0, -0.0, 1e-45, 1e38, -1e38, float("inf"), float("-inf"), float("nan")]
def _fits(fmt: str, number: int) -> bool:
    bits = {"h": 16, "i": 32}[fmt]
    return -(2 ** (bits - 1)) <= number < 2 ** (bits - 1)


SPECIAL_WORDS = sorted(
    {struct.pack(e + f, n) for e in "<>" for f in "hi" for n in _NUMBERS if _fits(f, n)}
    | {struct.pack(e + f, x) for e in "<>" for f in "fd" for x in _FLOATS}
)


# --------------------------------------------------------------------------------------
# The worker: reads one file (or series) per request, under a memory cap.
# --------------------------------------------------------------------------------------


def _read(request: dict) -> dict:
    from studies.imaging.errors import ImagingError

    try:
        if request["kind"] == "nifti":
            from studies.imaging.nifti import read_nifti

            volume = read_nifti(request["paths"][0], volume_index=request.get("volume_index"))
        else:
            from studies.imaging.dicom import read_series
            from studies.imaging.dicom_headers import choose_series, group_series, read_header

            headers = [read_header(p) for p in request["paths"]]
            volume = read_series(choose_series(group_series(headers)), uid_salt=SALT)
        return {"status": "ok", "shape": list(volume.data.shape)}
    except ImagingError as error:
        return {"status": "refused", "type": type(error).__name__, "message": str(error)}
    except BaseException as error:  # anything else is what we are hunting
        return {
            "status": "error",
            "type": type(error).__name__,
            "message": "".join(traceback.format_exception(error))[-3000:],
        }


def worker_main() -> None:
    resource.setrlimit(resource.RLIMIT_AS, (WORKER_MEMORY_BYTES, WORKER_MEMORY_BYTES))
    for line in sys.stdin:
        reply = _read(json.loads(line))
        sys.stdout.write(json.dumps(reply) + "\n")
        sys.stdout.flush()


class ReaderWorker:
    """A worker process; restarted after a crash or a timeout."""

    def __init__(self) -> None:
        self.process: subprocess.Popen | None = None
        self.cwd = Path(tempfile.mkdtemp(prefix="cairn-fuzz-cwd-"))
        self.slowest_s = 0.0
        self.counts: dict[str, int] = {}

    def _start(self) -> subprocess.Popen:
        env = {**os.environ, "PYTHONPATH": str(ROOT)}
        env.pop("DJANGO_SETTINGS_MODULE", None)
        return subprocess.Popen(
            [sys.executable, "-c", "from tests.imaging.test_fuzz_readers import worker_main;"
             " worker_main()"],
            cwd=self.cwd, env=env, stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True,
        )

    def stop(self) -> None:
        if self.process is not None:
            self.process.kill()
            self.process.wait()
            self.process = None

    def read(self, request: dict) -> dict:
        if self.process is None or self.process.poll() is not None:
            self.process = self._start()
        self.process.stdin.write(json.dumps(request) + "\n")
        self.process.stdin.flush()
        started = time.monotonic()
        ready, _, _ = select.select([self.process.stdout], [], [], SECONDS_PER_FILE + 20)
        line = self.process.stdout.readline() if ready else ""
        elapsed = time.monotonic() - started
        if not line:
            code = self.process.poll()
            self.stop()
            what = "timeout" if code is None else f"crash (exit code {code})"
            return {"status": what, "type": "", "message": f"after {elapsed:.1f} s"}
        reply = json.loads(line)
        reply["seconds"] = elapsed
        self.slowest_s = max(self.slowest_s, elapsed)
        self.counts[reply["status"]] = self.counts.get(reply["status"], 0) + 1
        return reply


_WORKER: ReaderWorker | None = None


@pytest.fixture(scope="module")
def worker():
    global _WORKER
    _WORKER = ReaderWorker()
    yield _WORKER
    _WORKER.stop()
    shutil.rmtree(_WORKER.cwd, ignore_errors=True)


# --------------------------------------------------------------------------------------
# Mutations
# --------------------------------------------------------------------------------------


@st.composite
def mutated(draw, original: bytes, hot: int) -> bytes:
    """`original` with 1 to 6 mutations, positions mostly in the first `hot` bytes."""
    data = bytearray(original)
    for _ in range(draw(st.integers(1, 6))):
        size = max(len(data), 1)
        position = draw(st.one_of(st.integers(0, min(hot, size) - 1), st.integers(0, size - 1)))
        op = draw(st.sampled_from(["set", "word", "word", "insert", "delete", "truncate"]))
        if op == "set":
            data[position : position + 1] = bytes([draw(st.integers(0, 255))])
        elif op == "word":
            word = draw(st.sampled_from(SPECIAL_WORDS))
            data[position : position + len(word)] = word
        elif op == "insert":
            data[position:position] = draw(st.binary(min_size=1, max_size=16))
        elif op == "delete":
            del data[position : position + draw(st.integers(1, 64))]
        else:
            del data[position:]
    return bytes(data)


def nifti_sources() -> dict[str, tuple[bytes, str, int, int | None]]:
    """name -> (bytes, file suffix, header bytes to favour, volume index)."""
    anatomical = (NIBABEL_DATA / "anatomical.nii").read_bytes()
    standard_gz = (NIBABEL_DATA / "standard.nii.gz").read_bytes()
    nifti2 = gzip.decompress((NIBABEL_DATA / "example_nifti2.nii.gz").read_bytes())
    return {
        "anatomical.nii": (anatomical, ".nii", NIFTI1_HEADER_BYTES, None),
        "standard.nii": (gzip.decompress(standard_gz), ".nii", NIFTI1_HEADER_BYTES, None),
        "standard.nii.gz": (standard_gz, ".nii.gz", 64, None),
        "example_nifti2.nii": (nifti2, ".nii", NIFTI2_HEADER_BYTES, 0),
    }


def dicom_file(name: str) -> Path:
    found = get_testdata_file(name, download=False)
    if found is None:
        pytest.fail(f"pydicom's local test file {name!r} is missing")
    return Path(found)


def ct5n_series() -> list[Path]:
    folder = dicom_file("CT_small.dcm").parent / "dicomdirtests" / "98892001" / "CT5N"
    files = sorted(folder.iterdir())
    assert len(files) == 5, files
    return files


def check_reply(reply: dict, sample: Path, folder: Path, expected: set[str]) -> None:
    keep = sample.parent.parent / "failures"
    if reply["status"] not in ("ok", "refused") or (
        reply["status"] == "refused" and not reply["message"].strip()
    ):
        keep.mkdir(exist_ok=True)
        shutil.copy(sample, keep / sample.name)
        pytest.fail(
            f"{reply['status']} {reply['type']} on {keep / sample.name}:\n{reply['message']}"
        )
    assert {p.name for p in folder.iterdir()} == expected, "the reader wrote files"


def _settings(examples: int):
    return settings(
        max_examples=examples,
        deadline=None,
        database=None,
        derandomize=True,
        phases=[Phase.explicit, Phase.generate],
        suppress_health_check=list(HealthCheck),
    )


@pytest.mark.parametrize("name", list(nifti_sources()))
def test_it_refuses_mutated_nifti_files_cleanly(worker, tmp_path, name) -> None:
    """Source files: nibabel's shipped test data; rule: only ImagingError may escape."""
    original, suffix, hot, volume_index = nifti_sources()[name]
    folder = tmp_path / "in"
    folder.mkdir()
    sample = folder / f"sample{suffix}"
    missing = worker.read({"kind": "nifti", "paths": [str(folder / "missing.nii")]})
    assert missing["status"] == "refused" and "missing.nii" in missing["message"], missing

    @_settings(FILES_PER_SOURCE)
    @given(data=mutated(original, hot))
    def run(data: bytes) -> None:
        sample.write_bytes(data)
        reply = worker.read(
            {"kind": "nifti", "paths": [str(sample)], "volume_index": volume_index}
        )
        check_reply(reply, sample, folder, {sample.name})

    run()
    assert not any(worker.cwd.iterdir()), "the reader wrote into its working folder"


@pytest.mark.parametrize(
    "name", ["CT_small.dcm", "MR_small.dcm", "MR_small_RLE.dcm", "rtdose.dcm"]
)
def test_it_refuses_mutated_dicom_files_cleanly(worker, tmp_path, name) -> None:
    """Source files: pydicom's local test files; rule: only ImagingError may escape."""
    original = dicom_file(name).read_bytes()
    folder = tmp_path / "in"
    folder.mkdir()
    sample = folder / "sample.dcm"

    @_settings(FILES_PER_SOURCE)
    @given(data=mutated(original, DICOM_HOT_BYTES))
    def run(data: bytes) -> None:
        sample.write_bytes(data)
        check_reply(worker.read({"kind": "dicom", "paths": [str(sample)]}), sample, folder,
                    {sample.name})

    run()
    assert not any(worker.cwd.iterdir())


def test_it_refuses_a_series_with_one_mutated_slice_cleanly(worker, tmp_path) -> None:
    """pydicom's CT5N series (5 slices); one slice at a time is mutated."""
    folder = tmp_path / "in"
    folder.mkdir()
    originals = {}
    for path in ct5n_series():
        shutil.copy(path, folder / path.name)
        originals[path.name] = path.read_bytes()
    names = sorted(originals)
    clean = worker.read({"kind": "dicom", "paths": [str(folder / n) for n in names]})
    assert clean["status"] == "ok" and clean["shape"] == [16, 16, 5], clean

    @_settings(FILES_PER_SOURCE)
    @given(index=st.integers(0, 4), data=st.data())
    def run(index: int, data) -> None:
        target = folder / names[index]
        target.write_bytes(data.draw(mutated(originals[names[index]], DICOM_HOT_BYTES)))
        try:
            reply = worker.read({"kind": "dicom", "paths": [str(folder / n) for n in names]})
            check_reply(reply, target, folder, set(names))
        finally:
            target.write_bytes(originals[names[index]])

    run()


def test_it_stays_within_the_time_limit_per_file(worker) -> None:
    """Runs after the fuzz tests in this module: the slowest read stayed under the limit."""
    if not worker.counts:
        sample = Path(tempfile.mkdtemp()) / "a.nii"
        sample.write_bytes((NIBABEL_DATA / "anatomical.nii").read_bytes()[:200])
        worker.read({"kind": "nifti", "paths": [str(sample)]})
    assert worker.slowest_s < SECONDS_PER_FILE, worker.slowest_s
    assert set(worker.counts) <= {"ok", "refused"}, worker.counts
