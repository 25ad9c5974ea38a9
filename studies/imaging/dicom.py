"""Reading a planned DICOM series into a `Volume`: slice order, the affine, checks, pixels.

The voxel index of the volume is (i, j, k) = (column, row, slice), the indices of the
Image Plane Module equation (DICOM PS3.3 C.7.6.2.1.1); slices are ordered by the
projection of Image Position (Patient) on the slice normal, never by Instance Number or
file name. The affine is built in LPS (DICOM patient frame) and converted to RAS+ by
negating x and y.

References
----------
1. NEMA. DICOM PS3.3, C.7.6.2 Image Plane Module, C.7.6.2.1.1 Image Position and Image
   Orientation (the equation; Image Position is the centre of the first transmitted pixel).
2. NEMA. DICOM PS3.3, 10.7.1.3 Pixel Spacing: (row spacing, column spacing).
3. NEMA. DICOM PS3.3, C.7.6.16 Multi-frame Functional Groups (enhanced images).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass

import numpy as np
from pydicom import dcmread
from pydicom.pixels.decoders.base import get_decoder
from pydicom.uid import UID, ExplicitVRLittleEndian, ImplicitVRLittleEndian

from .deid import series_uid_hash
from .dicom_headers import FileHeader, SeriesPlan
from .errors import (
    BurnedInAnnotationError,
    GeometryError,
    UnreadableFileError,
    UnsupportedImageError,
)
from .geometry import affine_lps_to_ras
from .pixels import apply_rescale, rescaled_dtype
from .volume import Volume

__all__ = [
    "SliceGeometry",
    "check_pixels_supported",
    "image_plane_affine",
    "plan_geometry",
    "read_series",
    "series_checksum",
    "slice_normal",
]

_NATIVE_LE = {ExplicitVRLittleEndian, ImplicitVRLittleEndian}
_PIXEL_DATA_TAG = b"\xe0\x7f\x10\x00"
_BURNED_IN_SUSPECT_MODALITIES = {"US", "XC", "ES", "SC"}
_SECONDARY_CAPTURE_PREFIX = "1.2.840.10008.5.1.4.1.1.7"


def slice_normal(orientation: np.ndarray) -> np.ndarray:
    """Unit slice normal n = X x Y from Image Orientation (Patient).

    Parameters
    ----------
    orientation : (6,) array-like, float
        Row direction cosine X then column direction cosine Y, LPS.

    Returns
    -------
    (3,) ndarray, float64
        Unit normal, LPS; the direction in which k increases.
    """
    o = np.asarray(orientation, dtype=np.float64)
    n = np.cross(o[:3], o[3:])
    return n / np.linalg.norm(n)


def image_plane_affine(
    orientation: np.ndarray,
    position: np.ndarray,
    pixel_spacing: tuple[float, float],
    slice_step: np.ndarray,
) -> np.ndarray:
    """Voxel (column i, row j, slice k) to LPS mm, from the PS3.3 C.7.6.2.1.1 equation.

    Parameters
    ----------
    orientation : (6,) array-like
        Image Orientation (Patient): X (row direction, along which i grows), then Y.
    position : (3,) array-like, LPS mm
        Image Position (Patient) of the first slice (k = 0).
    pixel_spacing : (2,) tuple of float, mm
        Pixel Spacing as stored: (row spacing = delta j, column spacing = delta i).
    slice_step : (3,) array-like, LPS mm
        Displacement from one slice to the next.

    Returns
    -------
    (4, 4) ndarray, float64
        Columns X * delta_i, Y * delta_j, slice_step, position.

    Notes
    -----
    P = S + X * delta_i * i + Y * delta_j * j (+ step * k): the first Pixel Spacing value
    is the distance between rows, so it scales the column cosine Y, and the second scales
    the row cosine X.
    """
    o = np.asarray(orientation, dtype=np.float64)
    affine = np.eye(4)
    affine[:3, 0] = o[:3] * float(pixel_spacing[1])
    affine[:3, 1] = o[3:] * float(pixel_spacing[0])
    affine[:3, 2] = np.asarray(slice_step, dtype=np.float64)
    affine[:3, 3] = np.asarray(position, dtype=np.float64)
    return affine


@dataclass(frozen=True)
class SliceGeometry:
    """A checked slice stack.

    Attributes
    ----------
    order : list of (int, int)
        (file index in the plan, frame index in that file) for k = 0, 1, ...
    affine_lps, affine_ras : (4, 4) ndarray, float64
        Voxel (column, row, slice) to world mm, LPS and RAS+.
    shape : (3,) tuple of int
        (columns, rows, slices).
    spacing_source : str
        "ImagePositionPatient" or, for a single slice, the header attribute used.
    """

    order: list[tuple[int, int]]
    affine_lps: np.ndarray
    affine_ras: np.ndarray
    shape: tuple[int, int, int]
    spacing_source: str


def _check_consistent(plan: SeriesPlan) -> None:
    sizes = {(f.rows, f.columns) for f in plan.files}
    if len(sizes) > 1:
        raise GeometryError(f"mixed image sizes (rows, columns) within the series: {sorted(sizes)}")
    orientations = np.array([fr.orientation for f in plan.files for fr in f.frames])
    distinct = np.unique(np.round(orientations, 4), axis=0)
    if np.abs(orientations - orientations[0]).max() > 1e-4:
        raise GeometryError(
            f"mixed orientations within the series: {len(distinct)} different "
            f"ImageOrientationPatient values, e.g. {distinct[:3].tolist()}"
        )
    spacings = np.array([fr.pixel_spacing for f in plan.files for fr in f.frames])
    if np.abs(spacings - spacings[0]).max() > 1e-4:
        raise GeometryError(f"mixed PixelSpacing within the series: {np.unique(spacings, axis=0)}")
    x, y = orientations[0, :3], orientations[0, 3:]
    if abs(np.linalg.norm(x) - 1) > 1e-3 or abs(np.linalg.norm(y) - 1) > 1e-3 or abs(x @ y) > 1e-3:
        raise GeometryError(
            f"ImageOrientationPatient {orientations[0].tolist()} is not two orthogonal unit "
            f"vectors (|X| = {np.linalg.norm(x):.6f}, |Y| = {np.linalg.norm(y):.6f}, "
            f"X.Y = {x @ y:.6f}): sheared geometry is not supported"
        )
    if np.any(spacings[0] <= 0):
        raise GeometryError(f"PixelSpacing must be positive, got {spacings[0].tolist()}")


def _check_stack(
    positions: np.ndarray, along: np.ndarray, normal: np.ndarray, tolerance_mm: float
) -> float:
    """Check sorted slice positions; return the slice spacing in mm."""
    steps = np.diff(along)
    duplicates = steps < 1e-3
    if np.any(duplicates):
        k = int(np.argmax(duplicates))
        raise GeometryError(
            f"duplicate slice positions: {int(duplicates.sum()) + 1} or more slices at the same "
            f"place along the slice normal, e.g. {along[k]:.4f} mm (several echoes, phases or "
            "acquisitions in one series?)"
        )
    offsets = positions - positions[0]
    drift = np.linalg.norm(offsets - np.outer(offsets @ normal, normal), axis=1)
    if drift.max() > 1e-3 + 1e-4 * (along[-1] - along[0]):
        angle = float(np.degrees(np.arctan2(drift[1:], along[1:] - along[0])).max())
        raise GeometryError(
            f"slice positions move off the slice normal by up to {drift.max():.4f} mm over "
            f"{along[-1] - along[0]:.4f} mm (up to {angle:.2f} degrees): gantry tilt or sheared "
            "geometry is not supported"
        )
    typical = float(np.median(steps))
    if np.any(steps > 1.5 * typical):
        k = int(np.argmax(steps))
        missing = round(steps[k] / typical) - 1
        raise GeometryError(
            f"gap in the slice positions: {steps[k]:.4f} mm between slices at {along[k]:.4f} and "
            f"{along[k + 1]:.4f} mm along the normal where the usual spacing is {typical:.4f} mm "
            f"(looks like {max(missing, 1)} missing slice(s))"
        )
    if np.abs(steps - typical).max() > tolerance_mm:
        seen = sorted({round(float(s), 4) for s in steps})
        raise GeometryError(
            f"non-uniform slice spacing beyond {tolerance_mm} mm: spacings seen {seen} mm"
        )
    return float((along[-1] - along[0]) / (len(along) - 1))


def plan_geometry(plan: SeriesPlan, spacing_tolerance_mm: float = 0.02) -> SliceGeometry:
    """Order the slices of a series and build its affine, refusing unusable geometry.

    Parameters
    ----------
    plan : SeriesPlan
        Headers of one series.
    spacing_tolerance_mm : float
        Largest allowed difference between a slice step and the median step.

    Returns
    -------
    SliceGeometry

    Raises
    ------
    GeometryError
        Mixed sizes, orientations or pixel spacings; non-orthonormal orientation; duplicate
        positions; gantry tilt or shear; a gap that looks like a missing slice; non-uniform
        spacing; a single slice with no stated thickness.

    Notes
    -----
    s_k = n . IPP_k with n = X x Y; slices are sorted by s_k and the spacing is the mean of
    diff(s_k), (s_last - s_first) / (K - 1). Slice Thickness is used only for a one-slice
    series, where no second position exists.
    """
    _check_consistent(plan)
    keys = [(fi, fr) for fi, f in enumerate(plan.files) for fr in range(len(f.frames))]
    frames = [plan.files[fi].frames[fr] for fi, fr in keys]
    positions = np.array([f.position for f in frames], dtype=np.float64)
    orientation = np.array(frames[0].orientation, dtype=np.float64)
    normal = slice_normal(orientation)
    along = positions @ normal
    order = np.argsort(along, kind="stable")
    if len(frames) > 1:
        spacing = _check_stack(positions[order], along[order], normal, spacing_tolerance_mm)
        source = "ImagePositionPatient"
    else:
        spacing = plan.files[0].nominal_spacing_mm
        source = plan.files[0].nominal_spacing_source
        if spacing is None:
            raise GeometryError("a single slice without SliceThickness or SpacingBetweenSlices")
    first = frames[order[0]]
    affine_lps = image_plane_affine(
        orientation, first.position, first.pixel_spacing, normal * spacing
    )
    header = plan.files[0]
    return SliceGeometry(
        order=[keys[i] for i in order],
        affine_lps=affine_lps,
        affine_ras=affine_lps_to_ras(affine_lps),
        shape=(header.columns, header.rows, len(frames)),
        spacing_source=source,
    )


def check_pixels_supported(plan: SeriesPlan, allow_burned_in: bool = False) -> None:
    """Refuse colour images, undecodable transfer syntaxes and burned-in annotation.

    Raises
    ------
    UnsupportedImageError
        SamplesPerPixel > 1, or a transfer syntax no installed pixel handler decodes.
    BurnedInAnnotationError
        Burned In Annotation is YES (or absent where burned-in text is common: US, SC)
        and `allow_burned_in` is False.
    """
    for header in plan.files:
        if header.samples_per_pixel != 1:
            raise UnsupportedImageError(
                f"{header.path.name}: colour image (SamplesPerPixel = "
                f"{header.samples_per_pixel}); only greyscale volumes are supported"
            )
    for syntax in sorted({h.transfer_syntax for h in plan.files}):
        uid = UID(syntax)
        if uid in _NATIVE_LE or (uid.is_transfer_syntax and not uid.is_compressed):
            continue
        try:
            decoder = get_decoder(uid)
        except NotImplementedError as exc:
            raise UnsupportedImageError(
                f"transfer syntax {uid.name} ({uid}) has no pixel decoder in pydicom"
            ) from exc
        if not decoder.is_available:
            missing = "; ".join(decoder.missing_dependencies)
            raise UnsupportedImageError(
                f"transfer syntax {uid.name} ({uid}) cannot be decoded by the installed pixel "
                f"handlers (would need one of: {missing})"
            )
    if allow_burned_in:
        return
    for header in plan.files:
        suspect = header.modality in _BURNED_IN_SUSPECT_MODALITIES or header.sop_class.startswith(
            _SECONDARY_CAPTURE_PREFIX
        )
        if header.burned_in == "YES" or (header.burned_in == "ABSENT" and suspect):
            raise BurnedInAnnotationError(
                f"{header.path.name}: Burned In Annotation is {header.burned_in} "
                f"(modality {header.modality}); the pixels may show identifying text. Import "
                "only after checking the images, and allow it explicitly for this import"
            )


def _raw_dtype(header: FileHeader) -> np.dtype:
    if header.bits_allocated not in (8, 16, 32):
        raise UnsupportedImageError(
            f"{header.path.name}: BitsAllocated = {header.bits_allocated} is not supported"
        )
    kind = "i" if header.pixel_representation == 1 else "u"
    return np.dtype(f"{kind}{header.bits_allocated // 8}")


def _read_native(header: FileHeader, out: np.ndarray) -> bool:
    """Read one single-frame native little-endian file straight into `out`; False to fall back."""
    if UID(header.transfer_syntax) not in _NATIVE_LE or header.pixel_offset < 4:
        return False
    explicit = UID(header.transfer_syntax) == ExplicitVRLittleEndian
    with open(header.path, "rb") as handle:
        for start in (header.pixel_offset - 4, header.pixel_offset):  # after or at the tag
            handle.seek(start)
            element = handle.read(12 if explicit else 8)
            if element[:4] == _PIXEL_DATA_TAG:
                break
        else:
            return False
        length = int.from_bytes(element[8:12] if explicit else element[4:8], "little")
        if length == 0xFFFFFFFF or length < out.nbytes:
            if length != 0xFFFFFFFF:
                raise UnreadableFileError(
                    f"{header.path.name}: pixel data holds {length} bytes, "
                    f"{out.nbytes} expected (truncated or corrupt)"
                )
            return False
        got = handle.readinto(memoryview(out).cast("B"))
    if got != out.nbytes:
        raise UnreadableFileError(
            f"{header.path.name}: file ends after {got} of {out.nbytes} pixel bytes (truncated)"
        )
    return True


def _decode(header: FileHeader) -> np.ndarray:
    """Decode a file's pixel data with pydicom: (frames, rows, columns), native byte order."""
    try:
        pixels = dcmread(header.path).pixel_array
    except Exception as exc:  # pydicom raises many types for bad pixel data
        raise UnreadableFileError(
            f"{header.path.name}: pixel data cannot be read ({type(exc).__name__}: {exc})"
        ) from exc
    pixels = pixels.reshape((len(header.frames), header.rows, header.columns))
    return pixels.astype(pixels.dtype.newbyteorder("="), copy=False)


def _mask_stored_bits(stack: np.ndarray, header: FileHeader) -> None:
    """Keep only BitsStored bits, sign-extending signed values (PS3.5 8.1.1), in place."""
    unused = header.bits_allocated - header.bits_stored
    if unused <= 0 or header.bits_stored <= 0:
        return
    if header.pixel_representation == 1:
        np.left_shift(stack, unused, out=stack)
        np.right_shift(stack, unused, out=stack)
    else:
        np.bitwise_and(stack, (1 << header.bits_stored) - 1, out=stack)


def _read_stack(plan: SeriesPlan, geometry: SliceGeometry) -> np.ndarray:
    """All slices in geometry order as one C-ordered (slices, rows, columns) array."""
    dtype = np.result_type(*{_raw_dtype(h) for h in plan.files})
    n_cols, n_rows, n_slices = geometry.shape
    stack = np.empty((n_slices, n_rows, n_cols), dtype=dtype)
    slots: dict[int, list[tuple[int, int]]] = {}
    for k, (fi, fr) in enumerate(geometry.order):
        slots.setdefault(fi, []).append((k, fr))
    for fi, wanted in slots.items():
        header = plan.files[fi]
        if len(header.frames) == 1 and _raw_dtype(header) == dtype:
            k = wanted[0][0]
            if _read_native(header, stack[k]):
                _mask_stored_bits(stack[k], header)
                continue
        pixels = _decode(header)
        for k, fr in wanted:
            stack[k] = pixels[fr]
        del pixels
    return stack


def read_series(
    plan: SeriesPlan,
    *,
    uid_salt: bytes,
    allow_burned_in: bool = False,
    spacing_tolerance_mm: float = 0.02,
) -> Volume:
    """Read one planned series into a `Volume` (data indexed column, row, slice).

    Parameters
    ----------
    plan : SeriesPlan
        From `dicom_headers.group_series` / `choose_series`.
    uid_salt : bytes
        Secret for the salted hash of the Series Instance UID.
    allow_burned_in : bool
        Import images whose Burned In Annotation is YES.
    spacing_tolerance_mm : float
        See `plan_geometry`.

    Returns
    -------
    Volume
        ``data`` (columns, rows, slices), rescaled (integer dtype kept where it fits);
        ``affine`` voxel to world mm RAS+; ``checksum`` a salted SHA-256 over the sorted
        SOP Instance UIDs (the DICOM identity of each slice, so renamed or re-ordered files
        give the same value); ``provenance`` only whitelisted facts.
    """
    check_pixels_supported(plan, allow_burned_in)
    geometry = plan_geometry(plan, spacing_tolerance_mm)
    stack = _read_stack(plan, geometry)
    frames = [plan.files[fi].frames[fr] for fi, fr in geometry.order]
    slopes = [f.slope for f in frames]
    intercepts = [f.intercept for f in frames]
    if any(s != 1.0 for s in slopes) or any(b != 0.0 for b in intercepts):
        low, high = (float(stack.min()), float(stack.max())) if stack.size else (0.0, 0.0)
        dtype = rescaled_dtype(stack.dtype, low, high, slopes, intercepts)
        if len(set(zip(slopes, intercepts, strict=True))) == 1:
            stack = apply_rescale(stack, slopes[0], intercepts[0], dtype)
        else:
            out = stack if dtype == stack.dtype else np.empty(stack.shape, dtype=dtype)
            for k in range(stack.shape[0]):
                result = apply_rescale(stack[k], slopes[k], intercepts[k], dtype)
                if out is not stack or dtype.kind == "f":
                    out[k] = result
            stack = out
    return Volume(
        data=stack.transpose(2, 1, 0),
        affine=geometry.affine_ras,
        modality=plan.modality,
        checksum=series_checksum(plan, uid_salt),
        provenance=_provenance(plan, geometry, uid_salt),
    )


def series_checksum(plan: SeriesPlan, salt: bytes) -> str:
    """Salted SHA-256 over the sorted SOP Instance UIDs: one value per set of instances.

    SOP Instance UIDs identify each slice in DICOM, so the value ignores file names and
    order, and it costs no pixel reading (hashing the voxels of a 300-slice series would
    take about a second on this machine).
    """
    digest = hashlib.sha256(salt)
    for uid in sorted(h.instance_uid for h in plan.files):
        digest.update(uid.encode("ascii", "replace") + b"\0")
    return digest.hexdigest()


def _provenance(plan: SeriesPlan, geometry: SliceGeometry, salt: bytes) -> dict:
    return {
        "format": "DICOM",
        "enhanced": any(len(h.frames) > 1 for h in plan.files),
        "n_files": len(plan.files),
        "n_slices": geometry.shape[2],
        "transfer_syntaxes": sorted({UID(h.transfer_syntax).name for h in plan.files}),
        "slice_spacing_source": geometry.spacing_source,
        "burned_in_annotation": sorted({h.burned_in for h in plan.files}),
        "series_uid_hash": series_uid_hash(plan.series_uid, salt),
        "acquisition": dict(next((h.acquisition for h in plan.files if h.acquisition), {})),
        "affine_lps": geometry.affine_lps.tolist(),
    }
