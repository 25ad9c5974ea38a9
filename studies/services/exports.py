"""Exports: the reference set, every event, the analysis tables and the study archive.

The reference set has one row per case x landmark with the study's final point (the
latest adjudication, else the consensus) in world mm RAS+, the same point in LPS mm, and
the continuous voxel index in the originally imported file. The archive is a zip of every
export plus manifest.json (each file's SHA-256), the analysis parameters and the code
version. Files are written under a temporary name and renamed into place, so a crash
leaves the old export or the new one, never half of one.
"""

from __future__ import annotations

import hashlib
import io
import json
import math
import os
import shutil
import tempfile
import zipfile
from pathlib import Path

import numpy as np
import pandas as pd
from django.utils import timezone

from ..imaging.geometry import ras_to_lps, world_to_voxel
from ..models import AdjudicationEvent, AnalysisRun, PlacementEvent, Study
from . import analysis_runs
from .adjudication import COV_COLUMNS, latest_completed_run, reference_table
from .errors import ServiceError

REFERENCE_COLUMNS = [
    "case",
    "case_label",
    "landmark",
    "x_mm",
    "y_mm",
    "z_mm",
    "x_lps_mm",
    "y_lps_mm",
    "z_lps_mm",
    "i_vox_original",
    "j_vox_original",
    "k_vox_original",
    "method",
    "se_mm",
    *COV_COLUMNS,
    "n_readers",
    "n_absent",
    "flagged",
    "reasons",
    "note",
    "decision",
    "adjudicator",
    "adjudication_reason",
    "adjudicated_at",
]
EVENT_COLUMNS = [
    "case",
    "case_label",
    "read",
    "reader",
    "read_number",
    "landmark",
    "kind",
    "x_mm",
    "y_mm",
    "z_mm",
    "i_vox",
    "j_vox",
    "k_vox",
    "confidence",
    "client_time",
    "server_time",
    "client_event_id",
    "read_version",
]
ADJUDICATION_COLUMNS = [
    "case",
    "case_label",
    "landmark",
    "adjudicator",
    "decision",
    "source_read",
    "source_reader",
    "x_mm",
    "y_mm",
    "z_mm",
    "reason",
    "analysis_run",
    "created_at",
    "client_event_id",
]
MANIFEST_NAME = "manifest.json"


class NoAnalysisError(ServiceError):
    """The study has no completed analysis, so there is no reference set yet."""

    status_code = 409


def completed_run(study: Study) -> AnalysisRun:
    """The latest completed run, or NoAnalysisError with what to do about it."""
    run = latest_completed_run(study)
    if run is None:
        raise NoAnalysisError(
            f"study {study.slug!r} has no completed analysis yet; run "
            f"`python manage.py analyze {study.slug}` (or request one on the dashboard) first"
        )
    return run


def reference_set(study: Study, run: AnalysisRun | None = None) -> pd.DataFrame:
    """One row per case x landmark: the final point in RAS, LPS and original voxel index.

    Columns are :data:`REFERENCE_COLUMNS`; coordinates are empty where no reader placed the
    landmark. The voxel index is continuous (an integer is a voxel centre) and refers to the
    file as imported, before the reorientation to canonical order.
    """
    run = run or completed_run(study)
    table = reference_table(study, run)
    cases = {c.pseudonym: c for c in study.cases.all()}
    xyz = table[["x_mm", "y_mm", "z_mm"]].to_numpy(dtype=np.float64, na_value=np.nan)
    lps = ras_to_lps(xyz)
    ijk = np.full_like(xyz, np.nan)
    for case_id in table["case"].unique():
        rows = (table["case"] == case_id).to_numpy()
        ijk[rows] = world_to_voxel(np.array(cases[case_id].original_affine), xyz[rows])
    table["case_label"] = [cases[c].label for c in table["case"]]
    for axis, name in enumerate("xyz"):
        table[f"{name}_lps_mm"] = lps[:, axis]
    for axis, name in enumerate("ijk"):
        table[f"{name}_vox_original"] = ijk[:, axis]
    table["flagged"] = table["flagged"].astype(bool)
    return table[REFERENCE_COLUMNS]


def _plain(value: object) -> object:
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def reference_json(study: Study, run: AnalysisRun, table: pd.DataFrame) -> bytes:
    """The reference set as JSON: a header naming the frames, then one object per row."""
    rows = [{k: _plain(v) for k, v in row.items()} for row in table.to_dict(orient="records")]
    payload = {
        "study": study.slug,
        "analysis_run": str(run.code),
        "frames": {
            "x_mm, y_mm, z_mm": "world mm, RAS+ (NIfTI)",
            "x_lps_mm, y_lps_mm, z_lps_mm": "world mm, LPS+ (DICOM patient frame)",
            "i_vox_original, j_vox_original, k_vox_original": (
                "continuous voxel index in the imported file (integer = voxel centre)"
            ),
        },
        "rows": rows,
    }
    return json.dumps(payload, indent=1, allow_nan=False).encode()


def events_table(study: Study) -> pd.DataFrame:
    """Every placement event of the study, in order, with the coordinator-side case label."""
    rows = (
        PlacementEvent.objects.filter(read__study=study)
        .order_by("server_time", "pk")
        .values_list(
            "read__case__pseudonym",
            "read__case__label",
            "read__pseudonym",
            "read__reader__username",
            "read__read_number",
            "landmark__code",
            "kind",
            "x_mm",
            "y_mm",
            "z_mm",
            "i_vox",
            "j_vox",
            "k_vox",
            "confidence",
            "client_time",
            "server_time",
            "client_event_id",
            "read_version",
        )
    )
    table = pd.DataFrame.from_records(list(rows), columns=EVENT_COLUMNS)
    for column in ("client_time", "server_time"):
        table[column] = [t.isoformat() for t in table[column]]
    table["client_event_id"] = table["client_event_id"].astype(str)
    table["confidence"] = table["confidence"].astype("Int64")
    return table


def adjudication_events_table(study: Study) -> pd.DataFrame:
    """Every adjudication decision of the study, oldest first (revisions included)."""
    events = (
        AdjudicationEvent.objects.filter(study=study)
        .select_related("case", "landmark", "adjudicator", "source_read__reader", "analysis_run")
        .order_by("created_at", "pk")
    )
    rows = [
        [
            e.case.pseudonym,
            e.case.label,
            e.landmark.code,
            e.adjudicator.username,
            e.decision,
            e.source_read.pseudonym if e.source_read else "",
            e.source_read.reader.username if e.source_read else "",
            e.x_mm,
            e.y_mm,
            e.z_mm,
            e.reason,
            str(e.analysis_run.code),
            e.created_at.isoformat(),
            str(e.client_event_id),
        ]
        for e in events
    ]
    return pd.DataFrame(rows, columns=ADJUDICATION_COLUMNS)


def _csv(table: pd.DataFrame) -> bytes:
    return table.to_csv(index=False, lineterminator="\n").encode()


def _json(value: object) -> bytes:
    return json.dumps(value, indent=1, allow_nan=False, default=str).encode()


def export_files(study: Study) -> dict[str, bytes]:
    """Every export file of the study by its path in the archive (manifest not included).

    reference_set.csv/json, events.csv (placement events), adjudication_events.csv,
    placements.csv (the analysis core's input: `python -m studies.analysis placements.csv`
    reproduces analysis/*.csv), analysis/<table>.csv and analysis/summary.json of the run,
    detector/<table>.csv of the latest scored detector, and parameters.json.
    """
    from .predictions import latest_detector_run

    run = completed_run(study)
    reference = reference_set(study, run)
    files = {
        "reference_set.csv": _csv(reference),
        "reference_set.json": reference_json(study, run, reference),
        "events.csv": _csv(events_table(study)),
        "adjudication_events.csv": _csv(adjudication_events_table(study)),
        "placements.csv": _csv(analysis_runs.placements_table(study)),
    }
    for name, stored in run.tables.items():
        files[f"analysis/{name}.csv"] = _csv(analysis_runs.frame_of(stored))
    files["analysis/summary.json"] = _json(run.summary)
    detector = latest_detector_run(study)
    if detector is not None:
        for name, stored in detector.tables.items():
            files[f"detector/{name}.csv"] = _csv(analysis_runs.frame_of(stored))
    files["parameters.json"] = _json(_parameters(study, run, detector))
    return files


def _parameters(study: Study, run: AnalysisRun, detector) -> dict:
    table = analysis_runs.placements_table(study)
    current = analysis_runs.fingerprint(table, run.parameters, run.code_version)
    return {
        "analysis": run.summary.get("parameters", run.parameters),
        "analysis_run": str(run.code),
        "analysis_finished_at": run.finished_at.isoformat() if run.finished_at else None,
        "analysis_code_version": run.code_version,
        "placements_match_analysis": current == run.input_digest,
        "design": {
            "readers_per_case": study.readers_per_case,
            "repeat_fraction": study.repeat_fraction,
            "washout_days": study.washout_days,
            "seed": study.seed,
            "tolerance_mm": study.tolerance_mm,
            "consensus_method": study.consensus_method,
            "adaptive_reads": study.adaptive_reads,
            "protocol_version": study.protocol_version,
        },
        "detector": None
        if detector is None
        else {
            "name": detector.name,
            "code": str(detector.code),
            "uploaded_at": detector.uploaded_at.isoformat(),
        },
    }


def manifest(study: Study, files: dict[str, bytes]) -> bytes:
    """manifest.json: the study, the time, the code version and each file's SHA-256."""
    return _json(
        {
            "study": study.slug,
            "created_at": timezone.now().isoformat(),
            "code_version": analysis_runs.code_version(),
            "files": [
                {"name": name, "bytes": len(data), "sha256": hashlib.sha256(data).hexdigest()}
                for name, data in files.items()
            ],
        }
    )


def write_export(study: Study, out_dir: str | Path) -> list[str]:
    """Write every export file and manifest.json under `out_dir`; return the file names.

    The files are built in a staging folder inside `out_dir` and renamed into place only
    when all are written; on any error nothing new is left behind.
    """
    files = export_files(study)
    files[MANIFEST_NAME] = manifest(study, files)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    staging = Path(tempfile.mkdtemp(prefix=".export-", dir=out))
    try:
        for name, data in files.items():
            path = staging / name
            path.parent.mkdir(parents=True, exist_ok=True)
            path.write_bytes(data)
        for name in files:
            (out / name).parent.mkdir(parents=True, exist_ok=True)
            os.replace(staging / name, out / name)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return list(files)


def archive_bytes(study: Study) -> bytes:
    """The study archive: a zip of every export file plus manifest.json."""
    files = export_files(study)
    files[MANIFEST_NAME] = manifest(study, files)
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", compression=zipfile.ZIP_DEFLATED) as archive:
        for name, data in files.items():
            archive.writestr(f"{study.slug}/{name}", data)
    return buffer.getvalue()


def write_archive(study: Study, path: str | Path) -> Path:
    """Write the archive zip to `path` atomically (temporary file, then rename)."""
    target = Path(path)
    data = archive_bytes(study)
    target.parent.mkdir(parents=True, exist_ok=True)
    handle, temporary = tempfile.mkstemp(prefix=".archive-", dir=target.parent)
    try:
        with os.fdopen(handle, "wb") as stream:
            stream.write(data)
            stream.flush()
            os.fsync(stream.fileno())
        os.replace(temporary, target)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise
    return target
