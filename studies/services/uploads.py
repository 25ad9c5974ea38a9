"""Coordinator uploads: save the files, import them in a background task, report progress.

An upload is a folder under CAIRN_UPLOAD_DIR (default ``var/uploads``, shared storage in
production, never the data dir) named by a random job id, holding the uploaded files
under neutral names (``upload-1.zip``, ...) and ``status.json``, which the task rewrites
atomically as it goes and the progress page reads. The uploaded files are deleted as
soon as the import ends, whatever its outcome. Sources in the status are the neutral
names, never the names the files had on the coordinator's machine.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import uuid
from collections.abc import Iterable
from dataclasses import asdict, dataclass
from pathlib import Path

from django.conf import settings

from ..models import Study
from .errors import ServiceError
from .ingest import ImportOptions, import_paths

__all__ = ["UploadChoices", "load_status", "run_upload", "start_upload"]

ALLOWED_SUFFIXES = (".nii.gz", ".nii", ".zip")
STATUS_NAME = "status.json"
_JOB_ID = re.compile(r"^[0-9a-f]{32}$")


@dataclass(frozen=True)
class UploadChoices:
    """What the coordinator chose on the upload page."""

    series: str | None = None
    volume_index: int | None = None
    allow_burned_in: bool = False


def upload_root() -> Path:
    """The folder that holds upload jobs (CAIRN_UPLOAD_DIR, default var/uploads)."""
    return Path(settings.CAIRN_UPLOAD_DIR)


def _job_dir(job_id: str) -> Path:
    if not _JOB_ID.match(job_id):
        raise ServiceError(f"not an upload id: {job_id!r}")
    return upload_root() / job_id


def _write_status(job_dir: Path, status: dict) -> None:
    """Replace status.json atomically (temporary file, fsync, rename)."""
    temporary = job_dir / f".{STATUS_NAME}.{uuid.uuid4().hex}"
    with open(temporary, "w", encoding="utf-8") as handle:
        json.dump(status, handle)
        handle.flush()
        os.fsync(handle.fileno())
    os.replace(temporary, job_dir / STATUS_NAME)


def load_status(study: Study, job_id: str) -> dict:
    """The status of an upload of `study` (ServiceError if there is none)."""
    path = _job_dir(job_id) / STATUS_NAME
    try:
        status = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        raise ServiceError(f"no upload {job_id} for this study") from None
    if status.get("study") != study.slug:
        raise ServiceError(f"no upload {job_id} for this study")
    return status


def _suffix(name: str) -> str | None:
    lower = name.lower()
    return next((s for s in ALLOWED_SUFFIXES if lower.endswith(s)), None)


def start_upload(study: Study, files: Iterable, choices: UploadChoices) -> str:
    """Save uploaded files for a background import; return the job id.

    Parameters
    ----------
    study : Study
    files : iterable of Django UploadedFile
        .nii or .nii.gz files, or zips of DICOM files.
    choices : UploadChoices

    Raises
    ------
    ServiceError
        No files, a file type other than .nii, .nii.gz or .zip, or more bytes than
        CAIRN_UPLOAD_MAX_BYTES in all; nothing is kept.
    """
    files = list(files)
    if not files:
        raise ServiceError("choose one or more .nii, .nii.gz or .zip files to upload")
    limit = int(settings.CAIRN_UPLOAD_MAX_BYTES)
    total = sum(int(f.size) for f in files)
    if total > limit:
        raise ServiceError(f"the upload holds {total} bytes, over the limit of {limit} bytes")
    suffixes = []
    for upload in files:
        suffix = _suffix(upload.name)
        if suffix is None:
            raise ServiceError(
                f"{upload.name!r} is not a .nii, .nii.gz or .zip file; nothing was uploaded"
            )
        suffixes.append(suffix)
    job_id = uuid.uuid4().hex
    job_dir = _job_dir(job_id)
    (job_dir / "in").mkdir(parents=True)
    try:
        for n, (upload, suffix) in enumerate(zip(files, suffixes, strict=True), start=1):
            with open(job_dir / "in" / f"upload-{n}{suffix}", "wb") as handle:
                for chunk in upload.chunks():
                    handle.write(chunk)
        _write_status(
            job_dir,
            {
                "study": study.slug,
                "state": "queued",
                "done": 0,
                "total": 0,
                "choices": asdict(choices),
                "outcomes": [],
            },
        )
    except BaseException:
        shutil.rmtree(job_dir, ignore_errors=True)
        raise
    return job_id


def _neutral(text: str, job_dir: Path) -> str:
    """Drop the server's folder names from a message, leaving upload-N and member names."""
    text = text.replace(str(job_dir / "in") + os.sep, "")
    return re.sub(r"\S*cairn-import-[^/\s]+/zip-\d+/?", "", text)


def run_upload(job_id: str) -> dict:
    """Import a saved upload (the body of the Celery task); return the final status.

    Progress (volumes done of total) is written to status.json as the import goes. The
    uploaded files are removed at the end, also when the import fails.
    """
    job_dir = _job_dir(job_id)
    status = json.loads((job_dir / STATUS_NAME).read_text(encoding="utf-8"))
    if status.get("state") in ("finished", "failed"):
        return status  # a redelivered message after the job ended: nothing to do
    # "running" here means an earlier worker died mid-import: run again; the cases it
    # finished are skipped as duplicates.
    study = Study.objects.filter(slug=status["study"]).first()
    choices = UploadChoices(**status["choices"])
    options = ImportOptions(
        series=choices.series,
        volume_index=choices.volume_index,
        allow_burned_in=choices.allow_burned_in,
        one_series_only=True,
    )

    counts = {"done": 0, "total": 0}

    def progress(done: int, total: int) -> None:
        counts.update(done=done, total=total)
        _write_status(job_dir, {**status, "state": "running", **counts})

    status = {**status, "state": "running"}
    _write_status(job_dir, status)
    try:
        if study is None:
            raise ServiceError("the study no longer exists")
        inputs = sorted((job_dir / "in").iterdir())
        outcomes = import_paths(study, inputs, options, progress=progress, work_root=job_dir)
        status = {
            **status,
            "state": "finished",
            **counts,
            "outcomes": [
                {
                    "source": _neutral(o.source, job_dir),
                    "status": o.status,
                    "detail": _neutral(o.detail, job_dir),
                }
                for o in outcomes
            ],
        }
    except ServiceError as exc:
        status = {**status, "state": "failed", "error": str(exc)}
    except Exception:
        status = {**status, "state": "failed", "error": "the import stopped with an error"}
        raise
    finally:
        shutil.rmtree(job_dir / "in", ignore_errors=True)
        _write_status(job_dir, status)
    return status
