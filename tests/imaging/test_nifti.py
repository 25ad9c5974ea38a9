"""NIfTI reading, checked against nibabel and the test data nibabel ships."""

from __future__ import annotations

import gzip
import struct

import nibabel as nib
import numpy as np
import pytest

from studies.imaging.errors import GeometryError, UnreadableFileError, UnsupportedImageError
from studies.imaging.nifti import read_nifti
from tests.imaging.phantoms import nibabel_file, oblique_affine, phantom


@pytest.mark.parametrize(
    ("name", "shape", "zooms"),
    [
        ("anatomical.nii", (33, 41, 25), (2.0, 2.0, 2.0)),
        ("standard.nii.gz", (4, 5, 7), (1.0, 3.0, 2.0)),
        ("reoriented_anat_moved.nii", None, None),
    ],
)
def test_it_matches_nibabel_on_its_shipped_files(name, shape, zooms):
    """Source: nibabel/tests/data files; shape, voxel sizes and affine as nibabel 5.4.2 reports
    them (img.shape, header.get_zooms(), img.affine), values equal to img.get_fdata().
    Expected shapes and sizes for anatomical/standard also from the project's stack notes."""
    path = nibabel_file(name)
    image = nib.load(path)
    volume = read_nifti(path)
    assert volume.data.shape == image.shape
    if shape is not None:
        assert volume.data.shape == shape
        np.testing.assert_allclose(image.header.get_zooms()[:3], zooms)
    np.testing.assert_allclose(volume.affine, image.affine, atol=1e-9)
    np.testing.assert_allclose(
        np.sqrt((volume.affine[:3, :3] ** 2).sum(axis=0)), image.header.get_zooms()[:3], rtol=1e-6
    )
    np.testing.assert_array_equal(volume.data, image.get_fdata())
    assert volume.provenance["affine_source"] == "sform"
    assert len(volume.checksum) == 64


def test_it_keeps_the_integer_type_of_anatomical_nii():
    """Source: nibabel's anatomical.nii is int16 (stack notes; nibabel get_data_dtype)."""
    volume = read_nifti(nibabel_file("anatomical.nii"))
    assert volume.data.dtype == np.int16


def test_it_refuses_a_4d_image_and_reads_the_volume_asked_for():
    """Source: nibabel's example4d.nii.gz, 128x96x24x2 (stack notes); volume 1 must equal
    nibabel's dataobj[..., 1]."""
    path = nibabel_file("example4d.nii.gz")
    with pytest.raises(UnsupportedImageError, match=r"4D image .*2 volumes.*--volume N \(0 to 1\)"):
        read_nifti(path)
    volume = read_nifti(path, volume_index=1)
    image = nib.load(path)
    assert volume.data.shape == (128, 96, 24)
    np.testing.assert_array_equal(volume.data, np.asanyarray(image.dataobj)[..., 1])
    np.testing.assert_allclose(volume.affine, image.affine)
    with pytest.raises(UnsupportedImageError, match="out of range"):
        read_nifti(path, volume_index=2)


def _save(tmp_path, name, data, affine, sform_code=1, qform_code=1, edit=None):
    image = nib.Nifti1Image(data, affine)
    image.set_sform(affine, code=sform_code)
    image.set_qform(affine, code=qform_code)
    if edit is not None:
        edit(image.header)
    path = tmp_path / name
    nib.save(image, path)
    return path


def test_it_uses_the_qform_when_the_sform_code_is_zero(tmp_path):
    """Source: NIfTI-1 standard, method 2 (qform) applies when sform_code = 0 (nifti1.h,
    from memory); the expected affine is nibabel's header.get_qform()."""
    affine = oblique_affine()
    path = _save(tmp_path, "q.nii", phantom(), affine, sform_code=0, qform_code=1)
    volume = read_nifti(path)
    assert volume.provenance["affine_source"] == "qform"
    np.testing.assert_allclose(volume.affine, nib.load(path).header.get_qform(), atol=1e-6)
    np.testing.assert_allclose(volume.affine, affine, atol=1e-4)


def test_it_prefers_the_sform_when_both_codes_are_set(tmp_path):
    """Source: NIfTI-1 standard, method 3 (sform) when sform_code > 0 (nifti1.h, from memory)."""
    sform = oblique_affine()
    image = nib.Nifti1Image(phantom(), sform)
    image.set_sform(sform, code=2)
    image.set_qform(np.diag([3.0, 3.0, 3.0, 1.0]), code=1)
    nib.save(image, tmp_path / "both.nii")
    volume = read_nifti(tmp_path / "both.nii")
    np.testing.assert_allclose(volume.affine, sform, atol=1e-6)


def test_it_refuses_a_file_with_neither_sform_nor_qform(tmp_path):
    """Source: NIfTI-1 standard, method 1 gives no world position (nifti1.h, from memory)."""
    path = _save(tmp_path, "none.nii", phantom(), np.eye(4), sform_code=0, qform_code=0)
    with pytest.raises(GeometryError, match=r"neither sform_code nor qform_code is set"):
        read_nifti(path)


@pytest.mark.parametrize("bad", [0.0, -1.5, np.nan])
def test_it_refuses_zero_negative_or_non_finite_spacing(tmp_path, bad):
    """Common practice: a voxel size must be a positive finite length; pixdim[1:4] is quoted."""

    path = _save(tmp_path, "bad.nii", phantom(), np.diag([1.0, 1.0, 1.0, 1.0]))
    raw = bytearray(path.read_bytes())
    raw[84:88] = struct.pack("<f", bad)  # pixdim[2]: header offset 76 + 2 * 4 (nifti1.h)
    path.write_bytes(bytes(raw))
    with pytest.raises(GeometryError, match=r"pixdim\[1:4\] = \[1\.0, (0\.0|-1\.5|nan)"):
        read_nifti(path)


def test_it_refuses_a_singular_sform(tmp_path):
    """Common practice: a singular affine has a zero voxel size; the matrix is quoted."""
    path = _save(tmp_path, "flat.nii", phantom(), np.eye(4), qform_code=0)
    raw = bytearray(path.read_bytes())
    raw[296:312] = struct.pack("<4f", 0.0, 0.0, 0.0, 0.0)  # srow_y (nifti1.h offset 296)
    path.write_bytes(bytes(raw))
    with pytest.raises(GeometryError, match=r"unusable sform.*singular"):
        read_nifti(path)


def test_it_refuses_a_truncated_file(tmp_path):
    """Common practice: a file shorter than its header says must not import."""
    path = _save(tmp_path, "full.nii", phantom(), oblique_affine())
    cut = tmp_path / "cut.nii"
    cut.write_bytes(path.read_bytes()[:2000])
    with pytest.raises(UnreadableFileError, match=r"cut\.nii"):
        read_nifti(cut)


def test_it_refuses_a_corrupt_gzip_and_a_text_file(tmp_path):
    """Common practice: non-image content under a NIfTI name gets a clear refusal."""
    path = _save(tmp_path, "ok.nii", phantom(), oblique_affine())
    broken = tmp_path / "broken.nii.gz"
    broken.write_bytes(gzip.compress(path.read_bytes())[:500])
    with pytest.raises(UnreadableFileError, match=r"broken\.nii\.gz"):
        read_nifti(broken)
    text = tmp_path / "notes.nii"
    text.write_text("these are not voxels\n" * 40)
    with pytest.raises(UnreadableFileError, match=r"notes\.nii: not a readable NIfTI"):
        read_nifti(text)


def test_it_applies_scl_slope_and_keeps_integers_when_they_fit(tmp_path):
    """Source: NIfTI-1 real value = scl_slope * stored + scl_inter (nifti1.h, from memory);
    compared with nibabel's get_fdata(), which applies the same scaling."""
    data = phantom()
    image = nib.Nifti1Image(data, oblique_affine())
    image.header.set_slope_inter(2.0, -10.0)
    nib.save(image, tmp_path / "scaled.nii")
    volume = read_nifti(tmp_path / "scaled.nii")
    assert volume.data.dtype.kind == "i"
    np.testing.assert_array_equal(volume.data, nib.load(tmp_path / "scaled.nii").get_fdata())
    image.header.set_slope_inter(0.5, 0.25)
    nib.save(image, tmp_path / "frac.nii")
    volume = read_nifti(tmp_path / "frac.nii")
    assert volume.data.dtype == np.float32
    np.testing.assert_allclose(volume.data, nib.load(tmp_path / "frac.nii").get_fdata(), rtol=1e-6)
