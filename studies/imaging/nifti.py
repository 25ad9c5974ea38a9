"""Reading NIfTI-1 and NIfTI-2 files into a `Volume` (world mm, RAS+).

The affine follows the NIfTI-1 standard's three methods (nifti1.h, "3D IMAGE (VOLUME)
ORIENTATION AND LOCATION IN SPACE", from memory): method 3, the sform, when
``sform_code > 0``; else method 2, the qform, when ``qform_code > 0``; method 1 (pixdim
only, "for compatibility with ANALYZE 7.5") does not place the image in any world frame,
so such files are refused.
"""

from __future__ import annotations

import gzip
import hashlib
import math
import zlib
from pathlib import Path

import nibabel as nib
import numpy as np

from .errors import GeometryError, UnreadableFileError, UnsupportedImageError
from .geometry import AffineError, check_affine, spacing_from_affine
from .pixels import apply_rescale, rescaled_dtype
from .volume import Volume

__all__ = ["NIFTI_SUFFIXES", "file_sha256", "is_nifti_name", "read_nifti"]

NIFTI_SUFFIXES = (".nii", ".nii.gz")
_XYZ_UNITS_TO_MM = {0: 1.0, 1: 1000.0, 2: 1.0, 3: 0.001}  # unknown, metre, mm, micron
_READ_ERRORS = (
    nib.filebasedimages.ImageFileError,
    nib.spatialimages.HeaderDataError,
    EOFError,
    OverflowError,
    OSError,
    zlib.error,
    gzip.BadGzipFile,
    ValueError,
)


def is_nifti_name(name: str) -> bool:
    """True when a file name ends in .nii or .nii.gz (case-insensitive)."""
    return name.lower().endswith(NIFTI_SUFFIXES)


def file_sha256(path: Path) -> str:
    """SHA-256 hex digest of a file's bytes, read in 1 MiB blocks."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _load(path: Path) -> nib.Nifti1Image:
    try:
        image = nib.load(path, mmap=False)
    except _READ_ERRORS as exc:
        raise UnreadableFileError(f"{path.name}: not a readable NIfTI file ({exc})") from exc
    if not isinstance(image, (nib.Nifti1Image, nib.Nifti2Image)):
        raise UnreadableFileError(
            f"{path.name}: not a NIfTI image (nibabel read it as {type(image).__name__})"
        )
    return image


def _choose_affine(image: nib.Nifti1Image, name: str) -> tuple[np.ndarray, str, int]:
    """The sform when its code is set, else the qform; refuse when neither is."""
    header = image.header
    sform_code = int(header["sform_code"])
    qform_code = int(header["qform_code"])
    if sform_code > 0:
        affine, which, code = header.get_sform(), "sform", sform_code
    elif qform_code > 0:
        affine, which, code = header.get_qform(), "qform", qform_code
    else:
        raise GeometryError(
            f"{name}: neither sform_code nor qform_code is set (both 0), so the file gives no "
            "position in world space (NIfTI-1 method 1); refusing to guess"
        )
    try:
        affine = check_affine(affine)
    except AffineError as exc:
        raise GeometryError(f"{name}: unusable {which} (code {code}): {exc}") from exc
    scale = _XYZ_UNITS_TO_MM.get(int(header["xyzt_units"]) & 0x07, 1.0)
    if scale != 1.0:
        affine = np.diag([scale, scale, scale, 1.0]) @ affine
    return affine, which, code


def _raw_pixdim(path: Path, image: nib.Nifti1Image) -> np.ndarray:
    """pixdim[1:4] as written in the file (nibabel's load silently 'fixes' zero or negative)."""
    with nib.openers.ImageOpener(path) as handle:
        header = type(image.header).from_fileobj(handle, check=False)
    return np.asarray(header["pixdim"][1:4], dtype=np.float64)


def _check_spacing(path: Path, image: nib.Nifti1Image, affine: np.ndarray) -> None:
    name = path.name
    pixdim = _raw_pixdim(path, image)
    spacing = spacing_from_affine(affine)
    bad_pixdim = ~np.isfinite(pixdim) | (pixdim <= 0)
    if np.any(bad_pixdim):
        raise GeometryError(
            f"{name}: voxel spacing pixdim[1:4] = {pixdim.tolist()} must be finite and "
            "positive (zero, negative or non-finite spacing found)"
        )
    if not np.all(np.isfinite(spacing)) or np.any(spacing <= 1e-6):
        raise GeometryError(f"{name}: affine gives voxel spacing {spacing.tolist()} mm")


#: Largest 3D volume accepted (voxels); also what a damaged header may claim before we load.
MAX_VOXELS = 2**31


def _check_declared_size(path: Path, image: nib.Nifti1Image, name: str) -> None:
    """Refuse a header whose dimensions could not be in this file, before allocating them."""
    shape = tuple(int(n) for n in image.shape)
    voxels = math.prod(shape[:3])
    if voxels > MAX_VOXELS:
        raise UnsupportedImageError(
            f"{name}: the header declares {shape[:3]} = {voxels} voxels per volume, more than "
            f"the {MAX_VOXELS} accepted"
        )
    if path.suffix.lower() == ".gz":
        return
    declared = int(image.header["vox_offset"]) + math.prod(shape) * image.get_data_dtype().itemsize
    actual = path.stat().st_size
    if declared > actual:
        raise UnreadableFileError(
            f"{name}: truncated: the header declares {declared} bytes but the file has {actual}"
        )


def _pick_volume(shape: tuple[int, ...], volume_index: int | None, name: str) -> int | None:
    """Which 4th-axis index to read, or None for a 3D image."""
    extra = [n for n in shape[3:] if n != 1]
    if len(shape) > 4 and len(extra) > 1:
        raise UnsupportedImageError(
            f"{name}: {len(shape)}D image of shape {shape} is not supported"
        )
    n_volumes = extra[0] if extra else 1
    if n_volumes == 1:
        if volume_index not in (None, 0):
            raise UnsupportedImageError(
                f"{name}: --volume {volume_index} asked for, but the image is 3D {shape[:3]}"
            )
        return None
    if volume_index is None:
        raise UnsupportedImageError(
            f"{name}: 4D image of shape {shape} holds {n_volumes} volumes; choose one with "
            f"--volume N (0 to {n_volumes - 1})"
        )
    if not 0 <= volume_index < n_volumes:
        raise UnsupportedImageError(
            f"{name}: --volume {volume_index} is out of range; the image holds {n_volumes} "
            f"volumes (0 to {n_volumes - 1})"
        )
    return volume_index


def _voxels(image: nib.Nifti1Image, index: int | None, name: str) -> np.ndarray:
    """Stored voxels rescaled with scl_slope/scl_inter, integer dtype kept where it fits."""
    shape = image.shape
    try:
        raw = np.asanyarray(image.dataobj.get_unscaled())
    except _READ_ERRORS as exc:
        raise UnreadableFileError(f"{name}: voxel data cannot be read ({exc})") from exc
    if raw.ndim == 2:
        raw = raw[:, :, np.newaxis]
    elif raw.ndim > 3:
        raw = raw.reshape((*shape[:3], -1))[..., 0 if index is None else index]
    if raw.dtype.kind not in "iuf":
        raise UnsupportedImageError(f"{name}: voxel type {raw.dtype} (e.g. RGB or complex)")
    raw = raw.astype(raw.dtype.newbyteorder("="), copy=False)
    # After loading, nibabel keeps scl_slope / scl_inter on the array proxy, not the header.
    slope = float(getattr(image.dataobj, "slope", 1.0))
    intercept = float(getattr(image.dataobj, "inter", 0.0))
    if not np.isfinite(slope) or slope == 0.0:
        slope, intercept = 1.0, 0.0  # NIfTI-1: scl_slope = 0 means no scaling
    if raw.dtype.kind == "f" and not np.all(np.isfinite(raw)):
        raise UnreadableFileError(f"{name}: voxel data contain NaN or infinite values")
    low, high = (float(raw.min()), float(raw.max())) if raw.size else (0.0, 0.0)
    dtype = rescaled_dtype(raw.dtype, low, high, [slope], [intercept])
    return apply_rescale(raw, slope, intercept, dtype)


def read_nifti(path: Path | str, volume_index: int | None = None) -> Volume:
    """Read a .nii or .nii.gz file into a `Volume`.

    Parameters
    ----------
    path : Path or str
        The file.
    volume_index : int, optional
        For a 4D image, which volume (0-based index on the 4th axis) to read.

    Returns
    -------
    Volume
        ``data``: (I, J, K) ndarray in the file's own voxel order, rescaled by
        scl_slope/scl_inter (integer dtype kept where the values fit); ``affine``:
        (4, 4) float64 voxel index to world mm, RAS+ (sform if its code is set, else
        qform); ``checksum``: SHA-256 of the file bytes; ``provenance``: format, the
        affine source, original shape and dtype.

    Raises
    ------
    UnreadableFileError
        Truncated or corrupt file, or not NIfTI.
    GeometryError
        Neither sform nor qform code set; zero, negative or non-finite spacing.
    UnsupportedImageError
        4D without `volume_index`, 5D and more, non-scalar voxel types.
    """
    path = Path(path)
    name = path.name
    image = _load(path)
    affine, which, code = _choose_affine(image, name)
    _check_spacing(path, image, affine)
    index = _pick_volume(tuple(image.shape), volume_index, name)
    _check_declared_size(path, image, name)
    data = _voxels(image, index, name)
    provenance = {
        "format": "NIfTI-2" if isinstance(image, nib.Nifti2Image) else "NIfTI-1",
        "affine_source": which,
        "affine_code": code,
        "file_shape": [int(n) for n in image.shape],
        "file_dtype": str(image.get_data_dtype()),
    }
    if index is not None:
        provenance["volume_index"] = index
    return Volume(
        data=data,
        affine=affine,
        modality="OT",
        checksum=file_sha256(path),
        provenance=provenance,
    )
