"""Voxel <-> world conversions and affine checks: the one place coordinates are converted.

Every stored coordinate in cairn is world millimetres in the RAS+ frame (NIfTI convention:
+x right, +y anterior, +z superior). DICOM's patient frame is LPS+; the two differ by the
sign of x and y (DICOM PS3.3 C.7.6.2.1.1; nibabel coordinate-system docs). Voxel indices
are continuous: an integer index is a voxel centre.
"""

from __future__ import annotations

import numpy as np
from nibabel import orientations

__all__ = [
    "AffineError",
    "affine_lps_to_ras",
    "canonical_transform",
    "check_affine",
    "lps_to_ras",
    "ras_to_lps",
    "spacing_from_affine",
    "voxel_to_world",
    "world_to_voxel",
]

_LPS_RAS = np.diag([-1.0, -1.0, 1.0, 1.0])


class AffineError(ValueError):
    """An affine that cannot map voxel indices to world millimetres."""


def check_affine(affine: np.ndarray) -> np.ndarray:
    """Return `affine` as a float64 (4, 4) array after checking it is a usable voxel-to-world map.

    Parameters
    ----------
    affine : (4, 4) array-like
        Voxel index to world mm (RAS+).

    Raises
    ------
    AffineError
        Wrong shape, non-finite entries, a bottom row other than (0, 0, 0, 1), or a singular
        3x3 part. The message quotes the offending matrix.
    """
    a = np.asarray(affine, dtype=np.float64)
    if a.shape != (4, 4):
        raise AffineError(f"affine must be 4x4, got shape {a.shape}: {a.tolist()}")
    if not np.all(np.isfinite(a)):
        raise AffineError(f"affine has non-finite entries: {a.tolist()}")
    if not np.allclose(a[3], [0.0, 0.0, 0.0, 1.0]):
        raise AffineError(f"affine bottom row must be (0, 0, 0, 1), got {a[3].tolist()}")
    if abs(np.linalg.det(a[:3, :3])) < 1e-12:
        raise AffineError(f"affine is singular (zero voxel size): {a.tolist()}")
    return a


def _points(points: np.ndarray) -> np.ndarray:
    p = np.asarray(points, dtype=np.float64)
    if p.shape[-1:] != (3,):
        raise ValueError(f"points must have 3 coordinates on the last axis, got shape {p.shape}")
    return p


def voxel_to_world(affine: np.ndarray, ijk: np.ndarray) -> np.ndarray:
    """Map continuous voxel indices to world mm.

    Parameters
    ----------
    affine : (4, 4) array-like
        Voxel index to world mm, RAS+.
    ijk : (..., 3) array-like, float
        Continuous voxel indices (integer = voxel centre).

    Returns
    -------
    (..., 3) ndarray, float64
        World coordinates in mm, RAS+.
    """
    a = check_affine(affine)
    p = _points(ijk)
    return p @ a[:3, :3].T + a[:3, 3]


def world_to_voxel(affine: np.ndarray, xyz: np.ndarray) -> np.ndarray:
    """Map world mm (RAS+) to continuous voxel indices; the inverse of `voxel_to_world`.

    Parameters
    ----------
    affine : (4, 4) array-like
        Voxel index to world mm, RAS+.
    xyz : (..., 3) array-like, float
        World coordinates in mm, RAS+.

    Returns
    -------
    (..., 3) ndarray, float64
        Continuous voxel indices.
    """
    inverse = np.linalg.inv(check_affine(affine))
    return _points(xyz) @ inverse[:3, :3].T + inverse[:3, 3]


def ras_to_lps(xyz: np.ndarray) -> np.ndarray:
    """Convert world mm from RAS+ (NIfTI) to LPS+ (DICOM) by negating x and y."""
    return _points(xyz) * np.array([-1.0, -1.0, 1.0])


def lps_to_ras(xyz: np.ndarray) -> np.ndarray:
    """Convert world mm from LPS+ (DICOM) to RAS+ (NIfTI) by negating x and y."""
    return ras_to_lps(xyz)


def affine_lps_to_ras(affine_lps: np.ndarray) -> np.ndarray:
    """Convert a voxel-to-LPS affine into a voxel-to-RAS affine: diag(-1, -1, 1, 1) @ A."""
    return _LPS_RAS @ check_affine(affine_lps)


def spacing_from_affine(affine: np.ndarray) -> np.ndarray:
    """Voxel size in mm along each array axis: the norms of the affine's first three columns.

    Returns
    -------
    (3,) ndarray, float64
    """
    a = check_affine(affine)
    return np.sqrt((a[:3, :3] ** 2).sum(axis=0))


def canonical_transform(
    affine: np.ndarray, shape: tuple[int, int, int]
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Orientation that brings an array to the closest canonical (RAS+) axis order.

    Axes are only permuted and flipped, never resampled, so voxel values are unchanged and
    every world coordinate stays exact (nibabel ``io_orientation``, ``inv_ornt_aff``).

    Parameters
    ----------
    affine : (4, 4) array-like
        Original voxel index to world mm, RAS+.
    shape : tuple of 3 int
        Original array shape.

    Returns
    -------
    ornt : (3, 2) ndarray
        nibabel orientation to pass to ``nibabel.orientations.apply_orientation``.
    canonical_affine : (4, 4) ndarray, float64
        Canonical voxel index to world mm, RAS+.
    original_from_canonical : (4, 4) ndarray, float64
        Maps a canonical voxel index to the original file's voxel index.
    """
    a = check_affine(affine)
    ornt = orientations.io_orientation(a)
    original_from_canonical = orientations.inv_ornt_aff(ornt, shape)
    return ornt, a @ original_from_canonical, original_from_canonical
