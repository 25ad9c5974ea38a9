"""Turning what a coordinator hands in (files, folders, zips) into import candidates.

Folders are walked recursively and zips are extracted (with the limits of
`archive.ArchiveLimits`) into a caller-owned working folder. NIfTI files are recognised by
name (.nii, .nii.gz); every other file is tried as DICOM, reading its header only. DICOM
files are grouped into series by Series Instance UID across all inputs. Whatever cannot be
used becomes a `Refusal` with its reason; nothing is read twice.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

from .archive import ArchiveLimits, extract_zip, is_zip
from .dicom_headers import FileHeader, SeriesPlan, group_series, read_header
from .errors import ImagingError
from .nifti import is_nifti_name

__all__ = ["Discovery", "NiftiCandidate", "Refusal", "discover"]

_SKIPPED_NAMES = {"DICOMDIR", "THUMBS.DB", "DESKTOP.INI"}


@dataclass(frozen=True)
class Refusal:
    """An input that will not be imported, and why (shown to the coordinator only)."""

    source: str
    reason: str


@dataclass(frozen=True)
class NiftiCandidate:
    """A NIfTI file to read; `source` is how the coordinator named it."""

    path: Path
    source: str


@dataclass
class Discovery:
    """Everything found in the inputs.

    Attributes
    ----------
    nifti : list of NiftiCandidate
    series : list of SeriesPlan
        DICOM series, grouped over all inputs.
    refusals : list of Refusal
    skipped : list of str
        Files passed over on purpose (hidden files, DICOMDIR indexes).
    """

    nifti: list[NiftiCandidate] = field(default_factory=list)
    series: list[SeriesPlan] = field(default_factory=list)
    refusals: list[Refusal] = field(default_factory=list)
    skipped: list[str] = field(default_factory=list)


class _Walker:
    def __init__(self, workdir: Path, limits: ArchiveLimits, max_file_bytes: int | None) -> None:
        self.workdir = Path(workdir)
        self.limits = limits
        self.max_file_bytes = max_file_bytes
        self.found = Discovery()
        self.headers: list[FileHeader] = []
        self.seen_series: set[str] = set()
        self.n_zips = 0

    def refuse(self, source: str, reason: str) -> None:
        self.found.refusals.append(Refusal(source, reason))

    def walk_input(self, path: Path) -> None:
        label = str(path)
        if path.is_dir():
            files = sorted(Path(root) / name for root, _, names in os.walk(path) for name in names)
            if not files:
                self.refuse(label, "the folder holds no files")
            for file in files:
                self.classify(file, str(file), inside_zip=False)
        elif path.is_file():
            self.classify(path, label, inside_zip=False)
        else:
            self.refuse(label, "no such file or folder")

    def classify(self, path: Path, label: str, inside_zip: bool) -> None:
        if path.name.startswith(".") or path.name.upper() in _SKIPPED_NAMES:
            self.found.skipped.append(label)
            return
        size = path.stat().st_size
        if size == 0:
            self.refuse(label, "empty file (0 bytes)")
        elif self.max_file_bytes is not None and size > self.max_file_bytes and not inside_zip:
            self.refuse(label, f"{size} bytes, over the size limit of {self.max_file_bytes}")
        elif is_zip(path):
            self.open_zip(path, label, inside_zip)
        elif is_nifti_name(path.name):
            self.found.nifti.append(NiftiCandidate(path, label))
        else:
            self.try_dicom(path, label)

    def open_zip(self, path: Path, label: str, inside_zip: bool) -> None:
        if inside_zip:
            self.refuse(label, "a zip inside a zip is not opened; extract it first")
            return
        self.n_zips += 1
        dest = self.workdir / f"zip-{self.n_zips:04d}"
        try:
            members = extract_zip(path, dest, self.limits)
        except ImagingError as exc:
            self.refuse(label, str(exc))
            return
        for member in sorted(members):
            self.classify(member, f"{label}:{member.relative_to(dest)}", inside_zip=True)

    def try_dicom(self, path: Path, label: str) -> None:
        try:
            self.headers.append(read_header(path, self.seen_series))
        except ImagingError as exc:
            reason = str(exc)
            if not _looks_like_dicom(path):
                reason = "not a NIfTI (.nii, .nii.gz), DICOM or zip file"
            self.refuse(label, reason)


def _looks_like_dicom(path: Path) -> bool:
    with open(path, "rb") as handle:
        head = handle.read(132)
    return head[128:132] == b"DICM"


def discover(
    inputs: Sequence[Path | str],
    workdir: Path | str,
    limits: ArchiveLimits | None = None,
    max_file_bytes: int | None = None,
) -> Discovery:
    """Find the NIfTI files and DICOM series in files, folders and zips.

    Parameters
    ----------
    inputs : sequence of Path or str
        Files, folders (walked recursively) and zip archives.
    workdir : Path or str
        Existing folder the caller owns (and removes) where zips are extracted.
    limits : ArchiveLimits, optional
        Zip limits (defaults: `ArchiveLimits()`).
    max_file_bytes : int, optional
        Size limit for each given file or archive (uploads).

    Returns
    -------
    Discovery
        No pixel data have been read; DICOM headers only.
    """
    walker = _Walker(Path(workdir), limits or ArchiveLimits(), max_file_bytes)
    if not inputs:
        walker.refuse("(nothing)", "no files or folders were given")
    for item in inputs:
        walker.walk_input(Path(item))
    walker.found.series = group_series(walker.headers)
    return walker.found
