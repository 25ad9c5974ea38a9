"""Safe zip handling: refuse unsafe member names and zip bombs before and while extracting.

Checks before any byte is written: member count, declared total uncompressed size,
declared compression ratio (per member and overall), absolute paths, drive letters,
'..' components, symbolic links and encrypted members. While extracting, the bytes
actually written are counted, so an archive whose headers lie about sizes is stopped at
the same limits.
"""

from __future__ import annotations

import shutil
import stat
import zipfile
import zlib
from dataclasses import dataclass
from pathlib import Path, PurePosixPath

from .errors import ArchiveError, EmptySourceError

__all__ = ["ArchiveLimits", "extract_zip", "is_zip", "safe_members"]

_CHUNK = 1 << 20


@dataclass(frozen=True)
class ArchiveLimits:
    """Limits for one archive (all configurable).

    Attributes
    ----------
    max_total_bytes : int
        Largest total uncompressed size.
    max_files : int
        Largest number of members (folders excluded).
    max_ratio : float
        Largest uncompressed/compressed size ratio, per member and overall.
    """

    max_total_bytes: int = 8 * 1024**3
    max_files: int = 20_000
    max_ratio: float = 200.0


def is_zip(path: Path) -> bool:
    """True when the file starts like a zip archive (local header or empty-archive marker)."""
    try:
        with open(path, "rb") as handle:
            return handle.read(4) in (b"PK\x03\x04", b"PK\x05\x06")
    except OSError:
        return False


def _check_name(name: str, archive: str) -> PurePosixPath:
    normal = name.replace("\\", "/")
    if normal.startswith("/") or (len(normal) > 1 and normal[1] == ":"):
        raise ArchiveError(f"{archive}: member {name!r} has an absolute path; refusing the archive")
    parts = PurePosixPath(normal).parts
    if ".." in parts:
        raise ArchiveError(f"{archive}: member {name!r} contains '..'; refusing the archive")
    return PurePosixPath(*[p for p in parts if p not in ("", ".")])


def _ratio(size: int, compressed: int) -> float:
    return size / max(compressed, 1)


def safe_members(path: Path, limits: ArchiveLimits) -> list[zipfile.ZipInfo]:
    """The file members of a zip after checking names and declared sizes.

    Raises
    ------
    ArchiveError
        Corrupt zip, unsafe name, link, encryption, or a limit exceeded (the message quotes
        the value found and the limit).
    EmptySourceError
        No file members.
    """
    name = Path(path).name
    try:
        with zipfile.ZipFile(path) as archive:
            infos = archive.infolist()
    except (zipfile.BadZipFile, OSError, ValueError) as exc:
        raise ArchiveError(f"{name}: not a readable zip archive ({exc})") from exc
    files = []
    for info in infos:
        _check_name(info.filename, name)
        if stat.S_ISLNK(info.external_attr >> 16):
            raise ArchiveError(f"{name}: member {info.filename!r} is a symbolic link; refusing")
        if info.flag_bits & 0x1:
            raise ArchiveError(f"{name}: member {info.filename!r} is encrypted; refusing")
        if not info.is_dir():
            files.append(info)
    if not files:
        raise EmptySourceError(f"{name}: the archive holds no files")
    if len(files) > limits.max_files:
        raise ArchiveError(f"{name}: {len(files)} files, more than the limit of {limits.max_files}")
    total = sum(i.file_size for i in files)
    if total > limits.max_total_bytes:
        raise ArchiveError(
            f"{name}: {total} bytes uncompressed, more than the limit of {limits.max_total_bytes}"
        )
    for info in files:
        if _ratio(info.file_size, info.compress_size) > limits.max_ratio:
            raise ArchiveError(
                f"{name}: member {info.filename!r} expands {info.file_size} / "
                f"{info.compress_size} = {_ratio(info.file_size, info.compress_size):.0f} times, "
                f"more than the limit of {limits.max_ratio:g} (zip bomb?)"
            )
    overall = _ratio(total, sum(i.compress_size for i in files))
    if overall > limits.max_ratio:
        raise ArchiveError(
            f"{name}: expands {overall:.0f} times overall, more than the limit of "
            f"{limits.max_ratio:g} (zip bomb?)"
        )
    return files


def extract_zip(path: Path, dest: Path, limits: ArchiveLimits) -> list[Path]:
    """Extract a checked zip into `dest` (which must be empty or absent).

    Parameters
    ----------
    path : Path
        The archive.
    dest : Path
        Target folder; on any error it is removed again.
    limits : ArchiveLimits
        Applied to the declared sizes first and to the bytes actually written.

    Returns
    -------
    list of Path
        The extracted files.
    """
    name = Path(path).name
    members = safe_members(path, limits)
    dest = Path(dest)
    dest.mkdir(parents=True, exist_ok=True)
    written_total = 0
    out_paths = []
    try:
        with zipfile.ZipFile(path) as archive:
            for info in members:
                target = dest / _check_name(info.filename, name)
                if dest.resolve() not in target.resolve().parents:
                    raise ArchiveError(f"{name}: member {info.filename!r} escapes the folder")
                target.parent.mkdir(parents=True, exist_ok=True)
                written = 0
                with archive.open(info) as source, open(target, "wb") as sink:
                    while chunk := source.read(_CHUNK):
                        written += len(chunk)
                        written_total += len(chunk)
                        if written > info.file_size or written_total > limits.max_total_bytes:
                            raise ArchiveError(
                                f"{name}: member {info.filename!r} expands beyond its declared "
                                f"size or the total limit of {limits.max_total_bytes} bytes"
                            )
                        sink.write(chunk)
                out_paths.append(target)
    except (zipfile.BadZipFile, zlib.error, EOFError, OSError, ValueError) as exc:
        shutil.rmtree(dest, ignore_errors=True)
        if isinstance(exc, ArchiveError):
            raise
        raise ArchiveError(f"{name}: the archive is corrupt ({exc})") from exc
    return out_paths
