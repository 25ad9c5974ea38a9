"""The coordinator upload page, its background import task and the progress view."""

from __future__ import annotations

import io
import zipfile
from pathlib import Path

import numpy as np
import pytest
from django.core.files.uploadedfile import SimpleUploadedFile

from studies.constants import Role
from studies.imaging.dicom_writer import write_series
from studies.models import Case
from studies.services import studies, uploads
from studies.services.errors import ServiceError
from studies.tasks import import_upload_task
from tests.imaging.phantoms import nibabel_file, oblique_affine, phantom


@pytest.fixture
def study(cast, settings, tmp_path):
    settings.CAIRN_DATA_DIR = tmp_path / "data"
    settings.CAIRN_UPLOAD_DIR = tmp_path / "uploads"
    settings.CAIRN_ID_SALT = "test-salt"
    study = studies.create_study(name="Upload study", slug="up", coordinator=cast["pi"])
    studies.add_member(study, cast["reader_a"], Role.READER)
    return study


@pytest.fixture
def run_now(monkeypatch):
    """Run the queued task in-process (the task function itself, as a worker would)."""
    queued = []
    monkeypatch.setattr(import_upload_task, "delay", lambda **kw: queued.append(kw))
    return queued


def dicom_zip(tmp_path: Path, name: str = "scan.zip") -> bytes:
    folder = tmp_path / "dcm"
    folder.mkdir()
    paths = write_series(phantom(), oblique_affine(), folder)
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        for path in paths:
            archive.write(path, f"series/{path.name}")
    return buffer.getvalue()


def test_it_imports_an_uploaded_zip_and_nifti_with_visible_progress(
    client, cast, study, tmp_path, run_now, settings
):
    """Issue requirement: a coordinator uploads a zip of DICOM files and a .nii.gz; the
    import runs as a task, the progress view reports it, and two cases appear. Sources:
    our writer's synthetic series and nibabel's shipped standard.nii.gz."""
    client.force_login(cast["pi"])
    files = [
        SimpleUploadedFile("Quorvath_scan.zip", dicom_zip(tmp_path)),
        SimpleUploadedFile("standard.nii.gz", nibabel_file("standard.nii.gz").read_bytes()),
    ]
    response = client.post("/studies/up/upload/", {"files": files})
    assert response.status_code == 302
    job = run_now[0]["job_id"]
    assert response.url == f"/studies/up/upload/{job}/"
    queued = client.get(f"/studies/up/upload/{job}/progress/").json()
    assert queued["state"] == "queued"
    assert import_upload_task(job_id=job) == "finished"
    status = client.get(f"/studies/up/upload/{job}/progress/").json()
    assert status["state"] == "finished" and status["done"] == status["total"] == 2
    assert [o["status"] for o in status["outcomes"]] == ["imported", "imported"]
    assert all("Quorvath" not in o["source"] + o["detail"] for o in status["outcomes"])
    assert Case.objects.filter(study=study).count() == 2
    assert not (Path(settings.CAIRN_UPLOAD_DIR) / job / "in").exists()
    page = client.get(f"/studies/up/upload/{job}/")
    assert b"imported" in page.content and b"upload.js" in page.content
    dicom = Case.objects.get(study=study, label__startswith="DICOM")
    np.testing.assert_allclose(dicom.original_affine, oblique_affine(), atol=1e-4)


def test_it_refuses_other_file_types_and_oversized_uploads(client, cast, study, settings, run_now):
    """Issue requirement: only .nii, .nii.gz or a zip; uploads over the size limit are
    refused with the numbers, and nothing is stored or queued."""
    client.force_login(cast["pi"])
    response = client.post(
        "/studies/up/upload/", {"files": [SimpleUploadedFile("notes.docx", b"x" * 50)]}
    )
    assert response.status_code == 200
    assert b"is not a .nii, .nii.gz or .zip file" in response.content
    settings.CAIRN_UPLOAD_MAX_BYTES = 100
    response = client.post(
        "/studies/up/upload/", {"files": [SimpleUploadedFile("big.nii", b"x" * 500)]}
    )
    assert b"holds 500 bytes, over the limit of 100 bytes" in response.content
    assert run_now == []
    root = Path(settings.CAIRN_UPLOAD_DIR)
    assert not root.exists() or list(root.iterdir()) == []


def test_it_reports_several_series_in_one_upload(client, cast, study, tmp_path, run_now):
    """Issue requirement: several series in one upload, none chosen, are refused with their
    descriptions and slice counts; choosing one by number then imports it."""
    folder = tmp_path / "two"
    folder.mkdir()
    write_series(phantom(), oblique_affine(), folder, attributes={"SeriesDescription": "alpha"})
    write_series(
        phantom((8, 8, 3)),
        oblique_affine(),
        folder,
        names=["b0", "b1", "b2"],
        attributes={"SeriesDescription": "beta"},
    )
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        for path in sorted(folder.iterdir()):
            archive.write(path, path.name)
    client.force_login(cast["pi"])
    client.post("/studies/up/upload/", {"files": [SimpleUploadedFile("s.zip", buffer.getvalue())]})
    status = uploads.run_upload(run_now[-1]["job_id"])
    assert [o["status"] for o in status["outcomes"]] == ["refused"]
    assert "'alpha' (CT, 9 slices)" in status["outcomes"][0]["detail"]
    assert not Case.objects.exists()
    client.post(
        "/studies/up/upload/",
        {"files": [SimpleUploadedFile("s.zip", buffer.getvalue())], "series": "2"},
    )
    status = uploads.run_upload(run_now[-1]["job_id"])
    assert [o["status"] for o in status["outcomes"]] == ["imported"]
    assert Case.objects.get().original_shape == [8, 8, 3]


def test_it_shows_uploads_only_to_the_study_coordinators(client, cast, study):
    """House rule (studies.access): outsiders get 404, readers 403, on every upload view."""
    client.force_login(cast["outsider"])
    assert client.get("/studies/up/upload/").status_code == 404
    client.force_login(cast["reader_a"])
    assert client.get("/studies/up/upload/").status_code == 403
    client.force_login(cast["pi"])
    assert client.get("/studies/up/upload/").status_code == 200
    assert client.get(f"/studies/up/upload/{'0' * 32}/progress/").status_code == 404
    assert client.get("/studies/up/upload/not-a-job/").status_code == 404


def test_it_refuses_an_empty_upload_in_the_service(study):
    """Common practice: nothing to import is a clear refusal."""
    with pytest.raises(ServiceError, match="choose one or more"):
        uploads.start_upload(study, [], uploads.UploadChoices())
