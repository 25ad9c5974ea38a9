"""Finding NIfTI files and DICOM series in files, folders and zips."""

from __future__ import annotations

import shutil
import zipfile

import nibabel as nib

from studies.imaging.archive import ArchiveLimits
from studies.imaging.dicom_writer import write_series
from studies.imaging.sources import discover
from tests.imaging.phantoms import nibabel_file, oblique_affine, phantom


def test_it_finds_series_and_nifti_in_nested_folders(tmp_path):
    """Common practice: a coordinator's folder mixes files; DICOM slices split over two
    sub-folders still form one series (grouped by Series Instance UID)."""
    root = tmp_path / "in"
    (root / "part1" / "deep").mkdir(parents=True)
    (root / "part2").mkdir()
    paths = write_series(phantom(), oblique_affine(), root / "part1" / "deep")
    for path in paths[5:]:
        shutil.move(path, root / "part2" / path.name)
    shutil.copy(nibabel_file("standard.nii.gz"), root / "scan.nii.gz")
    (root / ".DS_Store").write_bytes(b"\0\1junk")
    (root / "notes.txt").write_text("reader notes")
    found = discover([root], tmp_path / "work")
    assert [p.n_frames for p in found.series] == [9]
    assert [c.path.name for c in found.nifti] == ["scan.nii.gz"]
    assert [r.reason for r in found.refusals] == ["not a NIfTI (.nii, .nii.gz), DICOM or zip file"]
    assert found.skipped == [str(root / ".DS_Store")]


def test_it_opens_zips_and_names_members(tmp_path):
    """Common practice: a zip of DICOM files is extracted under the working folder with the
    archive limits; members are named archive:member in refusals."""
    series = tmp_path / "series"
    series.mkdir()
    paths = write_series(phantom(), oblique_affine(), series)
    archive = tmp_path / "upload.zip"
    with zipfile.ZipFile(archive, "w") as zf:
        for path in paths:
            zf.write(path, f"scan/{path.name}")
        zf.writestr("scan/readme.txt", "not an image")
    (tmp_path / "work").mkdir()
    found = discover([archive], tmp_path / "work", ArchiveLimits())
    assert [p.n_frames for p in found.series] == [9]
    assert found.refusals[0].source == f"{archive}:scan/readme.txt"


def test_it_refuses_empty_folders_missing_paths_and_empty_files(tmp_path):
    """Common practice: each unusable input is reported with its reason, none silently."""
    (tmp_path / "empty").mkdir()
    (tmp_path / "zero.nii").write_bytes(b"")
    found = discover([tmp_path / "empty", tmp_path / "nowhere", tmp_path / "zero.nii"], tmp_path)
    reasons = {r.source: r.reason for r in found.refusals}
    assert reasons == {
        str(tmp_path / "empty"): "the folder holds no files",
        str(tmp_path / "nowhere"): "no such file or folder",
        str(tmp_path / "zero.nii"): "empty file (0 bytes)",
    }
    assert not found.series and not found.nifti


def test_it_refuses_files_over_the_size_limit_and_bad_zips(tmp_path):
    """Common practice: uploads over the size limit and unsafe zips are refused by name."""
    image = nib.load(nibabel_file("anatomical.nii"))
    nib.save(image, tmp_path / "big.nii")
    bomb = tmp_path / "bomb.zip"
    with zipfile.ZipFile(bomb, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        zf.writestr("zeros.dcm", bytes(2 * 1024 * 1024))
    found = discover(
        [tmp_path / "big.nii", bomb],
        tmp_path / "work",
        ArchiveLimits(max_ratio=50),
        max_file_bytes=10_000,
    )
    reasons = [r.reason for r in found.refusals]
    assert "over the size limit of 10000" in reasons[0]
    assert "more than the limit of 50" in reasons[1]
    assert not any((tmp_path / "work").glob("zip-*/*"))


def test_it_counts_an_instance_found_twice_once(tmp_path):
    """Source: a SOP Instance UID identifies one instance (DICOM PS3.3, SOP Common Module,
    from memory); the same files in a folder and in a copy form one 9-slice series."""
    first = tmp_path / "a"
    first.mkdir()
    write_series(phantom(), oblique_affine(), first)
    shutil.copytree(first, tmp_path / "b")
    found = discover([first, tmp_path / "b"], tmp_path)
    assert [p.n_frames for p in found.series] == [9]
