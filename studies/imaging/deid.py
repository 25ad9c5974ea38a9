"""De-identification: the DICOM PS3.15 Annex E Basic Application Level Confidentiality Profile.

cairn never stores DICOM files. An import keeps voxels, geometry and the short list of
acquisition facts in `KEPT_ATTRIBUTES` (a whitelist), plus a salted hash of the Series
Instance UID for duplicate detection; everything else in the header is dropped. Datasets
that stay in memory while a series is read can be put through `apply_basic_profile`,
which applies the profile's actions to the attributes listed in `BASIC_PROFILE`.

References
----------
1. NEMA. DICOM PS3.15, Security and System Management Profiles, Annex E, Table E.1-1
   (Basic Profile column), read through the innolitics/dicom-standard extraction
   ``standard/confidentiality_profile_attributes.json``; edition as summarised in the
   project's check-values section 9b.
2. NEMA. DICOM PS3.15, E.3.1 Clean Pixel Data Option (Burned In Annotation).
"""

from __future__ import annotations

import hashlib
import hmac
import re
from collections.abc import Callable

from pydicom.dataset import Dataset
from pydicom.uid import generate_uid

__all__ = [
    "BASIC_PROFILE",
    "DEID_METHOD",
    "KEPT_ATTRIBUTES",
    "apply_basic_profile",
    "burned_in_status",
    "safe_acquisition",
    "series_uid_hash",
]

DEID_METHOD = "DICOM PS3.15 Annex E Basic Application Level Confidentiality Profile"

# (tag, action) from Table E.1-1, Basic Profile column. For a compound action (X/Z, X/D,
# Z/D, X/Z/D, X/Z/U*) the first one is used: cairn writes no DICOM objects, so no IOD
# type forces the later one (PS3.15 E.1.1 action-code rules).
BASIC_PROFILE: dict[int, str] = {
    0x00100010: "Z",  # Patient's Name
    0x00100020: "Z",  # Patient ID
    0x00100030: "Z",  # Patient's Birth Date
    0x00100032: "X",  # Patient's Birth Time
    0x00100040: "Z",  # Patient's Sex
    0x00101010: "X",  # Patient's Age
    0x00101020: "X",  # Patient's Size
    0x00101030: "X",  # Patient's Weight
    0x00101000: "X",  # Other Patient IDs
    0x00101002: "X",  # Other Patient IDs Sequence
    0x00101001: "X",  # Other Patient Names
    0x00101040: "X",  # Patient's Address
    0x00102154: "X",  # Patient's Telephone Numbers
    0x00104000: "X",  # Patient Comments
    0x00080050: "Z",  # Accession Number
    0x00080020: "Z",  # Study Date
    0x00080030: "Z",  # Study Time
    0x00080021: "X",  # Series Date
    0x00080031: "X",  # Series Time
    0x00080022: "X",  # Acquisition Date
    0x00080032: "X",  # Acquisition Time
    0x0008002A: "X",  # Acquisition DateTime
    0x00080023: "Z",  # Content Date
    0x00080033: "Z",  # Content Time
    0x00080080: "X",  # Institution Name
    0x00080081: "X",  # Institution Address
    0x00081040: "X",  # Institutional Department Name
    0x00080090: "Z",  # Referring Physician's Name
    0x00081048: "X",  # Physician(s) of Record
    0x00081050: "X",  # Performing Physician's Name
    0x00081060: "X",  # Name of Physician(s) Reading Study
    0x00081070: "X",  # Operators' Name
    0x00081010: "X",  # Station Name
    0x00181000: "X",  # Device Serial Number
    0x00200010: "Z",  # Study ID
    0x00081030: "X",  # Study Description
    0x0008103E: "X",  # Series Description
    0x00181030: "X",  # Protocol Name
    0x00204000: "X",  # Image Comments
    0x0020000D: "U",  # Study Instance UID
    0x0020000E: "U",  # Series Instance UID
    0x00080018: "U",  # SOP Instance UID
    0x00020003: "U",  # Media Storage SOP Instance UID
    0x00200052: "U",  # Frame of Reference UID
    0x00200200: "U",  # Synchronization Frame of Reference UID
    0x00081155: "U",  # Referenced SOP Instance UID
    0x00081140: "X",  # Referenced Image Sequence
    0x00082112: "X",  # Source Image Sequence
    0x00880200: "X",  # Icon Image Sequence
}

# What an import keeps: acquisition facts the study needs (whitelist). Numbers are kept
# as floats; code strings only when they look like codes.
KEPT_ATTRIBUTES: dict[str, str] = {
    "Modality": "code",
    "SliceThickness": "number",
    "SpacingBetweenSlices": "number",
    "MagneticFieldStrength": "number",
    "KVP": "number",
    "RepetitionTime": "number",
    "EchoTime": "number",
    "InversionTime": "number",
    "FlipAngle": "number",
    "MRAcquisitionType": "code",
    "ScanningSequence": "code",
    "PhotometricInterpretation": "code",
    "BitsStored": "number",
}
TextGetter = Callable[[Dataset, str], "str | None"]
_CODE = re.compile(r"^[A-Z0-9_ ]{1,16}$")


def series_uid_hash(series_uid: str, salt: bytes) -> str:
    """Salted hash of a Series Instance UID: HMAC-SHA256, hex (64 characters).

    The salt is a per-installation secret, so the hash finds re-imports of the same series
    without being a lookup key for anyone who knows the UID.
    """
    if not salt:
        raise ValueError("a non-empty salt is required to hash a Series Instance UID")
    return hmac.new(salt, series_uid.strip().encode("ascii", "replace"), hashlib.sha256).hexdigest()


def _as_code(value: object) -> str | list[str] | None:
    if isinstance(value, (list, tuple)) or type(value).__name__ == "MultiValue":
        codes = [str(v) for v in value if _CODE.match(str(v))]
        return codes or None
    text = str(value)
    return text if _CODE.match(text) else None


def safe_acquisition(ds: Dataset, text_of: TextGetter | None = None) -> dict:
    """The whitelisted acquisition facts of a header, as plain JSON-ready values.

    Parameters
    ----------
    ds : pydicom Dataset
        One instance's header.
    text_of : callable(ds, keyword) -> str or None, optional
        Fast reader of an attribute's raw text (backslash-separated values); by default
        values are read through pydicom.

    Returns
    -------
    dict
        Keyword to float, code string or list of code strings, for the keywords in
        `KEPT_ATTRIBUTES` that are present and well formed. Anything else is dropped.
    """
    kept: dict = {}
    for keyword, kind in KEPT_ATTRIBUTES.items():
        if text_of is not None:
            text = text_of(ds, keyword)
            value = None if text is None else (text.split("\\") if "\\" in text else text)
        else:
            value = ds.get(keyword)
        if value is None or value == "":
            continue
        if kind == "number":
            try:
                number = float(value)
            except (TypeError, ValueError):
                continue
            kept[keyword] = number
        else:
            code = _as_code(value)
            if code is not None:
                kept[keyword] = code
    return kept


def burned_in_status(ds: Dataset) -> str:
    """'YES', 'NO' or 'ABSENT' for Burned In Annotation (0028,0301)."""
    value = str(ds.get("BurnedInAnnotation", "")).strip().upper()
    return value if value in ("YES", "NO") else "ABSENT"


def _replace_uid(old: str, salt: bytes) -> str:
    # Same old UID and salt give the same new UID: consistent within the set (action U).
    return generate_uid(entropy_srcs=[salt.hex(), str(old)])


def apply_basic_profile(ds: Dataset, salt: bytes) -> Dataset:
    """Apply the Basic Profile actions to `ds` in place, recursing into sequences.

    Parameters
    ----------
    ds : pydicom Dataset
        Modified in place.
    salt : bytes
        Secret mixed into replacement UIDs.

    Returns
    -------
    Dataset
        The same object: listed attributes removed (X), emptied (Z) or given new UIDs (U);
        private attributes (odd groups) and overlay data (60xx,3000) removed; Patient
        Identity Removed set to YES and De-identification Method filled in.
    """
    _clean(ds, salt)
    meta = getattr(ds, "file_meta", None)
    if meta is not None and "MediaStorageSOPInstanceUID" in meta:
        meta.MediaStorageSOPInstanceUID = _replace_uid(meta.MediaStorageSOPInstanceUID, salt)
    ds.PatientIdentityRemoved = "YES"
    ds.DeidentificationMethod = DEID_METHOD
    return ds


def _clean(ds: Dataset, salt: bytes) -> None:
    for element in list(ds):
        tag = int(element.tag)
        group = tag >> 16
        if group % 2 == 1 or (0x6000 <= group <= 0x601E and tag & 0xFFFF == 0x3000):
            del ds[element.tag]
            continue
        action = BASIC_PROFILE.get(tag)
        if action == "X":
            del ds[element.tag]
        elif action == "Z":
            element.value = [] if element.VR == "SQ" else ""
        elif action == "U" and element.value:
            element.value = _replace_uid(element.value, salt)
        elif element.VR == "SQ" and element.value:
            for item in element.value:
                _clean(item, salt)
