"""De-identification: PS3.15 Annex E Basic Profile actions, and nothing identifying stored."""

from __future__ import annotations

import json

import numpy as np
import pytest
from pydicom import dcmread
from pydicom.dataset import Dataset

from studies.imaging.deid import (
    BASIC_PROFILE,
    apply_basic_profile,
    safe_acquisition,
    series_uid_hash,
)
from studies.imaging.dicom import read_series
from studies.imaging.dicom_headers import choose_series, group_series, read_header
from studies.imaging.dicom_writer import write_series
from studies.imaging.storage import write_case_files
from tests.imaging.phantoms import identifying_attributes, oblique_affine, phantom

SALT = b"deid-test-salt"


def _dataset_with_everything() -> tuple[Dataset, list[str]]:
    values, needles = identifying_attributes()
    ds = Dataset()
    for keyword, value in values.items():
        setattr(ds, keyword, value)
    ds.SOPInstanceUID = "1.2.3.4.5.6.7.8.9.1000"
    needles.append(ds.SOPInstanceUID)
    ds.add_new(0x00091010, "LO", "Privatewick note")  # private (odd group)
    ds.add_new(0x60003000, "OW", b"\x01\x02" * 8)  # overlay data
    ds.Modality = "CT"
    ds.SliceThickness = "2.5"
    return ds, [*needles, "Privatewick note"]


def _all_text(ds: Dataset) -> str:
    parts = []
    ds.walk(lambda d, element: parts.append(str(element.value)))
    return "\n".join(parts)


def test_it_applies_every_basic_profile_action():
    """Source: DICOM PS3.15 Annex E Table E.1-1, Basic Profile column, as listed in
    check-values 9b: X removes, Z empties, U replaces UIDs; private attributes and overlay
    data are removed; Patient Identity Removed becomes YES (PS3.15 E.1.1, from memory)."""
    ds, needles = _dataset_with_everything()
    apply_basic_profile(ds, SALT)
    text = _all_text(ds)
    for needle in needles:
        assert needle not in text, needle
    for tag, action in BASIC_PROFILE.items():
        if tag >> 16 == 0x0002:
            continue
        if action == "X":
            assert tag not in ds
        elif action == "Z":
            assert tag in ds and ds[tag].value in ("", None)
        elif action == "U":
            assert tag in ds and len(str(ds[tag].value)) > 10  # replaced (needles gone), not empty
    assert 0x00091010 not in ds and 0x60003000 not in ds
    assert ds.PatientIdentityRemoved == "YES"
    assert ds.Modality == "CT" and float(ds.SliceThickness) == 2.5


def test_it_replaces_a_uid_the_same_way_in_every_instance():
    """Source: PS3.15 Annex E action U: the new UID is internally consistent within the set
    of instances, so two datasets sharing a UID still share the replacement."""
    a, b = Dataset(), Dataset()
    a.SeriesInstanceUID = b.SeriesInstanceUID = "1.2.3.4.99"
    apply_basic_profile(a, SALT)
    apply_basic_profile(b, SALT)
    assert a.SeriesInstanceUID == b.SeriesInstanceUID != "1.2.3.4.99"


def test_it_keeps_only_whitelisted_acquisition_facts():
    """Common practice: keep what the study needs (modality, slice thickness, field
    strength) and drop free text, even in kept attributes that hold non-code values."""
    ds, _ = _dataset_with_everything()
    ds.MagneticFieldStrength = "3"
    ds.MRAcquisitionType = "3D"
    ds.ScanningSequence = ["GR", "IR"]
    kept = safe_acquisition(ds)
    assert kept == {
        "Modality": "CT",
        "SliceThickness": 2.5,
        "MagneticFieldStrength": 3.0,
        "MRAcquisitionType": "3D",
        "ScanningSequence": ["GR", "IR"],
    }


def test_it_hashes_the_series_uid_with_a_salt():
    """Source: RFC 2104 HMAC with SHA-256 (Python hmac); the same UID hashes alike under one
    salt and differently under another, and the UID itself is not in the hash."""
    uid = "1.2.826.0.1.3680043.8.498.1"
    one = series_uid_hash(uid, b"salt-a")
    assert one == series_uid_hash(uid, b"salt-a")
    assert one != series_uid_hash(uid, b"salt-b")
    assert len(one) == 64 and uid not in one
    with pytest.raises(ValueError, match="non-empty salt"):
        series_uid_hash(uid, b"")


def test_it_stores_none_of_the_identifying_values(tmp_path):
    """Issue requirement (PS3.15 Annex E Basic Profile): a series carrying a value in every
    profile attribute is read and stored; none of those values, nor the SOP Instance UIDs,
    occurs in the stored files' bytes or in the provenance and volume fields."""
    values, needles = identifying_attributes()
    source = tmp_path / "in"
    source.mkdir()
    paths = write_series(
        phantom(),
        oblique_affine(),
        source,
        attributes=values,
        names=[f"Quorvath_Ilsabet_{k}.dcm" for k in range(9)],
    )
    needles += [str(dcmread(p).SOPInstanceUID) for p in paths]
    needles.append("Quorvath_Ilsabet")
    plan = choose_series(group_series([read_header(p) for p in paths]))
    volume = read_series(plan, uid_salt=SALT)
    data_dir = tmp_path / "data"
    stored = write_case_files(data_dir, "case-0001", volume)
    blobs = [p.read_bytes() for p in data_dir.rglob("*") if p.is_file()]
    assert len(blobs) >= 2
    blobs.append(json.dumps(volume.provenance).encode())
    blobs.append(json.dumps(stored.__dict__, default=str).encode())
    blobs.append(f"{volume.modality} {volume.checksum}".encode())
    for needle in needles:
        encoded = needle.encode()
        assert not any(encoded in blob for blob in blobs), needle
    np.testing.assert_allclose(volume.affine, oblique_affine(), atol=1e-4)
