"""Exports: the reference set's coordinates, the archive's manifest, and re-analysis."""

from __future__ import annotations

import hashlib
import io
import json
import subprocess
import sys
import uuid
import zipfile
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from django.core.management import call_command
from django.core.management.base import CommandError
from django.test import Client
from nibabel import orientations

from studies.constants import AdjudicationDecision
from studies.services import adjudication, analysis_runs, exports
from tests.unit.results_study import CLICK_A, CLICK_B, analysed


@pytest.fixture
def results(cast, django_user_model, settings, tmp_path):
    return analysed(cast, django_user_model, Path(settings.CAIRN_DATA_DIR), tmp_path)


ROOT = Path(__file__).resolve().parents[2]


def original_voxel_of(canonical_ijk: np.ndarray, original_path: Path) -> np.ndarray:
    """Where a canonical voxel lies in the original file, computed with nibabel alone.

    nibabel.orientations: io_orientation gives the axis permutation and flips that bring
    the file to RAS+; inv_ornt_aff maps the reoriented index back to the file's index.
    """
    image = nib.load(original_path)
    ornt = orientations.io_orientation(image.affine)
    back = orientations.inv_ornt_aff(ornt, image.shape)
    return (back @ np.append(canonical_ijk, 1.0))[:3]


def read_reference_csv(text: str) -> pd.DataFrame:
    return pd.read_csv(io.StringIO(text), keep_default_na=True)


def test_exported_points_map_back_onto_the_clicked_voxel_of_the_original_file(results) -> None:
    """Round trip through the exported CSV: nibabel's own affine of the ORIGINAL file maps the
    exported original voxel index onto the exported RAS point (1e-6 mm), that index is the
    voxel the reader clicked (canonical click sent through nibabel.orientations), and the LPS
    columns are RAS with x and y negated (DICOM PS3.3 C.7.6.2.1.1 patient frame vs NIfTI)."""
    csv = read_reference_csv(exports.export_files(results.study)["reference_set.csv"].decode())
    rows = csv[csv["landmark"] == "A"]
    assert len(rows) == 3
    for row in rows.itertuples(index=False):
        path = results.files[row.case]
        affine = nib.load(path).affine
        ijk = np.array([row.i_vox_original, row.j_vox_original, row.k_vox_original])
        ras = np.array([row.x_mm, row.y_mm, row.z_mm])
        np.testing.assert_allclose((affine @ np.append(ijk, 1.0))[:3], ras, atol=1e-6)
        expected = original_voxel_of(CLICK_A, path)
        np.testing.assert_allclose(ijk, expected, atol=1e-6)
        assert not np.allclose(expected, CLICK_A)  # the file really is reoriented
        np.testing.assert_allclose(
            [row.x_lps_mm, row.y_lps_mm, row.z_lps_mm], ras * [-1.0, -1.0, 1.0], atol=0
        )
        assert row.method == "mean" and row.case_label.startswith("scan-")


def test_an_adjudicated_readers_point_exports_as_adjudicated_on_the_clicked_voxel(
    results, cast
) -> None:
    """Reader a's click on landmark B, taken by the adjudicator, maps back onto the voxel
    reader a clicked (nibabel affine of the original file, 1e-6 mm)."""
    item = adjudication.adjudication_queue(results.study)[0]
    case = results.study.cases.get(pseudonym=item.case)
    read = case.reads.get(reader=cast["reader_a"])
    adjudication.record_decision(
        case,
        "B",
        cast["adjudicator"],
        adjudication.DecisionInput(
            AdjudicationDecision.TAKE_READER,
            "clearer edge",
            uuid.uuid4(),
            source_read=str(read.code),
        ),
    )
    table = exports.reference_set(results.study)
    row = table[(table["case"] == case.pseudonym) & (table["landmark"] == "B")].iloc[0]
    assert row["method"] == "adjudicated" and row["decision"] == "take_reader"
    path = results.files[case.pseudonym]
    ijk = row[["i_vox_original", "j_vox_original", "k_vox_original"]].to_numpy(float)
    np.testing.assert_allclose(ijk, original_voxel_of(CLICK_B, path), atol=1e-6)
    np.testing.assert_allclose(
        (nib.load(path).affine @ np.append(ijk, 1.0))[:3],
        row[["x_mm", "y_mm", "z_mm"]].to_numpy(float),
        atol=1e-6,
    )


def test_the_exported_csv_files_reproduce_the_stored_analysis(results, tmp_path) -> None:
    """Importing the export back into the analysis core reproduces the same figures.

    `python -m studies.analysis placements.csv --predictions reference_set.csv` (a separate
    process, no database) gives the stored run's agreement, consensus and repeatability
    tables (1e-9), and, since the reference set's points are those consensus points, every
    radial error of the reference set scored as a detector is 0 and its successful detection
    rate at 2 mm is 1 (MRE as the mean Euclidean distance: Wang et al. 2016, check-values
    section 7)."""
    out = tmp_path / "export"
    exports.write_export(results.study, out)
    rerun = tmp_path / "rerun"
    parameters = json.loads((out / "parameters.json").read_text())["analysis"]
    done = subprocess.run(
        [
            sys.executable,
            "-m",
            "studies.analysis",
            str(out / "placements.csv"),
            "--out",
            str(rerun),
            "--consensus",
            parameters["consensus"],
            "--tolerance",
            str(parameters["tolerance_mm"]),
            "--outlier-multiple",
            str(parameters["outlier_multiple"]),
            "--predictions",
            str(out / "reference_set.csv"),
        ],
        cwd=ROOT,
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    for name in ("agreement_by_landmark", "agreement_by_case", "consensus", "repeatability"):
        stored = pd.read_csv(out / "analysis" / f"{name}.csv")
        again = pd.read_csv(rerun / f"{name}.csv")
        assert list(stored.columns) == list(again.columns)
        numeric = stored.select_dtypes("number").columns
        np.testing.assert_allclose(
            again[numeric].to_numpy(float),
            stored[numeric].to_numpy(float),
            atol=1e-9,
            equal_nan=True,
        )
        assert (
            (again.drop(columns=numeric).fillna("") == stored.drop(columns=numeric).fillna(""))
            .all()
            .all()
        )
    detector = pd.read_csv(rerun / "detector.csv")
    own = detector[detector["rater"] == "detector"]
    assert len(own) == 2
    np.testing.assert_allclose(own["mre_mm"], 0.0, atol=1e-9)
    np.testing.assert_allclose(own["sdr_2mm"], 1.0)


def test_the_manifest_lists_every_file_with_its_sha256(results, tmp_path) -> None:
    """SHA-256 per FIPS 180-4, recomputed here with hashlib."""
    names = exports.write_export(results.study, tmp_path)
    manifest = json.loads((tmp_path / "manifest.json").read_text())
    listed = {f["name"]: f["sha256"] for f in manifest["files"]}
    assert set(listed) == set(names) - {"manifest.json"}
    for name, digest in listed.items():
        assert hashlib.sha256((tmp_path / name).read_bytes()).hexdigest() == digest
    assert manifest["code_version"] == analysis_runs.code_version()
    assert {
        "reference_set.csv",
        "reference_set.json",
        "events.csv",
        "placements.csv",
        "analysis/consensus.csv",
        "parameters.json",
    } <= set(listed)
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".export-")]


def test_the_archive_holds_the_same_files_as_the_folder_export(results) -> None:
    archive = zipfile.ZipFile(io.BytesIO(exports.archive_bytes(results.study)))
    slug = results.study.slug
    manifest = json.loads(archive.read(f"{slug}/manifest.json"))
    for entry in manifest["files"]:
        data = archive.read(f"{slug}/{entry['name']}")
        assert hashlib.sha256(data).hexdigest() == entry["sha256"]
    parameters = json.loads(archive.read(f"{slug}/parameters.json"))
    assert parameters["placements_match_analysis"] is True
    assert parameters["analysis"]["consensus"] == "mean"


def test_the_events_export_has_every_placement_event(results) -> None:
    events = exports.events_table(results.study)
    assert len(events) == 12  # 3 cases x 2 readers x 2 landmarks, one placement each
    assert set(events["kind"]) == {"placed"} and set(events["reader"]) == {"reader_a", "reader_b"}


def test_the_command_writes_the_export_and_the_archive(results, tmp_path) -> None:
    out = io.StringIO()
    call_command(
        "export_reference", results.study.slug, "--out", str(tmp_path), "--archive", stdout=out
    )
    assert (tmp_path / "reference_set.csv").exists() and (tmp_path / "manifest.json").exists()
    assert (tmp_path / f"{results.study.slug}-archive.zip").exists()
    assert "wrote" in out.getvalue()


def test_the_command_refuses_a_study_without_a_completed_analysis(
    cast, django_user_model, settings, tmp_path
) -> None:
    unanalysed = analysed(
        cast, django_user_model, Path(settings.CAIRN_DATA_DIR), tmp_path, analyse=False
    )
    with pytest.raises(CommandError, match="no completed analysis"):
        call_command("export_reference", unanalysed.study.slug, "--out", str(tmp_path / "x"))
    assert not (tmp_path / "x").exists() or not any((tmp_path / "x").iterdir())


def test_exports_are_for_coordinators_only(results, cast) -> None:
    url = f"/api/v1/studies/{results.study.slug}/export/reference_set.csv"
    for name, status in (("outsider", 404), ("reader_a", 403), ("adjudicator", 403), ("pi", 200)):
        client = Client()
        client.force_login(cast[name])
        assert client.get(url).status_code == status, name
    body = client.get(url).content.decode()
    assert read_reference_csv(body).shape[0] == 6
    archive = client.get(f"/api/v1/studies/{results.study.slug}/export/archive.zip")
    assert archive.status_code == 200 and archive["Content-Type"] == "application/zip"
    base = f"/api/v1/studies/{results.study.slug}/export"
    rows = client.get(f"{base}/reference_set.json").json()["rows"]
    assert len(rows) == 6 and set(rows[0]) == set(exports.REFERENCE_COLUMNS)
    events = pd.read_csv(io.StringIO(client.get(f"{base}/events.csv").content.decode()))
    assert list(events.columns) == exports.EVENT_COLUMNS and len(events) == 12
    table = client.get(f"{base}/analysis/consensus.csv")
    assert table.status_code == 200 and client.get(f"{base}/analysis/nope.csv").status_code == 404
