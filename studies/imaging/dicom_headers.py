"""Planning a DICOM import from headers only: what each file holds and how files form series.

Headers are read with ``stop_before_pixels`` so planning a large series costs little
memory. What is kept in memory per file is listed in `FileHeader`; identifying values
other than the UIDs needed to group files (Series Instance UID, SOP Instance UID) and the
series description shown to the coordinator when several series need a choice are not
kept at all.
"""

from __future__ import annotations

import math
import struct
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from pydicom import dcmread
from pydicom.datadict import tag_for_keyword
from pydicom.dataelem import RawDataElement
from pydicom.dataset import Dataset
from pydicom.errors import BytesLengthException, InvalidDicomError

from .deid import safe_acquisition
from .errors import (
    EmptySourceError,
    GeometryError,
    ImagingError,
    SeriesChoiceError,
    UnreadableFileError,
    UnsupportedImageError,
)

#: What pydicom raises on damaged headers, besides its own InvalidDicomError.
_PARSE_ERRORS = (
    InvalidDicomError, EOFError, OSError, ValueError, KeyError, TypeError, IndexError,
    AttributeError, OverflowError, NotImplementedError, struct.error, UnicodeError,
    BytesLengthException,
)

__all__ = [
    "FileHeader",
    "FrameInfo",
    "SeriesPlan",
    "choose_series",
    "group_series",
    "read_header",
]

_PIXEL_DATA_TAG = b"\xe0\x7f\x10\x00"


@dataclass(frozen=True)
class FrameInfo:
    """Geometry and rescale of one frame (one slice).

    Attributes
    ----------
    position : (3,) tuple of float
        Image Position (Patient): centre of the first transmitted pixel, LPS mm.
    orientation : (6,) tuple of float
        Image Orientation (Patient): row direction cosine X, then column direction cosine Y.
    pixel_spacing : (2,) tuple of float
        Pixel Spacing as stored: (row spacing, column spacing) mm (PS3.3 10.7.1.3).
    slope, intercept : float
        Rescale Slope and Rescale Intercept.
    """

    position: tuple[float, float, float]
    orientation: tuple[float, ...]
    pixel_spacing: tuple[float, float]
    slope: float = 1.0
    intercept: float = 0.0


@dataclass
class FileHeader:
    """What planning needs from one DICOM file (no patient-identifying values)."""

    path: Path
    series_uid: str
    instance_uid: str
    description: str
    modality: str
    sop_class: str
    transfer_syntax: str
    rows: int
    columns: int
    samples_per_pixel: int
    bits_allocated: int
    bits_stored: int
    pixel_representation: int
    burned_in: str
    frames: tuple[FrameInfo, ...]
    acquisition: dict = field(default_factory=dict)
    nominal_spacing_mm: float | None = None
    nominal_spacing_source: str = ""
    pixel_offset: int = -1


@dataclass
class SeriesPlan:
    """The files of one series (one Series Instance UID), before any pixel is read."""

    series_uid: str
    description: str
    modality: str
    files: list[FileHeader]

    @property
    def n_frames(self) -> int:
        """Number of slices over all files."""
        return sum(len(f.frames) for f in self.files)


_TAGS: dict[str, int] = {}


def _tag(keyword: str) -> int:
    tag = _TAGS.get(keyword)
    if tag is None:
        tag = _TAGS[keyword] = int(tag_for_keyword(keyword))
    return tag


def _text(ds: Dataset, keyword: str) -> str | None:
    """An ASCII-valued attribute (DS, IS, UI, CS) as text, without pydicom's conversion.

    Converting values through pydicom costs more than parsing the header itself, and these
    value representations are plain ASCII with backslash-separated values (PS3.5 6.2), so
    the raw bytes are decoded directly. None when the attribute is absent.
    """
    element = ds.get_item(_tag(keyword))
    if element is None:
        return None
    if isinstance(element, RawDataElement):
        raw = element.value
        return "" if raw is None else raw.decode("ascii", "replace").strip("\x00 ")
    value = element.value
    if value is None:
        return ""
    if isinstance(value, (list, tuple)) or type(value).__name__ == "MultiValue":
        return "\\".join(str(v) for v in value)
    return str(value).strip()


def _ushort(ds: Dataset, keyword: str, default: int) -> int:
    """A US attribute (Rows, BitsAllocated, ...) without pydicom's conversion."""
    element = ds.get_item(_tag(keyword))
    if element is None:
        return default
    if isinstance(element, RawDataElement):
        raw = element.value
        if not raw or len(raw) < 2:
            return default
        return int.from_bytes(raw[:2], "little" if element.is_little_endian else "big")
    return default if element.value in (None, "") else int(element.value)


def _fast_numbers(ds: Dataset, keyword: str, count: int, name: str) -> tuple[float, ...]:
    text = _text(ds, keyword)
    if not text:
        raise GeometryError(
            f"{name}: no {keyword}; the file does not place its image in patient space"
        )
    return _floats(text.split("\\"), count, keyword, name)


def _fast_float(ds: Dataset, keyword: str, default: float) -> float:
    text = _text(ds, keyword)
    try:
        return float(text) if text else default
    except ValueError:
        return default


def _burned_in(ds: Dataset) -> str:
    """'YES', 'NO' or 'ABSENT' for Burned In Annotation (0028,0301)."""
    value = (_text(ds, "BurnedInAnnotation") or "").upper()
    return value if value in ("YES", "NO") else "ABSENT"


def _floats(values: object, count: int, what: str, name: str) -> tuple[float, ...]:
    try:
        numbers = tuple(float(v) for v in values)  # type: ignore[union-attr]
    except (TypeError, ValueError) as exc:
        raise GeometryError(f"{name}: {what} is not numeric: {values!r}") from exc
    if len(numbers) != count or not all(math.isfinite(v) for v in numbers):
        raise GeometryError(f"{name}: {what} must be {count} finite numbers, got {values!r}")
    return numbers


def _required(item: Dataset, keyword: str, name: str) -> object:
    value = item.get(keyword)
    if value is None or value == "":
        raise GeometryError(
            f"{name}: no {keyword}; the file does not place its image in patient space"
        )
    return value


def _group_item(frame: Dataset, shared: Dataset, sequence: str) -> Dataset | None:
    for groups in (frame, shared):
        seq = groups.get(sequence)
        if seq:
            return seq[0]
    return None


def _rescale(item: Dataset | None, fallback: Dataset) -> tuple[float, float]:
    source = item if item is not None and "RescaleSlope" in item else fallback
    slope = float(source.get("RescaleSlope", 1.0) or 1.0)
    intercept = float(source.get("RescaleIntercept", 0.0) or 0.0)
    if source is fallback and "RescaleSlope" not in fallback and "DoseGridScaling" in fallback:
        slope = float(fallback.DoseGridScaling)  # RT Dose: stored value x scaling = Gy
    return slope, intercept


def _enhanced_frames(ds: Dataset, name: str) -> tuple[FrameInfo, ...]:
    """Frames of an enhanced multi-frame image from its functional groups (PS3.3 C.7.6.16)."""
    shared_seq = ds.get("SharedFunctionalGroupsSequence")
    shared = shared_seq[0] if shared_seq else Dataset()
    frames = []
    for index, group in enumerate(ds.PerFrameFunctionalGroupsSequence):
        where = f"{name} frame {index + 1}"
        position = _group_item(group, shared, "PlanePositionSequence")
        orientation = _group_item(group, shared, "PlaneOrientationSequence")
        measures = _group_item(group, shared, "PixelMeasuresSequence")
        if position is None or orientation is None or measures is None:
            raise GeometryError(f"{where}: plane position, orientation or pixel measures missing")
        slope, intercept = _rescale(
            _group_item(group, shared, "PixelValueTransformationSequence"), ds
        )
        frames.append(
            FrameInfo(
                _floats(_required(position, "ImagePositionPatient", where), 3, "position", where),
                _floats(_required(orientation, "ImageOrientationPatient", where), 6, "IOP", where),
                _floats(_required(measures, "PixelSpacing", where), 2, "PixelSpacing", where),
                slope,
                intercept,
            )
        )
    return tuple(frames)


def _plain_frames(ds: Dataset, n_frames: int, name: str) -> tuple[FrameInfo, ...]:
    position = _fast_numbers(ds, "ImagePositionPatient", 3, name)
    orientation = _fast_numbers(ds, "ImageOrientationPatient", 6, name)
    spacing = _fast_numbers(ds, "PixelSpacing", 2, name)
    if _text(ds, "RescaleSlope") is not None:
        slope = _fast_float(ds, "RescaleSlope", 1.0) or 1.0
        intercept = _fast_float(ds, "RescaleIntercept", 0.0)
    else:
        slope, intercept = _rescale(None, ds)
    if n_frames == 1:
        return (FrameInfo(position, orientation, spacing, slope, intercept),)
    offsets = ds.get("GridFrameOffsetVector")
    if not offsets or len(offsets) != n_frames:
        raise UnsupportedImageError(
            f"{name}: multi-frame image with {n_frames} frames but no per-frame positions "
            "(neither per-frame functional groups nor a Grid Frame Offset Vector)"
        )
    # RT Dose (PS3.3 C.8.8.3.2): offsets along the normal, relative to Image Position.
    x, y = np.array(orientation[:3]), np.array(orientation[3:])
    normal = np.cross(x, y)
    return tuple(
        FrameInfo(
            tuple(np.array(position) + float(o) * normal), orientation, spacing, slope, intercept
        )
        for o in offsets
    )


def _nominal_spacing(ds: Dataset) -> tuple[float | None, str]:
    """Slice spacing stated in the header, used only when a series has a single slice."""
    measures = None
    if _tag("SharedFunctionalGroupsSequence") in ds:
        shared_seq = ds.SharedFunctionalGroupsSequence
        if shared_seq:
            measures = _group_item(Dataset(), shared_seq[0], "PixelMeasuresSequence")
    for source in (measures, ds):
        if source is None:
            continue
        for keyword in ("SpacingBetweenSlices", "SliceThickness"):
            value = _fast_float(source, keyword, 0.0)
            if math.isfinite(value) and value > 0:
                return value, keyword
    return None, ""


def read_header(path: Path | str, seen_series: set[str] | None = None) -> FileHeader:
    """Read one DICOM file's header (no pixel data) into a `FileHeader`.

    Parameters
    ----------
    path : Path or str
    seen_series : set of str, optional
        Series already met: their acquisition facts are taken from the first file, so they
        are not collected again (the set is updated).

    Raises
    ------
    UnreadableFileError
        Not DICOM, or a header that cannot be parsed.
    UnsupportedImageError
        A DICOM object without an image, or a multi-frame image without frame positions.
    GeometryError
        Image position, orientation or pixel spacing missing or not finite numbers.
    """
    path = Path(path)
    try:
        return _read_header(path, seen_series)
    except ImagingError:
        raise
    except _PARSE_ERRORS as exc:
        # pydicom converts values lazily, so a damaged element can fail on first access.
        raise UnreadableFileError(f"{path.name}: not a readable DICOM file ({exc})") from exc


def _read_header(path: Path, seen_series: set[str] | None) -> FileHeader:
    name = path.name
    with open(path, "rb") as handle:
        ds = dcmread(handle, stop_before_pixels=True)
        offset = handle.tell()
    if _tag("Rows") not in ds or _tag("Columns") not in ds:
        sop = getattr(ds.get("SOPClassUID"), "name", "unknown SOP class")
        raise UnsupportedImageError(f"{name}: DICOM object without an image ({sop})")
    try:
        n_frames = int(_text(ds, "NumberOfFrames") or 1)
    except ValueError as exc:
        raise UnreadableFileError(f"{name}: NumberOfFrames is not a number") from exc
    if _tag("PerFrameFunctionalGroupsSequence") in ds:
        frames = _enhanced_frames(ds, name)
    else:
        frames = _plain_frames(ds, n_frames, name)
    if len(frames) != n_frames:
        raise UnreadableFileError(
            f"{name}: NumberOfFrames is {n_frames} but {len(frames)} frame descriptions found"
        )
    spacing, spacing_source = _nominal_spacing(ds)
    meta = ds.file_meta if "file_meta" in ds.__dict__ else Dataset()
    series_uid = _text(ds, "SeriesInstanceUID") or ""
    first_of_series = seen_series is None or series_uid not in seen_series
    if seen_series is not None:
        seen_series.add(series_uid)
    return FileHeader(
        path=path,
        series_uid=series_uid,
        instance_uid=_text(ds, "SOPInstanceUID") or "",
        description=str(ds.get("SeriesDescription", "")),
        modality=_text(ds, "Modality") or "OT",
        sop_class=_text(ds, "SOPClassUID") or "",
        transfer_syntax=_text(meta, "TransferSyntaxUID") or "1.2.840.10008.1.2",
        rows=_ushort(ds, "Rows", 0),
        columns=_ushort(ds, "Columns", 0),
        samples_per_pixel=_ushort(ds, "SamplesPerPixel", 1),
        bits_allocated=_ushort(ds, "BitsAllocated", 16),
        bits_stored=_ushort(ds, "BitsStored", _ushort(ds, "BitsAllocated", 16)),
        pixel_representation=_ushort(ds, "PixelRepresentation", 0),
        burned_in=_burned_in(ds),
        frames=frames,
        acquisition=safe_acquisition(ds, _text) if first_of_series else {},
        nominal_spacing_mm=spacing,
        nominal_spacing_source=spacing_source,
        pixel_offset=offset,
    )


def group_series(headers: list[FileHeader]) -> list[SeriesPlan]:
    """Group file headers by Series Instance UID, in a stable order (description, UID).

    A second file with the same SOP Instance UID as one already grouped is the same
    instance (DICOM PS3.3 C.12.1.1.1, from memory) and is left out.
    """
    by_uid: dict[str, list[FileHeader]] = {}
    instances: set[tuple[str, str]] = set()
    for header in headers:
        key = (header.series_uid, header.instance_uid)
        if header.instance_uid and key in instances:
            continue  # the same instance twice (e.g. uploaded twice): one copy is enough
        instances.add(key)
        by_uid.setdefault(header.series_uid, []).append(header)
    plans = [
        SeriesPlan(uid, files[0].description, files[0].modality, files)
        for uid, files in by_uid.items()
    ]
    return sorted(plans, key=lambda p: (p.description, p.series_uid))


def describe_series(plans: list[SeriesPlan]) -> str:
    """One numbered line per series: UID, description, modality and slice count."""
    return "\n".join(
        f"  {n}. {p.series_uid} '{p.description}' ({p.modality}, {p.n_frames} slices)"
        for n, p in enumerate(plans, start=1)
    )


def choose_series(plans: list[SeriesPlan], wanted: str | None = None) -> SeriesPlan:
    """Pick the series to import: the only one, or the one named by UID or listing number.

    Raises
    ------
    EmptySourceError
        No series at all.
    SeriesChoiceError
        Several series and none chosen (the message lists them), or `wanted` matches none.
    """
    if not plans:
        raise EmptySourceError("no DICOM series found")
    if wanted is None:
        if len(plans) == 1:
            return plans[0]
        raise SeriesChoiceError(
            f"found {len(plans)} DICOM series and none was chosen; pick one with "
            f"--series (its UID or number):\n{describe_series(plans)}"
        )
    for plan in plans:
        if plan.series_uid == wanted:
            return plan
    if wanted.isdigit() and 1 <= int(wanted) <= len(plans):
        return plans[int(wanted) - 1]
    raise SeriesChoiceError(
        f"series {wanted!r} is not among the {len(plans)} found:\n{describe_series(plans)}"
    )
