"""Refusals raised while reading scans: each message says what was found.

Every class derives from `ImagingError`, itself a `ValueError`, so callers can catch one
type and show its message to the coordinator. Messages never quote patient-identifying
header values (names, dates, institutions); they quote geometry, sizes, codes and paths
the coordinator supplied.
"""

from __future__ import annotations

__all__ = [
    "ArchiveError",
    "BurnedInAnnotationError",
    "EmptySourceError",
    "GeometryError",
    "ImagingError",
    "SeriesChoiceError",
    "UnreadableFileError",
    "UnsupportedImageError",
]


class ImagingError(ValueError):
    """A scan, file or archive that cairn refuses to import."""


class UnreadableFileError(ImagingError):
    """Truncated, corrupt or non-image content."""


class UnsupportedImageError(ImagingError):
    """A readable image cairn cannot store as one 3D volume (4D, colour, transfer syntax)."""


class GeometryError(ImagingError):
    """Missing or inconsistent geometry: no usable affine, bad spacing, gaps, tilt, shear."""


class SeriesChoiceError(ImagingError):
    """Several DICOM series were found and none was chosen, or the chosen one is absent."""


class BurnedInAnnotationError(ImagingError):
    """Pixel data may carry burned-in identifying text and the import did not allow it."""


class ArchiveError(ImagingError):
    """A zip that is unsafe (absolute or '..' paths, links) or over a configured limit."""


class EmptySourceError(ImagingError):
    """A folder or archive with no files to import."""
