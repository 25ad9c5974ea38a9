"""Reading DICOM series: round trips through our writer, refusals, pydicom's shipped files."""

from __future__ import annotations

import os
import random
import shutil
from pathlib import Path

import numpy as np
import pytest
from pydicom import dcmread

from studies.imaging.dicom import read_series
from studies.imaging.dicom_headers import choose_series, group_series, read_header
from studies.imaging.dicom_writer import write_enhanced, write_series
from studies.imaging.errors import (
    BurnedInAnnotationError,
    GeometryError,
    SeriesChoiceError,
    UnreadableFileError,
    UnsupportedImageError,
)
from tests.imaging.phantoms import oblique_affine, phantom, pydicom_file

SALT = b"test-salt"


def _read_folder(folder, **kwargs):
    headers = [read_header(os.path.join(folder, f)) for f in sorted(os.listdir(folder))]
    return read_series(
        choose_series(group_series(headers), kwargs.pop("series", None)), uid_salt=SALT, **kwargs
    )


def test_it_round_trips_an_oblique_anisotropic_volume(tmp_path):
    """Source: our writer inverts the PS3.3 C.7.6.2.1.1 equation; reading back must give
    the written affine within 1e-4 mm (issue requirement) and identical voxel values, the
    bright voxel at (3, 5, 7) included (viewer-notes 1.8)."""
    data, affine = phantom(), oblique_affine()
    write_series(data, affine, tmp_path, slope=1.0, intercept=-1024.0)
    volume = _read_folder(tmp_path)
    np.testing.assert_allclose(volume.affine, affine, atol=1e-4)
    np.testing.assert_array_equal(volume.data, data.astype(np.int32) - 1024)
    assert volume.data.dtype == np.int16
    assert np.unravel_index(np.argmax(volume.data), volume.data.shape) == (3, 5, 7)


def test_it_gives_the_same_volume_for_shuffled_and_renamed_files(tmp_path):
    """Common practice: file names and directory order carry no geometry; a copy with
    shuffled, renamed files must give the same affine, voxels and checksum."""
    data, affine = phantom(), oblique_affine()
    first = tmp_path / "a"
    first.mkdir()
    paths = write_series(data, affine, first)
    second = tmp_path / "b"
    second.mkdir()
    shuffled = list(paths)
    random.Random(7).shuffle(shuffled)
    for n, path in enumerate(shuffled):
        shutil.copy(path, second / f"IMG{n:05d}")
    one, two = _read_folder(first), _read_folder(second)
    np.testing.assert_array_equal(one.data, two.data)
    np.testing.assert_allclose(one.affine, two.affine, atol=0)
    assert one.checksum == two.checksum


def test_it_reads_an_enhanced_multiframe_image_in_position_order(tmp_path):
    """Source: PS3.3 C.7.6.16 per-frame functional groups (Plane Position per frame, shared
    orientation, pixel measures, value transformation); frames written in a scrambled order
    must come back sorted by position with the written affine (1e-4 mm)."""
    data, affine = phantom(), oblique_affine()
    order = [4, 0, 8, 2, 6, 1, 7, 3, 5]
    write_enhanced(
        data.astype(np.uint16) + 2000,
        affine,
        tmp_path / "multi.dcm",
        slope=1.0,
        intercept=-2000.0,
        frame_order=order,
    )
    volume = _read_folder(tmp_path)
    np.testing.assert_allclose(volume.affine, affine, atol=1e-4)
    np.testing.assert_array_equal(volume.data, data)
    assert volume.provenance["enhanced"] is True


def test_it_places_a_scanners_enhanced_mr_file_where_the_standard_and_nibabel_do(tmp_path):
    """Source: nibabel ships nicom/tests/data/philips_mprage.dcm.gz, an Enhanced MR Image
    Storage file from a scanner (176 frames of 256 x 256, a slightly oblique sagittal
    series; its pixel values are blanked, so only geometry can be checked).
    PS3.3 C.7.6.2.1.1: each frame's Image Position (Patient) is the centre of its first
    voxel, in LPS; our affine (RAS+) must put voxel (0, 0, k) on one frame's position for
    every k (1e-4 mm). nibabel's own MultiframeWrapper (affine in LPS) must give the same
    eight corner voxel centres: it derives the slice step its own way (1.0000091 mm against
    our 1.0000014 mm), which over 175 slices was measured as 1.3e-3 mm, so 2e-3 mm."""
    import gzip
    import itertools
    import warnings

    import nibabel
    from nibabel.nicom import dicomwrappers

    source = Path(nibabel.__file__).parent / "nicom" / "tests" / "data" / "philips_mprage.dcm.gz"
    path = tmp_path / "mprage.dcm"
    path.write_bytes(gzip.decompress(source.read_bytes()))
    volume = _read_folder(tmp_path)
    ds = dcmread(path)
    assert volume.data.shape == (256, 256, 176) and volume.provenance["enhanced"] is True

    to_lps = np.diag([-1.0, -1.0, 1.0, 1.0]) @ volume.affine
    first_voxels = (to_lps @ np.array([[0, 0, k, 1.0] for k in range(176)]).T).T[:, :3]
    positions = np.array([frame.PlanePositionSequence[0].ImagePositionPatient
                          for frame in ds.PerFrameFunctionalGroupsSequence], dtype=float)
    gaps = np.linalg.norm(first_voxels[:, None] - positions[None], axis=2)
    assert gaps.min(axis=1).max() < 1e-4 and sorted(gaps.argmin(axis=1)) == list(range(176))

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # nibabel calls its DICOM readers experimental
        wrapper = dicomwrappers.wrapper_from_data(ds)
        theirs_affine, theirs_shape = wrapper.affine, wrapper.image_shape

    def corners(affine, shape):
        index = [(*c, 1.0) for c in itertools.product(*[(0, n - 1) for n in shape])]
        return (affine @ np.array(index).T).T[:, :3]

    ours, theirs = corners(to_lps, volume.data.shape), corners(theirs_affine, theirs_shape)
    assert np.linalg.norm(ours[:, None] - theirs[None], axis=2).min(axis=1).max() < 2e-3


def test_it_applies_a_fractional_rescale_as_float(tmp_path):
    """Source: PS3.3 C.11.1.1.2, output = RescaleSlope * stored + RescaleIntercept; a
    fractional slope cannot stay integer, so float32 comes back."""
    data = phantom()
    write_series(data, oblique_affine(), tmp_path, modality="MR", slope=0.25, intercept=3.5)
    volume = _read_folder(tmp_path)
    assert volume.data.dtype == np.float32
    np.testing.assert_allclose(volume.data, data * 0.25 + 3.5, rtol=1e-6)


@pytest.mark.parametrize(
    "variant", ["MR_small_RLE.dcm", "MR_small_bigendian.dcm", "MR_small_jp2klossless.dcm"]
)
def test_it_decodes_pydicom_variants_to_the_same_voxels(variant):
    """Source: pydicom's shipped MR_small.dcm and its RLE, big-endian and lossless JPEG 2000
    encodings (stack notes): lossless variants must give identical voxels and affine."""
    reference = read_series(
        group_series([read_header(pydicom_file("MR_small.dcm"))])[0], uid_salt=SALT
    )
    other = read_series(group_series([read_header(pydicom_file(variant))])[0], uid_salt=SALT)
    np.testing.assert_array_equal(other.data, reference.data)
    np.testing.assert_allclose(other.affine, reference.affine)


def test_it_reads_the_rtdose_multiframe_with_its_frame_offsets():
    """Source: pydicom's shipped rtdose.dcm (15 frames of 10x10, 10 mm pixels, Grid Frame
    Offset Vector 0..70 by 5 mm; PS3.3 C.8.8.3.2); voxels are pixel_array x DoseGridScaling."""
    path = pydicom_file("rtdose.dcm")
    volume = read_series(group_series([read_header(path)])[0], uid_salt=SALT)
    ds = dcmread(path)
    assert volume.data.shape == (10, 10, 15)
    np.testing.assert_allclose(np.sqrt((volume.affine[:3, :3] ** 2).sum(axis=0)), [10, 10, 5])
    expected = ds.pixel_array.transpose(2, 1, 0) * float(ds.DoseGridScaling)
    np.testing.assert_allclose(volume.data, expected, rtol=1e-6)


def test_it_refuses_a_transfer_syntax_it_cannot_decode():
    """Source: pydicom's shipped MR_small_jpeg_ls_lossless.dcm; pydicom 3.0.2 has no JPEG-LS
    decoder without gdcm, pylibjpeg or pyjpegls, none installed here; the syntax is named."""
    plan = group_series([read_header(pydicom_file("MR_small_jpeg_ls_lossless.dcm"))])[0]
    expected = r"JPEG-LS Lossless .*1\.2\.840\.10008\.1\.2\.4\.80"
    with pytest.raises(UnsupportedImageError, match=expected):
        read_series(plan, uid_salt=SALT)


def test_it_refuses_truncated_pixel_data():
    """Source: pydicom's shipped MR_truncated.dcm (pixel data 62 bytes short of 64x64x2)."""
    plan = group_series([read_header(pydicom_file("MR_truncated.dcm"))])[0]
    with pytest.raises(UnreadableFileError, match=r"MR_truncated\.dcm: .*8130 of 8192"):
        read_series(plan, uid_salt=SALT)


def test_it_refuses_the_irregular_pydicom_series():
    """Source: pydicom's shipped dicomdirtests MR700 (7 slices in different orientations) and
    77654033/CT2 (4 slices with a large jump), called irregular in the stack notes."""
    with pytest.raises(GeometryError, match=r"mixed orientations within the series: 7 different"):
        _read_folder(os.path.dirname(pydicom_file("dicomdirtests/98892003/MR700/4467")))
    with pytest.raises(GeometryError, match=r"gap in the slice positions"):
        _read_folder(os.path.dirname(pydicom_file("dicomdirtests/77654033/CT2/17106")))


def _faulty(tmp_path, hook, data=None):
    write_series(phantom() if data is None else data, oblique_affine(), tmp_path, hook=hook)
    return tmp_path


def test_it_refuses_mixed_orientations(tmp_path):
    """Common practice: one stack has one orientation; the count of distinct IOPs is quoted."""

    def tilt(k, ds):
        if k == 4:
            ds.ImageOrientationPatient = [1, 0, 0, 0, 0.995037, -0.0995037]

    with pytest.raises(GeometryError, match=r"mixed orientations.*2 different"):
        _read_folder(_faulty(tmp_path, tilt))


def test_it_refuses_non_uniform_spacing_and_prints_the_spacings(tmp_path):
    """Common practice: slice steps must agree within the tolerance; steps seen are listed."""
    normal = np.cross(*np.split(np.array(_iop()), 2))

    def jitter(k, ds):
        if k == 3:
            ds.ImagePositionPatient = list(np.array(ds.ImagePositionPatient, float) + 0.4 * normal)

    expected = r"non-uniform slice spacing .*spacings seen \[2\.1, 2\.5, 2\.9\]"
    with pytest.raises(GeometryError, match=expected):
        _read_folder(_faulty(tmp_path, jitter))


def _iop():
    from studies.imaging.dicom_writer import lps_geometry

    return list(lps_geometry(oblique_affine())["orientation"])


def test_it_refuses_a_missing_slice(tmp_path):
    """Common practice: a step of twice the usual spacing means a slice is missing."""
    write_series(phantom(), oblique_affine(), tmp_path)
    os.remove(tmp_path / "slice_0004.dcm")
    with pytest.raises(GeometryError, match=r"gap .*5\.0000 mm.*2\.5000 mm .*1 missing slice"):
        _read_folder(tmp_path)


def test_it_refuses_duplicate_positions(tmp_path):
    """Common practice: two slices at one position (echoes, phases) cannot form one stack."""

    from studies.imaging.dicom_writer import lps_geometry

    origin = list(lps_geometry(oblique_affine())["origin"])

    def same(k, ds):
        if k == 5:
            ds.ImagePositionPatient = origin

    with pytest.raises(GeometryError, match=r"duplicate slice positions"):
        _read_folder(_faulty(tmp_path, same))


def test_it_refuses_gantry_tilt(tmp_path):
    """Source: PS3.3 C.7.6.2.1.1; with gantry tilt the positions step off the normal
    (check-values 9a: |dIPP| equals the spacing only without shear); the angle is quoted."""
    affine = oblique_affine()
    tilted = affine.copy()
    tilted[:3, 2] += 0.3 * affine[:3, 1] / np.linalg.norm(affine[:3, 1])
    write_series(phantom(), tilted, tmp_path)
    with pytest.raises(GeometryError, match=r"off the slice normal .*degrees\): gantry tilt"):
        _read_folder(tmp_path)


def test_it_refuses_a_non_orthogonal_orientation(tmp_path):
    """Common practice: IOP must be two orthogonal unit vectors; otherwise the grid is sheared."""

    def shear(k, ds):
        ds.ImageOrientationPatient = [1, 0, 0, 0.2, 0.979796, 0]

    with pytest.raises(GeometryError, match=r"not two orthogonal unit vectors .*X\.Y = 0\.2"):
        _read_folder(_faulty(tmp_path, shear))


def test_it_lists_several_series_when_none_was_chosen(tmp_path):
    """Common practice: an upload with two series asks which one; the listing gives UIDs,
    descriptions and slice counts, and choosing by number or UID works."""
    write_series(
        phantom(), oblique_affine(), tmp_path, attributes={"SeriesDescription": "first stack"}
    )
    write_series(
        phantom((8, 8, 3)),
        oblique_affine(),
        tmp_path,
        names=[f"other_{k}.dcm" for k in range(3)],
        attributes={"SeriesDescription": "second stack"},
    )
    expected = (
        r"found 2 DICOM series(.|\n)*'first stack' \(CT, 9 slices\)"
        r"(.|\n)*'second stack' \(CT, 3 slices\)"
    )
    with pytest.raises(SeriesChoiceError, match=expected):
        _read_folder(tmp_path)
    assert _read_folder(tmp_path, series="2").data.shape == (8, 8, 3)
    uid = dcmread(tmp_path / "other_0.dcm").SeriesInstanceUID
    assert _read_folder(tmp_path, series=uid).data.shape == (8, 8, 3)


def test_it_refuses_burned_in_annotation_unless_allowed(tmp_path):
    """Source: PS3.15 E.3.1 (Burned In Annotation (0028,0301)); YES is refused unless the
    import explicitly allows it."""
    write_series(phantom(), oblique_affine(), tmp_path, attributes={"BurnedInAnnotation": "YES"})
    with pytest.raises(BurnedInAnnotationError, match=r"Burned In Annotation is YES"):
        _read_folder(tmp_path)
    assert _read_folder(tmp_path, allow_burned_in=True).data.shape == phantom().shape


def test_it_refuses_a_file_cut_inside_its_pixel_data(tmp_path):
    """Common practice: a file cut short must not import with garbage or zeros."""
    paths = write_series(phantom(), oblique_affine(), tmp_path)
    raw = paths[2].read_bytes()
    paths[2].write_bytes(raw[: len(raw) - 100])
    with pytest.raises(UnreadableFileError, match=r"slice_0002\.dcm.*truncated"):
        _read_folder(tmp_path)
