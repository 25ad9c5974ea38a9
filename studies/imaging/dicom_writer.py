"""Writing a synthetic volume as a DICOM series: test data and benchmark input made by our own code.

The geometry is the inverse of the Image Plane Module equation (DICOM PS3.3 C.7.6.2.1.1):
the first affine column is the row direction cosine times the column spacing, the second
the column direction cosine times the row spacing, and Image Position (Patient) of slice k
is the origin plus k times the third column, all in LPS mm. The phantoms are invented; no
real patient data are involved.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from pathlib import Path

import numpy as np
from pydicom.dataset import Dataset, FileMetaDataset
from pydicom.sequence import Sequence as DicomSequence
from pydicom.uid import (
    CTImageStorage,
    EnhancedCTImageStorage,
    EnhancedMRImageStorage,
    ExplicitVRLittleEndian,
    MRImageStorage,
    generate_uid,
)
from pydicom.valuerep import format_number_as_ds

__all__ = ["lps_geometry", "write_enhanced", "write_series"]

_LPS_RAS = np.diag([-1.0, -1.0, 1.0, 1.0])
SliceHook = Callable[[int, Dataset], None]


def _ds(values: Sequence[float]) -> list[str]:
    """Decimal strings of at most 16 characters (the DS limit), as precise as that allows."""
    return [format_number_as_ds(float(v)) for v in values]


def lps_geometry(affine_ras: np.ndarray) -> dict:
    """Split a voxel (column i, row j, slice k) to RAS affine into DICOM plane attributes.

    Parameters
    ----------
    affine_ras : (4, 4) array-like, float
        Voxel index (i = column, j = row, k = slice) to world mm, RAS+.

    Returns
    -------
    dict
        ``orientation`` (6,) IOP (row cosine X then column cosine Y, LPS), ``pixel_spacing``
        (row spacing, column spacing) mm, ``origin`` (3,) LPS mm, ``step`` (3,) LPS mm per
        slice.

    Raises
    ------
    ValueError
        When the first two columns are not orthogonal (DICOM rows and columns are).
    """
    a = _LPS_RAS @ np.asarray(affine_ras, dtype=np.float64)
    di, dj = np.linalg.norm(a[:3, 0]), np.linalg.norm(a[:3, 1])
    x, y = a[:3, 0] / di, a[:3, 1] / dj
    if abs(float(x @ y)) > 1e-9:
        raise ValueError(f"row and column directions are not orthogonal: X.Y = {x @ y}")
    return {
        "orientation": np.concatenate([x, y]),
        "pixel_spacing": (float(dj), float(di)),
        "origin": a[:3, 3].copy(),
        "step": a[:3, 2].copy(),
    }


def _base_dataset(modality: str, sop_class: str, series_uid: str, study_uid: str) -> Dataset:
    ds = Dataset()
    ds.SOPClassUID = sop_class
    ds.Modality = modality
    ds.SeriesInstanceUID = series_uid
    ds.StudyInstanceUID = study_uid
    ds.FrameOfReferenceUID = generate_uid()
    ds.PatientName = "Phantom^Synthetic"
    ds.PatientID = "PHANTOM-0"
    ds.SeriesDescription = "synthetic phantom"
    ds.BurnedInAnnotation = "NO"
    ds.SamplesPerPixel = 1
    ds.PhotometricInterpretation = "MONOCHROME2"
    return ds


def _pixel_module(ds: Dataset, dtype: np.dtype, rows: int, cols: int) -> None:
    ds.Rows, ds.Columns = rows, cols
    ds.BitsAllocated = ds.BitsStored = 8 * dtype.itemsize
    ds.HighBit = ds.BitsStored - 1
    ds.PixelRepresentation = 1 if dtype.kind == "i" else 0


def _finish(ds: Dataset, path: Path) -> Path:
    meta = FileMetaDataset()
    meta.MediaStorageSOPClassUID = ds.SOPClassUID
    meta.MediaStorageSOPInstanceUID = ds.SOPInstanceUID
    meta.TransferSyntaxUID = ExplicitVRLittleEndian
    ds.file_meta = meta
    ds.save_as(path, enforce_file_format=True)
    return path


def _stored(data: np.ndarray) -> np.ndarray:
    data = np.asarray(data)
    if data.ndim != 3 or data.dtype.kind not in "iu" or data.dtype.itemsize > 4:
        raise ValueError(f"expected a 3D integer array, got {data.shape} {data.dtype}")
    return data.astype(data.dtype.newbyteorder("<"), copy=False)


def write_series(
    data: np.ndarray,
    affine_ras: np.ndarray,
    out_dir: Path | str,
    *,
    modality: str = "CT",
    slope: float = 1.0,
    intercept: float = 0.0,
    attributes: dict | None = None,
    names: Sequence[str] | None = None,
    hook: SliceHook | None = None,
) -> list[Path]:
    """Write one file per slice (CT or MR Image Storage, Explicit VR Little Endian).

    Parameters
    ----------
    data : (I, J, K) integer ndarray
        Stored values indexed (column, row, slice); slice k is written as ``data[:, :, k].T``.
    affine_ras : (4, 4) array-like, float
        Voxel (i, j, k) to world mm, RAS+; its third column is the step between slices.
    out_dir : Path or str
        Existing folder to write into.
    modality : str
        "CT" or "MR".
    slope, intercept : float
        RescaleSlope and RescaleIntercept written on every slice.
    attributes : dict, optional
        Extra attributes by keyword, set on every slice (e.g. identifying values for the
        de-identification tests).
    names : sequence of str, optional
        File names, one per slice (default ``slice_0000.dcm`` ...).
    hook : callable(k, dataset), optional
        Called on each slice's dataset just before saving (to build faulty series).

    Returns
    -------
    list of Path
        The files, in slice order.
    """
    stored = _stored(data)
    geo = lps_geometry(affine_ras)
    out_dir = Path(out_dir)
    series_uid, study_uid = generate_uid(), generate_uid()
    sop_class = CTImageStorage if modality == "CT" else MRImageStorage
    n_slices = stored.shape[2]
    names = list(names) if names is not None else [f"slice_{k:04d}.dcm" for k in range(n_slices)]
    paths = []
    for k in range(n_slices):
        ds = _base_dataset(modality, sop_class, series_uid, study_uid)
        ds.SOPInstanceUID = generate_uid()
        ds.InstanceNumber = k + 1
        ds.ImageOrientationPatient = _ds(geo["orientation"])
        ds.ImagePositionPatient = _ds(geo["origin"] + k * geo["step"])
        ds.PixelSpacing = _ds(geo["pixel_spacing"])
        ds.SliceThickness = format_number_as_ds(float(np.linalg.norm(geo["step"])))
        ds.RescaleSlope = format_number_as_ds(float(slope))
        ds.RescaleIntercept = format_number_as_ds(float(intercept))
        _pixel_module(ds, stored.dtype, stored.shape[1], stored.shape[0])
        for keyword, value in (attributes or {}).items():
            setattr(ds, keyword, value)
        ds.PixelData = np.ascontiguousarray(stored[:, :, k].T).tobytes()
        if hook is not None:
            hook(k, ds)
        paths.append(_finish(ds, out_dir / names[k]))
    return paths


def _item(**values: object) -> Dataset:
    item = Dataset()
    for keyword, value in values.items():
        setattr(item, keyword, value)
    return item


def write_enhanced(
    data: np.ndarray,
    affine_ras: np.ndarray,
    path: Path | str,
    *,
    modality: str = "MR",
    slope: float = 1.0,
    intercept: float = 0.0,
    frame_order: Sequence[int] | None = None,
) -> Path:
    """Write an enhanced multi-frame image: one file, per-frame functional groups.

    Parameters
    ----------
    data : (I, J, K) integer ndarray
        Stored values indexed (column, row, slice).
    affine_ras : (4, 4) array-like, float
        Voxel (i, j, k) to world mm, RAS+.
    path : Path or str
        The file to write.
    modality : str
        "MR" (Enhanced MR Image Storage) or "CT" (Enhanced CT Image Storage).
    slope, intercept : float
        Written in the shared Pixel Value Transformation Sequence.
    frame_order : sequence of int, optional
        Which slice each frame holds (default 0..K-1), to test ordering by position.

    Returns
    -------
    Path
    """
    stored = _stored(data)
    geo = lps_geometry(affine_ras)
    order = list(frame_order) if frame_order is not None else list(range(stored.shape[2]))
    sop_class = EnhancedMRImageStorage if modality == "MR" else EnhancedCTImageStorage
    ds = _base_dataset(modality, sop_class, generate_uid(), generate_uid())
    ds.SOPInstanceUID = generate_uid()
    ds.NumberOfFrames = len(order)
    _pixel_module(ds, stored.dtype, stored.shape[1], stored.shape[0])
    shared = _item(
        PixelMeasuresSequence=DicomSequence(
            [
                _item(
                    PixelSpacing=_ds(geo["pixel_spacing"]),
                    SliceThickness=format_number_as_ds(float(np.linalg.norm(geo["step"]))),
                )
            ]
        ),
        PlaneOrientationSequence=DicomSequence(
            [_item(ImageOrientationPatient=_ds(geo["orientation"]))]
        ),
        PixelValueTransformationSequence=DicomSequence(
            [
                _item(
                    RescaleSlope=format_number_as_ds(float(slope)),
                    RescaleIntercept=format_number_as_ds(float(intercept)),
                    RescaleType="US",
                )
            ]
        ),
    )
    ds.SharedFunctionalGroupsSequence = DicomSequence([shared])
    ds.PerFrameFunctionalGroupsSequence = DicomSequence(
        [
            _item(
                PlanePositionSequence=DicomSequence(
                    [_item(ImagePositionPatient=_ds(geo["origin"] + k * geo["step"]))]
                ),
                FrameContentSequence=DicomSequence([_item(InStackPositionNumber=k + 1)]),
            )
            for k in order
        ]
    )
    frames = [np.ascontiguousarray(stored[:, :, k].T) for k in order]
    ds.PixelData = np.stack(frames).tobytes()
    return _finish(ds, Path(path))
