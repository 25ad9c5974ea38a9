"""The import_cases command and the ingest service: cases in, refusals that store nothing."""

from __future__ import annotations

import io
import re
import shutil
import zipfile
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from django.core.management import call_command
from django.core.management.base import CommandError
from pydicom import dcmread

from studies.imaging.dicom_writer import write_series
from studies.models import Case
from studies.services import ingest, studies
from tests.imaging.phantoms import (
    identifying_attributes,
    nibabel_file,
    oblique_affine,
    phantom,
    pydicom_file,
)


@pytest.fixture
def study(cast, settings, tmp_path):
    settings.CAIRN_DATA_DIR = tmp_path / "data"
    settings.CAIRN_ID_SALT = "test-salt"
    return studies.create_study(name="Import study", slug="import-study", coordinator=cast["pi"])


def run(*args: str) -> tuple[str, str, str | None]:
    """Run the command; return stdout, stderr and the CommandError message (or None)."""
    out, err = io.StringIO(), io.StringIO()
    try:
        call_command("import_cases", *args, stdout=out, stderr=err)
    except CommandError as exc:
        return out.getvalue(), err.getvalue(), str(exc)
    return out.getvalue(), err.getvalue(), None


def stored_files(settings) -> list[Path]:
    root = Path(settings.CAIRN_DATA_DIR)
    return sorted(p for p in root.rglob("*") if p.is_file()) if root.exists() else []


def dicom_folder(tmp_path: Path, name: str = "series", **kwargs) -> Path:
    folder = tmp_path / name
    folder.mkdir()
    write_series(phantom(), oblique_affine(), folder, **kwargs)
    return folder


def test_it_imports_nifti_and_dicom_with_a_progress_bar_and_a_summary(study, tmp_path, settings):
    """Source: nibabel's shipped anatomical.nii (33x41x25) and a synthetic series from our
    writer; the stored affines must match nibabel's and the written one (1e-4 mm)."""
    folder = dicom_folder(tmp_path)
    shutil.copy(nibabel_file("anatomical.nii"), tmp_path / "anatomical.nii")
    out, err, error = run("import-study", str(folder), str(tmp_path / "anatomical.nii"))
    assert error is None
    assert "[##############################] 2/2 volumes" in err
    assert "imported 2, skipped as duplicate 0, refused 0" in out
    cases = {c.label.split()[0]: c for c in Case.objects.filter(study=study)}
    np.testing.assert_allclose(
        cases["NIfTI"].original_affine, nib.load(nibabel_file("anatomical.nii")).affine, atol=1e-9
    )
    assert cases["NIfTI"].original_shape == [33, 41, 25]
    np.testing.assert_allclose(cases["DICOM"].original_affine, oblique_affine(), atol=1e-4)
    assert cases["DICOM"].modality == "CT"
    assert len(stored_files(settings)) == 6
    for case in cases.values():
        assert case.pseudonym and case.pseudonym not in case.label


def test_it_skips_a_reimport_as_duplicate(study, tmp_path, settings):
    """Issue requirement: the same series (renamed, in another folder) or file imported again
    is skipped with a notice, not duplicated."""
    folder = dicom_folder(tmp_path)
    run("import-study", str(folder), str(nibabel_file("standard.nii.gz")))
    before = stored_files(settings)
    renamed = tmp_path / "copy"
    renamed.mkdir()
    for n, path in enumerate(sorted(folder.iterdir())):
        shutil.copy(path, renamed / f"x{n}")
    out, _, error = run("import-study", str(renamed), str(nibabel_file("standard.nii.gz")))
    assert error is None
    assert "imported 0, skipped as duplicate 2, refused 0" in out
    assert out.count("already in the study as case C") == 2
    assert Case.objects.filter(study=study).count() == 2
    assert stored_files(settings) == before


def test_it_stores_nothing_in_a_dry_run(study, tmp_path, settings):
    """Issue requirement: --dry-run only reports."""
    folder = dicom_folder(tmp_path)
    out, _, error = run("import-study", str(folder), "--dry-run")
    assert error is None
    assert "would import" in out and "DICOM CT, 24x20x9 voxels" in out
    assert not Case.objects.exists() and stored_files(settings) == []


def test_it_picks_a_volume_and_a_series_when_told(study, tmp_path):
    """Source: nibabel's shipped example4d.nii.gz (2 volumes); --volume 1 imports it and
    --series N picks one of two series."""
    folder = dicom_folder(tmp_path, attributes={"SeriesDescription": "alpha"})
    write_series(
        phantom((8, 8, 3)),
        oblique_affine(),
        folder,
        names=["b0", "b1", "b2"],
        attributes={"SeriesDescription": "beta"},
    )
    _, _, error = run("import-study", str(nibabel_file("example4d.nii.gz")), "--volume", "1")
    assert error is None
    _, _, error = run("import-study", str(folder), "--series", "2")
    assert error is None
    shapes = sorted(tuple(c.original_shape) for c in Case.objects.all())
    assert shapes == [(8, 8, 3), (128, 96, 24)]


def test_it_leaves_no_identifying_value_in_the_database_or_data_dir(study, tmp_path, settings):
    """Issue requirement (DICOM PS3.15 Annex E Basic Profile): after importing a series with
    a value in every profile attribute we apply, and with identifying file and folder names,
    none of those values occurs in a full DB dump (dumpdata) or in the data dir's bytes."""
    values, needles = identifying_attributes()
    folder = tmp_path / "Quorvath_Ilsabet_scan"
    folder.mkdir()
    paths = write_series(
        phantom(),
        oblique_affine(),
        folder,
        attributes=values,
        names=[f"Quorvath_{k}.dcm" for k in range(9)],
    )
    needles += [str(dcmread(p).SOPInstanceUID) for p in paths] + ["Quorvath"]
    _, _, error = run("import-study", str(folder))
    assert error is None and Case.objects.count() == 1
    dump = io.StringIO()
    call_command("dumpdata", stdout=dump)
    blobs = [dump.getvalue().encode()] + [p.read_bytes() for p in stored_files(settings)]
    for needle in needles:
        assert not any(needle.encode() in blob for blob in blobs), needle


def _nifti_4d(tmp_path):
    path = tmp_path / "four.nii.gz"
    shutil.copy(nibabel_file("example4d.nii.gz"), path)
    return [path]


def _nifti_no_affine(tmp_path):
    image = nib.Nifti1Image(phantom(), np.eye(4))
    image.set_sform(np.eye(4), code=0)
    image.set_qform(np.eye(4), code=0)
    nib.save(image, tmp_path / "plain.nii")
    return [tmp_path / "plain.nii"]


def _nifti_truncated(tmp_path):
    raw = nibabel_file("anatomical.nii").read_bytes()
    (tmp_path / "cut.nii").write_bytes(raw[: len(raw) // 2])
    return [tmp_path / "cut.nii"]


def _text_file(tmp_path):
    (tmp_path / "report.pdf").write_bytes(b"%PDF-1.4 not an image")
    return [tmp_path / "report.pdf"]


def _zip_dot_dot(tmp_path):
    with zipfile.ZipFile(tmp_path / "evil.zip", "w") as archive:
        archive.writestr("../outside.dcm", b"x" * 100)
    return [tmp_path / "evil.zip"]


def _zip_absolute(tmp_path):
    with zipfile.ZipFile(tmp_path / "abs.zip", "w") as archive:
        archive.writestr("/tmp/abs.dcm", b"x" * 100)
    return [tmp_path / "abs.zip"]


def _zip_bomb(tmp_path):
    with zipfile.ZipFile(tmp_path / "bomb.zip", "w", compression=zipfile.ZIP_DEFLATED) as archive:
        archive.writestr("zeros.dcm", bytes(8 * 1024 * 1024))
    return [tmp_path / "bomb.zip"]


def _empty_folder(tmp_path):
    (tmp_path / "nothing").mkdir()
    return [tmp_path / "nothing"]


def _burned_in(tmp_path):
    return [dicom_folder(tmp_path, attributes={"BurnedInAnnotation": "YES"})]


def _jpeg_ls(tmp_path):
    return [pydicom_file("MR_small_jpeg_ls_lossless.dcm")]


def _hooked(hook):
    def build(tmp_path):
        return [dicom_folder(tmp_path, hook=hook)]

    return build


def _missing_slice(tmp_path):
    folder = dicom_folder(tmp_path)
    (folder / "slice_0004.dcm").unlink()
    return [folder]


def _tilted(tmp_path):
    affine = oblique_affine()
    affine[:3, 2] += 0.3 * affine[:3, 1]
    folder = tmp_path / "tilt"
    folder.mkdir()
    write_series(phantom(), affine, folder)
    return [folder]


def _mixed(k, ds):
    if k == 2:
        ds.ImageOrientationPatient = [1, 0, 0, 0, 1, 0]


def _dup(k, ds):
    if k == 3:
        ds.ImagePositionPatient = _first[0]
    if k == 0:
        _first[:] = [list(ds.ImagePositionPatient)]


_first: list = []


def _uneven(k, ds):
    if k == 4:  # 0.3 mm further along the slice normal
        iop = np.array(ds.ImageOrientationPatient, dtype=float)
        normal = np.cross(iop[:3], iop[3:])
        ds.ImagePositionPatient = list(np.array(ds.ImagePositionPatient, float) + 0.3 * normal)


def _sheared(k, ds):
    ds.ImageOrientationPatient = [1, 0, 0, 0.2, 0.979796, 0]


def _truncated_dicom(tmp_path):
    folder = dicom_folder(tmp_path)
    target = folder / "slice_0003.dcm"
    target.write_bytes(target.read_bytes()[:-500])
    return [folder]


REFUSALS = [
    ("4d", _nifti_4d, r"4D image .*--volume N"),
    ("no-affine", _nifti_no_affine, r"neither sform_code nor qform_code"),
    ("truncated-nifti", _nifti_truncated, r"cut\.nii: "),
    ("non-image", _text_file, r"not a NIfTI \(\.nii, \.nii\.gz\), DICOM or zip file"),
    ("zip-dotdot", _zip_dot_dot, r"contains '\.\.'"),
    ("zip-absolute", _zip_absolute, r"absolute path"),
    ("zip-bomb", _zip_bomb, r"times, more than the limit of 50"),
    ("empty-folder", _empty_folder, r"the folder holds no files"),
    ("burned-in", _burned_in, r"Burned In Annotation is YES"),
    ("jpeg-ls", _jpeg_ls, r"JPEG-LS Lossless Image Compression \(1\.2\.840\.10008\.1\.2\.4\.80\)"),
    ("mixed-orientation", _hooked(_mixed), r"mixed orientations within the series"),
    ("duplicates", _hooked(_dup), r"duplicate slice positions"),
    ("non-uniform", _hooked(_uneven), r"non-uniform slice spacing .*spacings seen"),
    ("missing-slice", _missing_slice, r"looks like 1 missing slice"),
    ("tilt", _tilted, r"gantry tilt or sheared geometry"),
    ("sheared", _hooked(_sheared), r"not two orthogonal unit vectors .*sheared geometry"),
    ("truncated-dicom", _truncated_dicom, r"slice_0003\.dcm: .*truncated"),
]


@pytest.mark.parametrize(("kind", "build", "message"), REFUSALS, ids=[r[0] for r in REFUSALS])
def test_it_refuses_bad_input_with_a_reason_and_stores_nothing(
    study, tmp_path, settings, kind, build, message
):
    """Issue requirement: each refusal names what was found and leaves no row and no file.
    Sources: nibabel's and pydicom's shipped files where named, else synthetic input."""
    settings.CAIRN_ZIP_MAX_RATIO = 50
    inputs = build(tmp_path)
    out, _, error = run("import-study", *[str(p) for p in inputs])
    assert error == "1 input(s) refused; see the table above"
    assert "refused 1" in out
    outcomes = ingest.import_paths(study, inputs)
    assert [o.status for o in outcomes] == [ingest.REFUSED]
    assert re.search(message, outcomes[0].detail), outcomes[0].detail
    assert not Case.objects.exists()
    assert stored_files(settings) == []


def test_it_refuses_several_series_in_an_upload_and_lists_them(study, tmp_path, settings):
    """Issue requirement: an upload holding several series, none chosen, is refused with
    their descriptions and slice counts."""
    folder = dicom_folder(tmp_path, attributes={"SeriesDescription": "alpha"})
    write_series(
        phantom((8, 8, 3)),
        oblique_affine(),
        folder,
        names=["b0", "b1", "b2"],
        attributes={"SeriesDescription": "beta"},
    )
    options = ingest.ImportOptions(one_series_only=True)
    outcomes = ingest.import_paths(study, [folder], options)
    assert [o.status for o in outcomes] == [ingest.REFUSED]
    assert "found 2 DICOM series and none was chosen" in outcomes[0].detail
    assert "'alpha' (CT, 9 slices)" in outcomes[0].detail
    assert "'beta' (CT, 3 slices)" in outcomes[0].detail
    assert not Case.objects.exists() and stored_files(settings) == []


def test_it_refuses_an_upload_over_the_size_limit(study, tmp_path, settings):
    """Issue requirement: uploads over the size limit are refused and nothing is stored."""
    options = ingest.ImportOptions(max_file_bytes=1000)
    outcomes = ingest.import_paths(study, [nibabel_file("anatomical.nii")], options)
    assert outcomes[0].status == ingest.REFUSED
    assert "over the size limit of 1000" in outcomes[0].detail
    assert not Case.objects.exists() and stored_files(settings) == []


@pytest.mark.parametrize("failure", [RuntimeError("database went away"), KeyboardInterrupt()])
def test_it_removes_the_files_when_the_case_row_fails(
    study, tmp_path, settings, monkeypatch, failure
):
    """Issue requirement: an import that fails or is interrupted after writing its files
    leaves neither rows nor files."""

    def broken(*args, **kwargs):
        raise failure

    monkeypatch.setattr(ingest, "create_case", broken)
    with pytest.raises(type(failure)):
        ingest.import_paths(study, [nibabel_file("standard.nii.gz")])
    assert not Case.objects.exists()
    assert stored_files(settings) == []
    assert list(Path(settings.CAIRN_DATA_DIR).iterdir()) == []


def test_it_refuses_an_unknown_study(db):
    """Common practice: a wrong slug is a clear command error."""
    _, _, error = run("no-such-study", "/tmp")
    assert error == "no study with slug 'no-such-study'"


def test_it_imports_burned_in_images_only_when_allowed(study, tmp_path):
    """Source: DICOM PS3.15 E.3.1 (Burned In Annotation); the coordinator's explicit
    --allow-burned-in for this import lets the series in."""
    folder = dicom_folder(tmp_path, attributes={"BurnedInAnnotation": "YES"})
    _, _, error = run("import-study", str(folder))
    assert error is not None and not Case.objects.exists()
    out, _, error = run("import-study", str(folder), "--allow-burned-in")
    assert error is None and "imported 1" in out
    assert Case.objects.get().provenance["burned_in_annotation"] == ["YES"]
