"""Synthetic volumes and affines shared by the imaging tests (invented phantoms)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from pydicom.data import get_testdata_file


def rotation(axis: str, degrees: float) -> np.ndarray:
    """3x3 right-handed rotation about x, y or z."""
    c, s = np.cos(np.radians(degrees)), np.sin(np.radians(degrees))
    i, j = {"x": (1, 2), "y": (2, 0), "z": (0, 1)}[axis]
    r = np.eye(3)
    r[i, i], r[i, j], r[j, i], r[j, j] = c, -s, s, c
    return r


def oblique_affine(spacing=(0.8, 0.6, 2.5), origin=(-101.25, 37.5, 12.125)) -> np.ndarray:
    """Voxel to RAS affine rotated about two axes, anisotropic spacing, no shear."""
    affine = np.eye(4)
    affine[:3, :3] = rotation("z", 20.0) @ rotation("x", 12.0) @ np.diag(spacing)
    affine[:3, 3] = origin
    return affine


def phantom(shape=(24, 20, 9), seed: int = 20261201) -> np.ndarray:
    """int16 volume with random texture and, if it fits, one bright voxel at (3, 5, 7)."""
    rng = np.random.default_rng(seed)
    data = rng.integers(-900, 1500, size=shape, dtype=np.int16)
    if all(n > i for n, i in zip(shape, (3, 5, 7), strict=True)):
        data[3, 5, 7] = 3000
    return data


def pydicom_file(name: str) -> Path:
    """A pydicom test file that ships with the package (never downloads)."""
    path = get_testdata_file(name, download=False)
    if path is None:
        raise FileNotFoundError(f"pydicom test file {name} is not available offline")
    return Path(path)


def nibabel_file(name: str) -> Path:
    """A file from nibabel's shipped test data (nibabel/tests/data)."""
    import nibabel

    return Path(nibabel.__file__).parent / "tests" / "data" / name


def identifying_attributes() -> tuple[dict, list[str]]:
    """A value for every attribute in the Basic Profile table we apply, and the strings to grep.

    Each value is distinctive (invented; no real person), so finding it in stored bytes
    means it leaked. UIDs are fresh; sequences carry a distinctive UID or name inside.
    """
    from pydicom.datadict import dictionary_VR, keyword_for_tag
    from pydicom.dataset import Dataset
    from pydicom.sequence import Sequence
    from pydicom.uid import generate_uid

    from studies.imaging.deid import BASIC_PROFILE

    values: dict = {}
    needles: list[str] = []
    for n, tag in enumerate(sorted(BASIC_PROFILE)):
        if tag >> 16 == 0x0002 or tag == 0x00080018:
            continue  # file meta and SOP Instance UID: unique per file, set by the writer
        keyword, vr = keyword_for_tag(tag), dictionary_VR(tag)
        if vr == "PN":
            value = f"Quorvath^Ilsabet{n:02d}"
        elif vr == "DA":
            value = f"19{n:02d}0317"
        elif vr == "TM":
            value = f"1{n % 10}4253.{n:02d}"
        elif vr == "DT":
            value = f"19{n:02d}0317104253"
        elif vr == "AS":
            value = "083Y"
        elif vr in ("DS", "IS"):
            value = f"7{n:02d}.{n:03d}" if vr == "DS" else f"7{n:03d}"
        elif vr == "UI":
            value = generate_uid()
        elif vr == "SQ":
            item = Dataset()
            item.ReferencedSOPClassUID = "1.2.840.10008.5.1.4.1.1.2"
            item.ReferencedSOPInstanceUID = generate_uid()
            if keyword == "OtherPatientIDsSequence":
                item.PatientID = f"XQID{n:04d}"
            value = Sequence([item])
            needles.append(str(item.ReferencedSOPInstanceUID))
        elif vr == "CS":
            value = f"ZQWX{n:02d}"
        else:
            value = f"Thistlewk-{n:02d}"  # fits SH (16 characters)
        values[keyword] = value
        if not isinstance(value, Sequence):
            needles.append(str(value))
    return values, needles
