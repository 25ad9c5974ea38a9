"""Safe zip extraction: unsafe names and zip bombs are refused and nothing is left behind."""

from __future__ import annotations

import zipfile

import pytest

from studies.imaging.archive import ArchiveLimits, extract_zip, safe_members
from studies.imaging.errors import ArchiveError, EmptySourceError


def _zip(path, members, compression=zipfile.ZIP_DEFLATED):
    with zipfile.ZipFile(path, "w", compression=compression) as archive:
        for name, payload in members.items():
            archive.writestr(name, payload)
    return path


@pytest.mark.parametrize("name", ["/etc/cron.d/job", "C:/temp/x.dcm", "\\\\server\\share\\x"])
def test_it_refuses_absolute_member_paths(tmp_path, name):
    """Common practice (zip-slip): members with absolute paths or drive letters are refused
    before anything is written."""
    archive = _zip(tmp_path / "abs.zip", {"ok.dcm": b"x" * 10, name: b"y" * 10})
    with pytest.raises(ArchiveError, match="absolute path"):
        extract_zip(archive, tmp_path / "out", ArchiveLimits())
    assert not (tmp_path / "out").exists()


def test_it_refuses_dot_dot_members(tmp_path):
    """Common practice (zip-slip): a '..' component could write outside the folder."""
    archive = _zip(tmp_path / "dots.zip", {"a/../../evil.dcm": b"z" * 10})
    with pytest.raises(ArchiveError, match=r"contains '\.\.'"):
        extract_zip(archive, tmp_path / "out", ArchiveLimits())
    assert not (tmp_path / "evil.dcm").exists() and not (tmp_path / "out").exists()


def test_it_refuses_a_high_compression_ratio(tmp_path):
    """Common practice (zip bomb): 4 MiB of zeros deflate about 1000-fold; the ratio found
    and the limit are quoted."""
    archive = _zip(tmp_path / "bomb.zip", {"zeros.bin": bytes(4 * 1024 * 1024)})
    with pytest.raises(ArchiveError, match=r"expands .* times, more than the limit of 100"):
        safe_members(archive, ArchiveLimits(max_ratio=100))


def test_it_refuses_too_many_files_and_too_many_bytes(tmp_path):
    """Common practice: limits on member count and total uncompressed size, configurable."""
    members = {f"f{n}.dcm": bytes(range(256)) * 4 for n in range(12)}
    archive = _zip(tmp_path / "many.zip", members, compression=zipfile.ZIP_STORED)
    with pytest.raises(ArchiveError, match=r"12 files, more than the limit of 10"):
        safe_members(archive, ArchiveLimits(max_files=10))
    with pytest.raises(
        ArchiveError, match=r"12288 bytes uncompressed, more than the limit of 5000"
    ):
        safe_members(archive, ArchiveLimits(max_total_bytes=5000))
    assert len(extract_zip(archive, tmp_path / "out", ArchiveLimits())) == 12


def test_it_refuses_a_corrupt_or_empty_archive(tmp_path):
    """Common practice: a damaged zip or one without files gets a clear refusal."""
    good = _zip(tmp_path / "good.zip", {"a.dcm": bytes(range(256)) * 40})
    broken = tmp_path / "broken.zip"
    broken.write_bytes(good.read_bytes()[:200])
    with pytest.raises(ArchiveError, match=r"broken\.zip: not a readable zip"):
        safe_members(broken, ArchiveLimits())
    empty = _zip(tmp_path / "empty.zip", {"folder/": b""})
    with pytest.raises(EmptySourceError, match="holds no files"):
        safe_members(empty, ArchiveLimits())


def test_it_stops_when_the_bytes_do_not_match_the_header(tmp_path):
    """Common practice: sizes in a zip header can lie; a member whose data disagree with its
    header (here a flipped byte, so the CRC fails) is refused and the folder removed."""
    payload = bytes(range(256)) * 64
    good = _zip(tmp_path / "good.zip", {"a.dcm": payload}, compression=zipfile.ZIP_STORED)
    raw = bytearray(good.read_bytes())
    at = raw.index(payload[:64]) + 100
    raw[at] ^= 0xFF
    bad = tmp_path / "bad.zip"
    bad.write_bytes(bytes(raw))
    with pytest.raises(ArchiveError, match="corrupt"):
        extract_zip(bad, tmp_path / "out", ArchiveLimits())
    assert not (tmp_path / "out").exists()
