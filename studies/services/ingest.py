"""Importing scans into a study: files, folders or zips in, one case per volume out.

Flow per volume: duplicate check (content checksum, and the salted series-UID hash for
DICOM) -> read (studies.imaging) -> write the case files atomically -> create the Case row
in a transaction. If anything after the files were written fails or is interrupted, the
files are removed again, so a refused or interrupted import leaves nothing behind.
Nothing identifying is stored: no file names, no DICOM header values outside the
whitelist of studies.imaging.deid; cases are labelled by format, modality and checksum.
"""

from __future__ import annotations

import tempfile
import uuid
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

from django.conf import settings
from django.db import IntegrityError, transaction
from django.db.models import Q

from ..imaging.archive import ArchiveLimits
from ..imaging.deid import series_uid_hash
from ..imaging.dicom import check_pixels_supported, plan_geometry, read_series, series_checksum
from ..imaging.dicom_headers import SeriesPlan, choose_series
from ..imaging.errors import ImagingError
from ..imaging.nifti import file_sha256, read_nifti
from ..imaging.sources import NiftiCandidate, discover
from ..imaging.storage import remove_case_files, write_case_files
from ..imaging.volume import Volume
from ..models import Case, Study
from .cases import create_case
from .errors import ServiceError

__all__ = [
    "DUPLICATE",
    "IMPORTED",
    "REFUSED",
    "WOULD_IMPORT",
    "ImportOptions",
    "Outcome",
    "import_paths",
]

IMPORTED, DUPLICATE, REFUSED, WOULD_IMPORT = "imported", "duplicate", "refused", "would import"
Progress = Callable[[int, int], None]


@dataclass(frozen=True)
class ImportOptions:
    """How to import: the command-line flags and the upload page's choices."""

    dry_run: bool = False
    volume_index: int | None = None
    series: str | None = None
    allow_burned_in: bool = False
    one_series_only: bool = False
    max_file_bytes: int | None = None


@dataclass
class Outcome:
    """What happened to one input; `source` is the coordinator's own name for it."""

    source: str
    status: str
    detail: str
    case: Case | None = field(default=None, repr=False)


def archive_limits() -> ArchiveLimits:
    """Zip limits from settings (CAIRN_ZIP_MAX_BYTES, CAIRN_ZIP_MAX_FILES, CAIRN_ZIP_MAX_RATIO)."""
    return ArchiveLimits(
        max_total_bytes=settings.CAIRN_ZIP_MAX_BYTES,
        max_files=settings.CAIRN_ZIP_MAX_FILES,
        max_ratio=float(settings.CAIRN_ZIP_MAX_RATIO),
    )


def _salt() -> bytes:
    return str(settings.CAIRN_ID_SALT).encode()


def _existing(study: Study, checksum: str, uid_hash: str | None = None) -> Case | None:
    query = Q(checksum=checksum)
    if uid_hash:
        query |= Q(provenance__series_uid_hash=uid_hash)
    return study.cases.filter(query).first()


def _remove(root: Path, rel_dir: str) -> None:
    remove_case_files(root, rel_dir)
    try:
        (root / rel_dir).parent.rmdir()  # the study folder, if this was its only case
    except OSError:
        pass


def _store(study: Study, volume: Volume, source: str, kind: str) -> Outcome:
    """Write files, then the row; remove the files if the row cannot be written."""
    root = Path(settings.CAIRN_DATA_DIR)
    rel_dir = f"{study.slug}/{uuid.uuid4().hex}"
    stored = write_case_files(root, rel_dir, volume)
    try:
        with transaction.atomic():
            case = create_case(
                study,
                stored,
                checksum=volume.checksum,
                modality=volume.modality,
                label=f"{kind} {volume.modality} {volume.checksum[:10]}",
                provenance=volume.provenance,
            )
    except (ServiceError, IntegrityError):
        _remove(root, rel_dir)
        return Outcome(source, DUPLICATE, "already in the study (same content)")
    except BaseException:
        _remove(root, rel_dir)
        raise
    shape = "x".join(str(n) for n in stored.shape)
    return Outcome(source, IMPORTED, f"case {case.pseudonym}, {shape} voxels", case)


def _import_nifti(study: Study, item: NiftiCandidate, options: ImportOptions) -> Outcome:
    checksum = file_sha256(item.path)
    existing = _existing(study, checksum)
    if existing is not None:
        return Outcome(item.source, DUPLICATE, f"already in the study as case {existing.pseudonym}")
    volume = read_nifti(item.path, options.volume_index)
    if options.dry_run:
        shape = "x".join(str(n) for n in volume.data.shape)
        return Outcome(item.source, WOULD_IMPORT, f"NIfTI, {shape} voxels")
    return _store(study, volume, item.source, "NIfTI")


def _import_series(study: Study, plan: SeriesPlan, label: str, options: ImportOptions) -> Outcome:
    salt = _salt()
    existing = _existing(study, series_checksum(plan, salt), series_uid_hash(plan.series_uid, salt))
    if existing is not None:
        return Outcome(label, DUPLICATE, f"already in the study as case {existing.pseudonym}")
    if options.dry_run:
        check_pixels_supported(plan, options.allow_burned_in)
        geometry = plan_geometry(plan)
        shape = "x".join(str(n) for n in geometry.shape)
        return Outcome(label, WOULD_IMPORT, f"DICOM {plan.modality}, {shape} voxels")
    volume = read_series(plan, uid_salt=salt, allow_burned_in=options.allow_burned_in)
    return _store(study, volume, label, "DICOM")


def _series_label(plan: SeriesPlan) -> str:
    folders = sorted({str(h.path.parent) for h in plan.files})
    where = folders[0] if len(folders) == 1 else f"{folders[0]} and {len(folders) - 1} more"
    return f"DICOM series of {plan.n_frames} slices ({plan.modality}) in {where}"


def _work_items(found, options: ImportOptions) -> tuple[list, list[Outcome]]:
    items: list = [("nifti", c.source, c) for c in found.nifti]
    refused: list[Outcome] = []
    plans = found.series
    if plans and (options.series is not None or (options.one_series_only and len(plans) > 1)):
        try:
            plans = [choose_series(plans, options.series)]
        except ImagingError as exc:
            refused.append(Outcome(f"{len(plans)} DICOM series", REFUSED, str(exc)))
            plans = []
    elif options.series is not None:
        refused.append(Outcome("--series", REFUSED, "no DICOM series found in the inputs"))
    items += [("dicom", _series_label(p), p) for p in plans]
    return items, refused


def import_paths(
    study: Study,
    paths: Sequence[Path | str],
    options: ImportOptions | None = None,
    progress: Progress | None = None,
    work_root: Path | None = None,
) -> list[Outcome]:
    """Import every volume found in `paths` into `study`, one case each.

    Parameters
    ----------
    study : Study
    paths : sequence of Path or str
        Files, folders (recursive) and zip archives.
    options : ImportOptions, optional
    progress : callable(done, total), optional
        Called before the first volume and after each one.
    work_root : Path, optional
        Where the temporary folder for extracted zips goes (default: the system's).

    Returns
    -------
    list of Outcome
        One per refused input and one per volume: imported (with its case), duplicate,
        refused (with the reason) or, in a dry run, would import.

    Notes
    -----
    Each case is written in its own transaction, so one bad file does not undo the others.
    Call it outside any open transaction, so a committed case is not rolled back later
    while its files stay.
    """
    options = options or ImportOptions()
    with tempfile.TemporaryDirectory(prefix="cairn-import-", dir=work_root) as work:
        found = discover(paths, work, archive_limits(), options.max_file_bytes)
        outcomes = [Outcome(r.source, REFUSED, r.reason) for r in found.refusals]
        items, refused = _work_items(found, options)
        outcomes += refused
        if progress is not None:
            progress(0, len(items))
        for done, (kind, label, item) in enumerate(items, start=1):
            try:
                if kind == "nifti":
                    outcomes.append(_import_nifti(study, item, options))
                else:
                    outcomes.append(_import_series(study, item, label, options))
            except ImagingError as exc:
                outcomes.append(Outcome(label, REFUSED, str(exc)))
            if progress is not None:
                progress(done, len(items))
    return outcomes
