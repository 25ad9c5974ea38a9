"""The in-memory record of one imported scan, shared by every reader and writer."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


@dataclass
class Volume:
    """A 3D scan as read from a file, before it is stored.

    Attributes
    ----------
    data : (I, J, K) ndarray
        Voxel values in the original file's array order (rescale slope and
        intercept already applied; integer dtype kept where the values fit).
    affine : (4, 4) ndarray, float64
        Maps the original voxel index (i, j, k, 1) to world mm, RAS+ (NIfTI convention).
    modality : str
        DICOM modality code ("CT", "MR", "US", ...) or "OT" when unknown.
    checksum : str
        SHA-256 hex digest of the source content, used to skip re-imports.
    provenance : dict
        De-identified facts worth keeping (format, acquisition parameters, a salted
        hash of the series UID). Never names, dates, institutions or free text.
    """

    data: np.ndarray
    affine: np.ndarray
    modality: str = "OT"
    checksum: str = ""
    provenance: dict = field(default_factory=dict)
