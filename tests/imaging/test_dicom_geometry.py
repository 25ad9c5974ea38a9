"""The DICOM affine and slice ordering: PS3.3 worked values, nibabel and pydicom test data."""

from __future__ import annotations

import os

import numpy as np
import pytest
from nibabel.nicom import dicomwrappers
from pydicom import dcmread

from studies.imaging.dicom import image_plane_affine, plan_geometry, read_series, slice_normal
from studies.imaging.dicom_headers import choose_series, group_series, read_header
from studies.imaging.dicom_writer import write_series
from studies.imaging.errors import GeometryError
from studies.imaging.geometry import affine_lps_to_ras, voxel_to_world
from tests.imaging.phantoms import oblique_affine, phantom, pydicom_file

SALT = b"test-salt"
IOP = [0.939693, 0.342020, 0.0, 0.0, 0.0, -1.0]
IPP = [-120.5, 35.25, 88.0]
PIXEL_SPACING = (0.5, 0.8)


def test_it_maps_a_pixel_by_the_image_plane_equation():
    """Source: DICOM PS3.3 C.7.6.2.1.1 equation, test vector of check-values 9a (computed by
    hand, nibabel 5.4.2 agrees): IOP [0.939693, 0.342020, 0, 0, 0, -1], IPP [-120.5, 35.25,
    88.0], PixelSpacing [0.5, 0.8]; column i = 7, row j = 11 -> LPS (-115.237721, 37.165313,
    82.5), RAS (115.237721, -37.165313, 82.5). Tolerance 1e-6 mm."""
    lps = image_plane_affine(IOP, IPP, PIXEL_SPACING, slice_normal(IOP))
    point = lps @ np.array([7.0, 11.0, 0.0, 1.0])
    np.testing.assert_allclose(point[:3], [-115.237721, 37.165313, 82.5], atol=1e-6)
    ras = voxel_to_world(affine_lps_to_ras(lps), [7.0, 11.0, 0.0])
    np.testing.assert_allclose(ras, [115.237721, -37.165313, 82.5], atol=1e-6)


def test_it_does_not_give_the_answer_of_swapped_spacings():
    """Source: check-values 9a negative vector: swapping i/j or the two spacings gives
    (-112.230705, 38.259777, 84.5), which must not come out."""
    lps = image_plane_affine(IOP, IPP, PIXEL_SPACING, slice_normal(IOP))
    point = (lps @ np.array([7.0, 11.0, 0.0, 1.0]))[:3]
    assert np.linalg.norm(point - np.array([-112.230705, 38.259777, 84.5])) > 1.0


def test_it_flags_the_gap_in_the_slice_spacing_test_vector(tmp_path):
    """Source: check-values 9a slice-spacing vector: slices at k = 0, 1, 2, 4 x 1.25 mm along
    n = (-0.342020, 0.939693, 0) give spacings 1.25, 1.25, 2.5: a gap to flag. The stack is
    written by our own writer with the IOP and IPP above."""
    normal = np.cross(IOP[:3], IOP[3:])
    np.testing.assert_allclose(normal, [-0.342020, 0.939693, 0.0], atol=1e-6)
    ks = [0, 1, 2, 4]
    affine_lps = image_plane_affine(IOP, IPP, PIXEL_SPACING, normal * 1.25)

    def move(k, ds):
        ds.ImagePositionPatient = list(np.array(IPP) + ks[k] * 1.25 * normal)

    write_series(phantom((6, 5, 4)), affine_lps_to_ras(affine_lps), tmp_path, hook=move)
    headers = [read_header(p) for p in sorted(tmp_path.iterdir())]
    along = np.array([h.frames[0].position for h in headers]) @ normal
    np.testing.assert_allclose(along, [74.337592, 75.587592, 76.837592, 79.337592], atol=1e-5)
    with pytest.raises(GeometryError, match=r"gap .*2\.5000 mm.*usual spacing is 1\.2500 mm"):
        plan_geometry(choose_series(group_series(headers)))


def _series_dir(name: str) -> str:
    return os.path.dirname(pydicom_file(name))


def test_it_matches_nibabel_and_pydicom_on_the_ct5n_series():
    """Source: pydicom's shipped dicomdirtests/98892001/CT5N (5 slices, 16x16, 0.488281 mm
    pixels, 2.5 mm apart, stack notes). Per-slice affine from nibabel 5.4.2
    dicomwrappers (indexed row, column, so its first two columns swap with ours); voxels are
    pydicom's pixel_array plus RescaleIntercept. Tolerance 1e-6 mm."""
    folder = _series_dir("dicomdirtests/98892001/CT5N/2062")
    paths = [os.path.join(folder, f) for f in os.listdir(folder)]
    volume = read_series(
        choose_series(group_series([read_header(p) for p in paths])), uid_salt=SALT
    )
    assert volume.data.shape == (16, 16, 5)
    spacing = np.sqrt((volume.affine[:3, :3] ** 2).sum(axis=0))
    np.testing.assert_allclose(spacing, [0.488281, 0.488281, 2.5], atol=1e-6)
    positions = {p: dcmread(p).ImagePositionPatient for p in paths}
    order = sorted(paths, key=lambda p: float(positions[p][2]))  # normal is +z (IOP identity)
    first = dicomwrappers.wrapper_from_file(order[0])
    nib_lps = first.affine
    ours_lps = np.diag([-1.0, -1.0, 1.0, 1.0]) @ volume.affine
    np.testing.assert_allclose(ours_lps[:3, 0], nib_lps[:3, 1], atol=1e-6)
    np.testing.assert_allclose(ours_lps[:3, 1], nib_lps[:3, 0], atol=1e-6)
    np.testing.assert_allclose(ours_lps[:3, 3], nib_lps[:3, 3], atol=1e-6)
    for k, path in enumerate(order):
        ds = dcmread(path)
        expected = ds.pixel_array.astype(np.int32) * int(ds.RescaleSlope) + int(ds.RescaleIntercept)
        np.testing.assert_array_equal(volume.data[:, :, k].T, expected)
        np.testing.assert_allclose(
            voxel_to_world(volume.affine, [0, 0, k]),
            np.array([-1, -1, 1]) * np.array(ds.ImagePositionPatient, dtype=float),
            atol=1e-6,
        )


@pytest.mark.parametrize("name", ["CT_small.dcm", "MR_small.dcm"])
def test_it_matches_nibabel_on_single_slice_test_files(name):
    """Source: pydicom's shipped CT_small.dcm (128x128) and MR_small.dcm (64x64); nibabel
    5.4.2 dicomwrappers affine (row, column order) and pydicom pixel_array. A one-slice
    series takes its slice step from the header, as nibabel does."""
    path = pydicom_file(name)
    volume = read_series(choose_series(group_series([read_header(path)])), uid_salt=SALT)
    ds = dcmread(path)
    assert volume.data.shape == (ds.Columns, ds.Rows, 1)
    wrapper = dicomwrappers.wrapper_from_file(str(path))
    ours_lps = np.diag([-1.0, -1.0, 1.0, 1.0]) @ volume.affine
    np.testing.assert_allclose(ours_lps[:3, [1, 0, 3]], wrapper.affine[:3, [0, 1, 3]], atol=1e-5)
    slope = float(ds.get("RescaleSlope", 1))
    intercept = float(ds.get("RescaleIntercept", 0))
    np.testing.assert_array_equal(volume.data[:, :, 0].T, ds.pixel_array * slope + intercept)


def test_it_orders_slices_by_position_not_instance_number(tmp_path):
    """Source: PS3.3 C.7.6.2.1.1 (position along n = X x Y defines order); Instance Numbers
    written in reverse and files named against the order must change nothing."""
    data, affine = phantom(), oblique_affine()
    n = data.shape[2]

    def scramble(k, ds):
        ds.InstanceNumber = n - k

    names = [f"z{(k * 7) % n:02d}.dcm" for k in range(n)]
    write_series(data, affine, tmp_path, names=names, hook=scramble)
    plan = choose_series(group_series([read_header(p) for p in tmp_path.iterdir()]))
    volume = read_series(plan, uid_salt=SALT)
    np.testing.assert_allclose(volume.affine, affine, atol=1e-4)
    np.testing.assert_array_equal(volume.data, data)


def test_it_reads_a_reversed_stack_with_the_same_world_positions(tmp_path):
    """Common practice: a stack written with its slices stepping against X x Y is read in
    ascending order along the normal; each voxel value must keep its world position."""
    data, affine = phantom(), oblique_affine()
    flipped = affine.copy()
    flipped[:3, 2] *= -1
    write_series(data, flipped, tmp_path)
    volume = read_series(
        choose_series(group_series([read_header(p) for p in tmp_path.iterdir()])), uid_salt=SALT
    )
    np.testing.assert_array_equal(volume.data, data[:, :, ::-1])
    ijk = np.array([3.0, 5.0, 7.0])
    written_world = voxel_to_world(flipped, ijk)
    read_world = voxel_to_world(volume.affine, [3.0, 5.0, data.shape[2] - 1 - 7.0])
    np.testing.assert_allclose(read_world, written_world, atol=1e-4)
