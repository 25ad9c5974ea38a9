"""Writing a case's files under the data directory, atomically.

Each case gets one folder holding three files, all in canonical (closest RAS+) voxel order:

- ``canonical.nii``: the voxels with their canonical affine (uncompressed NIfTI-1, fast to
  read back for analysis and export);
- ``viewer.zst``: the raw little-endian voxels, i fastest (Fortran order), compressed once
  with Zstandard so the web server can send them with ``Content-Encoding: zstd`` and never
  compress per request;
- ``coarse.zst``: the same, keeping every second voxel on each axis, for a first image.

The folder is built under a temporary name, every file is fsynced, and then the folder is
renamed into place, so a crash leaves either the whole case or nothing (apart from a
``.staging-*`` folder that `remove_stale_staging` clears).
"""

from __future__ import annotations

import os
import shutil
import uuid
from dataclasses import dataclass
from pathlib import Path

import nibabel as nib
import numpy as np
import zstandard
from nibabel import orientations

from .geometry import canonical_transform, check_affine, spacing_from_affine
from .volume import Volume

__all__ = [
    "StoredVolume",
    "read_canonical",
    "remove_case_files",
    "remove_stale_staging",
    "viewer_dtype",
    "write_case_files",
]

CANONICAL_NAME = "canonical.nii"
VIEWER_NAME = "viewer.zst"
COARSE_NAME = "coarse.zst"
_ZSTD_LEVEL = 1  # about 0.12 s per 32 MiB on 2 cores; higher levels cost more than they save
_KEPT_DTYPES = {"uint8", "int8", "int16", "uint16", "int32", "uint32", "float32"}


@dataclass(frozen=True)
class StoredVolume:
    """What `write_case_files` wrote: enough to fill a Case row."""

    rel_dir: str
    shape: tuple[int, int, int]
    spacing_mm: tuple[float, float, float]
    affine: list[list[float]]
    original_shape: tuple[int, int, int]
    original_affine: list[list[float]]
    dtype: str
    window_center: float
    window_width: float
    value_min: float
    value_max: float
    viewer_bytes: int
    viewer_compressed_bytes: int
    coarse_shape: tuple[int, int, int]
    coarse_compressed_bytes: int


def viewer_dtype(dtype: np.dtype) -> np.dtype:
    """The little-endian dtype the browser receives: integer types kept, others float32."""
    name = np.dtype(dtype).name
    return np.dtype(name if name in _KEPT_DTYPES else "float32").newbyteorder("<")


def suggested_window(data: np.ndarray, modality: str) -> tuple[float, float]:
    """A starting window (centre, width).

    CT gets the common soft-tissue window (centre 40 HU, width 400 HU: common practice);
    other modalities the 1st to 99th intensity percentile of a subsample.
    """
    if modality == "CT":
        return 40.0, 400.0
    sample = np.asarray(data[::4, ::4, ::4], dtype=np.float64)
    low, high = np.percentile(sample, [1.0, 99.0])
    width = max(float(high - low), 1.0)
    return float(low + width / 2.0), width


def _write_compressed(path: Path, array: np.ndarray) -> int:
    """Write `array` i-fastest, zstd-compressed, one k-slab at a time; return the file size.

    Slab by slab keeps the extra memory to one slice (a whole-array ``tobytes`` would
    double the peak). The frame records the content size, so one-shot decompression works.
    """
    compressor = zstandard.ZstdCompressor(level=_ZSTD_LEVEL, threads=-1)
    with open(path, "wb") as handle:
        with compressor.stream_writer(handle, size=array.nbytes, closefd=False) as writer:
            for k in range(array.shape[2]):
                writer.write(array[:, :, k].tobytes(order="F"))
        handle.flush()
        os.fsync(handle.fileno())
    return path.stat().st_size


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write_case_files(root: Path, rel_dir: str, volume: Volume) -> StoredVolume:
    """Write a volume's canonical NIfTI and its two viewer copies under ``root / rel_dir``.

    Parameters
    ----------
    root : Path
        The data directory (CAIRN_DATA_DIR).
    rel_dir : str
        Folder for this case, relative to `root`; must not exist yet.
    volume : Volume
        The scan in its original voxel order, affine in world mm RAS+.

    Returns
    -------
    StoredVolume
    """
    if volume.data.ndim != 3:
        raise ValueError(f"a case volume must be 3D, got shape {volume.data.shape}")
    original_affine = check_affine(volume.affine)
    target = Path(root) / rel_dir
    if target.exists():
        raise FileExistsError(f"case folder already exists: {rel_dir}")
    ornt, affine, _ = canonical_transform(original_affine, volume.data.shape)
    data = orientations.apply_orientation(volume.data, ornt).astype(
        viewer_dtype(volume.data.dtype), copy=False
    )
    staging = target.parent / f".staging-{uuid.uuid4().hex}"
    staging.mkdir(parents=True)
    try:
        image = nib.Nifti1Image(data, affine)
        image.set_sform(affine, code=1)
        image.set_qform(affine, code=1)
        nib.save(image, staging / CANONICAL_NAME)
        with open(staging / CANONICAL_NAME, "rb+") as handle:
            os.fsync(handle.fileno())
        viewer_size = _write_compressed(staging / VIEWER_NAME, data)
        coarse_data = data[::2, ::2, ::2]
        coarse_size = _write_compressed(staging / COARSE_NAME, coarse_data)
        os.rename(staging, target)
        _fsync_dir(target.parent)
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise
    centre, width = suggested_window(data, volume.modality)
    return StoredVolume(
        rel_dir=rel_dir,
        shape=tuple(int(n) for n in data.shape),
        spacing_mm=tuple(float(s) for s in spacing_from_affine(affine)),
        affine=affine.tolist(),
        original_shape=tuple(int(n) for n in volume.data.shape),
        original_affine=original_affine.tolist(),
        dtype=data.dtype.name,
        window_center=centre,
        window_width=width,
        value_min=float(data.min()),
        value_max=float(data.max()),
        viewer_bytes=int(data.nbytes),
        viewer_compressed_bytes=viewer_size,
        coarse_shape=tuple(int(n) for n in coarse_data.shape),
        coarse_compressed_bytes=coarse_size,
    )


def read_canonical(root: Path, rel_dir: str) -> nib.Nifti1Image:
    """Open a stored case's canonical NIfTI (lazy; voxels load on access)."""
    return nib.load(Path(root) / rel_dir / CANONICAL_NAME)


def remove_case_files(root: Path, rel_dir: str) -> None:
    """Delete a case's folder; used to roll back an import whose database work failed."""
    shutil.rmtree(Path(root) / rel_dir, ignore_errors=True)


def remove_stale_staging(root: Path) -> int:
    """Delete leftover ``.staging-*`` folders from interrupted writes; return how many."""
    removed = 0
    for path in Path(root).rglob(".staging-*"):
        shutil.rmtree(path, ignore_errors=True)
        removed += 1
    return removed
