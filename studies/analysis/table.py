"""The long placements table: schema, validation and the dense array form.

The input of every analysis is one long table with a row per placement:

========== =============================================================
column     meaning
========== =============================================================
case       case identifier (any hashable, non-empty)
landmark   landmark code
reader     reader identifier
read       1 for the first read, 2 for a repeat read
x_mm       world x, millimetres, RAS+ (empty when the point is absent)
y_mm       world y, millimetres, RAS+ (empty when absent)
z_mm       world z, millimetres, RAS+ (empty when absent)
absent     1 when the reader marked the landmark "not visible", else 0
placed_at  ISO 8601 time stamp of the placement (may be empty)
========== =============================================================

:func:`validate_placements` checks the table and returns a clean copy;
:func:`require_repeat_reads` additionally refuses a reader without any repeat read, for
designs in which every reader reads some cases twice;
:func:`to_dense` turns it into arrays indexed (read, case, landmark, reader).
Every error is a :class:`PlacementTableError` that names the row (1-based
data row of the CSV file, header excluded) and the column.
"""

from __future__ import annotations

from collections.abc import Hashable
from dataclasses import dataclass

import numpy as np
import pandas as pd

__all__ = [
    "COORDINATE_COLUMNS",
    "REQUIRED_COLUMNS",
    "DenseStudy",
    "PlacementTableError",
    "read_placements_csv",
    "require_repeat_reads",
    "to_dense",
    "validate_placements",
]

COORDINATE_COLUMNS: tuple[str, str, str] = ("x_mm", "y_mm", "z_mm")
REQUIRED_COLUMNS: tuple[str, ...] = (
    "case", "landmark", "reader", "read", *COORDINATE_COLUMNS, "absent", "placed_at",
)
ID_COLUMNS: tuple[str, str, str] = ("case", "landmark", "reader")
_TRUE = {"1", "true", "yes"}
_FALSE = {"0", "false", "no"}


class PlacementTableError(ValueError):
    """Invalid placements table; ``row`` is the 1-based data row, ``column`` its column."""

    def __init__(self, message: str, row: int | None = None, column: str | None = None):
        where = []
        if row is not None:
            where.append(f"row {row} (1-based data row, header not counted)")
        if column is not None:
            where.append(f"column {column!r}")
        prefix = ", ".join(where)
        super().__init__(f"{prefix}: {message}" if prefix else message)
        self.row = row
        self.column = column


def read_placements_csv(path: str) -> pd.DataFrame:
    """Read a placements CSV file as text and validate it.

    Parameters
    ----------
    path : str
        CSV file with the columns of :data:`REQUIRED_COLUMNS` (more are ignored).

    Returns
    -------
    pandas.DataFrame
        The validated table (see :func:`validate_placements`).
    """
    try:
        raw = pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True)
    except (OSError, pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise PlacementTableError(f"cannot read {path!r}: {exc}") from exc
    return validate_placements(raw)


def _bad(mask: np.ndarray) -> int | None:
    """Position of the first True in ``mask``, or None."""
    hits = np.flatnonzero(mask)
    return int(hits[0]) if hits.size else None


def _as_text(col: pd.Series) -> pd.Series:
    return col.astype(object).where(col.notna(), "").astype(str).str.strip()


def _numeric(df: pd.DataFrame, name: str) -> np.ndarray:
    """Column as float64 with NaN for empty cells; raise on non-numeric or non-finite text."""
    col = df[name]
    if pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col):
        return col.to_numpy(dtype=np.float64, na_value=np.nan)
    values = pd.to_numeric(col, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan,
                                                          copy=True)
    retry = np.flatnonzero(~np.isfinite(values) & col.notna().to_numpy())
    if retry.size:  # blanks around a number, empty cells, or bad text: look closer
        text = _as_text(col.iloc[retry])
        again = pd.to_numeric(text.where(text != "", None), errors="coerce").to_numpy(
            dtype=np.float64, na_value=np.nan)
        values[retry] = again
        special = text.str.lower().isin(["nan", "inf", "-inf", "+inf", "infinity", "-infinity"])
        bad = _bad(np.isnan(again) & (text != "").to_numpy() & ~special.to_numpy())
        if bad is not None:
            raise PlacementTableError(f"not a number: {text.iloc[bad]!r}", int(retry[bad]) + 1,
                                      name)
        bad = _bad((text != "").to_numpy() & ~np.isfinite(again))
        if bad is not None:
            raise PlacementTableError(f"not a finite number: {text.iloc[bad]!r}",
                                      int(retry[bad]) + 1, name)
    return values


def _flag(df: pd.DataFrame) -> np.ndarray:
    col = df["absent"]
    if pd.api.types.is_bool_dtype(col):
        return col.to_numpy(dtype=bool)
    if pd.api.types.is_numeric_dtype(col):
        values = col.to_numpy(dtype=np.float64, na_value=np.nan)
        row = _bad(~np.isin(values, [0.0, 1.0]))
        if row is not None:
            raise PlacementTableError(f"must be 0 or 1, got {col.iloc[row]!r}", row + 1, "absent")
        return values == 1.0
    text = _as_text(col).str.lower()
    text = text.where(~text.isin(["1.0", "0.0"]), text.str[0])
    row = _bad(~text.isin(_TRUE | _FALSE).to_numpy())
    if row is not None:
        raise PlacementTableError(f"must be 0 or 1, got {col.iloc[row]!r}", row + 1, "absent")
    return text.isin(_TRUE).to_numpy()


def _factorize(values: pd.Series) -> tuple[np.ndarray, pd.Index]:
    """Integer codes (-1 for missing) and sorted unique values."""
    try:
        codes, uniques = pd.factorize(values, sort=True)
    except TypeError:  # mixed types that do not sort together
        codes, uniques = pd.factorize(values.astype(str), sort=True)
    return codes.astype(np.int64), pd.Index(uniques)


def _ids(df: pd.DataFrame, name: str) -> pd.Categorical:
    """Identifier column as a categorical with sorted categories, text stripped."""
    col = df[name]
    if isinstance(col.dtype, pd.CategoricalDtype):
        col = col.astype(object)
    codes, uniques = _factorize(col)
    if uniques.dtype == object or pd.api.types.is_string_dtype(uniques.dtype):
        stripped = pd.Series(uniques.astype(str), dtype=object).str.strip()
        remap, uniques = _factorize(stripped)
        codes = np.where(codes >= 0, remap[np.maximum(codes, 0)], -1)
        empty = np.flatnonzero(uniques == "")
        if empty.size:
            codes = np.where(codes == empty[0], -1, codes)
            uniques = uniques.delete(empty[0])
            codes = np.where(codes > empty[0], codes - 1, codes)
    row = _bad(codes < 0)
    if row is not None:
        raise PlacementTableError("empty identifier", row + 1, name)
    return pd.Categorical.from_codes(codes, categories=uniques)


def _times(df: pd.DataFrame) -> pd.Series:
    col = df["placed_at"]
    if isinstance(col.dtype, pd.DatetimeTZDtype) or pd.api.types.is_datetime64_dtype(col):
        return pd.to_datetime(col, utc=True).reset_index(drop=True)
    times = pd.to_datetime(col, utc=True, errors="coerce", format="ISO8601")
    retry = np.flatnonzero((times.isna() & col.notna()).to_numpy())
    if retry.size:  # blanks, empty cells or bad text: look closer
        text = _as_text(col.iloc[retry])
        again = pd.to_datetime(text.where(text != "", None), utc=True, errors="coerce",
                               format="ISO8601")
        bad = _bad((again.isna() & (text != "")).to_numpy())
        if bad is not None:
            raise PlacementTableError(f"not an ISO 8601 time stamp: {text.iloc[bad]!r}",
                                      int(retry[bad]) + 1, "placed_at")
        times.iloc[retry] = again.to_numpy()
    return times.reset_index(drop=True)


def _check_coordinates(xyz: np.ndarray, absent: np.ndarray) -> None:
    for axis, name in enumerate(COORDINATE_COLUMNS):
        row = _bad(~absent & np.isnan(xyz[:, axis]))
        if row is not None:
            raise PlacementTableError(
                "coordinate missing for a placed point (absent is 0)", row + 1, name)
        row = _bad(absent & ~np.isnan(xyz[:, axis]))
        if row is not None:
            raise PlacementTableError(
                f"coordinate {xyz[row, axis]!r} given for a point marked absent "
                "(leave it empty)", row + 1, name)


def _check_keys(clean: pd.DataFrame) -> None:
    codes = [clean[c].cat.codes.to_numpy(dtype=np.int64) for c in ID_COLUMNS]
    sizes = [len(clean[c].cat.categories) for c in ID_COLUMNS]
    key3 = (codes[0] * sizes[1] + codes[1]) * sizes[2] + codes[2]
    read = clean["read"].to_numpy()
    key = key3 * 2 + (read - 1)
    order = np.argsort(key, kind="stable")
    srt = key[order]
    same = np.flatnonzero(srt[1:] == srt[:-1])
    if same.size:
        later = order[same + 1]
        j = int(later.min())  # the first row, in file order, that repeats an earlier one
        i = int(order[np.searchsorted(srt, key[j])])
        desc = ", ".join(f"{c}={clean[c].iloc[j]!r}" for c in ID_COLUMNS)
        raise PlacementTableError(
            f"duplicate placement ({desc}, read={int(read[j])}); the same key is in row {i + 1}",
            j + 1, "read")
    repeats = np.flatnonzero(read == 2)
    if repeats.size:
        orphan = ~np.isin(key3[repeats], key3[read == 1])
        pos = _bad(orphan)
        if pos is not None:
            j = int(repeats[pos])
            raise PlacementTableError(
                f"repeat read (read 2) of case {clean['case'].iloc[j]!r}, landmark "
                f"{clean['landmark'].iloc[j]!r} by reader {clean['reader'].iloc[j]!r} has no "
                "first read (read 1) to pair with", j + 1, "read")


def validate_placements(df: pd.DataFrame) -> pd.DataFrame:
    """Check a placements table and return a clean, typed copy.

    Parameters
    ----------
    df : pandas.DataFrame
        Long table with at least the columns :data:`REQUIRED_COLUMNS`; cells may
        be text (as read from CSV) or already typed. Coordinates are world mm, RAS+.

    Returns
    -------
    pandas.DataFrame
        Columns case, landmark, reader (categorical, categories sorted, text
        stripped of surrounding blanks), read (int64, 1 or 2),
        x_mm, y_mm, z_mm (float64, NaN when absent), absent (bool),
        placed_at (datetime64[ns, UTC], NaT when empty), in input order
        with a fresh 0-based index.

    Raises
    ------
    PlacementTableError
        Missing columns, empty identifiers, a read other than 1 or 2,
        non-numeric or non-finite coordinates, a placed point without
        coordinates or an absent one with coordinates, an absent flag other
        than 0/1, a bad time stamp, duplicate rows for the same case,
        landmark, reader and read, or a repeat read with no first read.
        The message names the 1-based data row and the column.
    """
    if not isinstance(df, pd.DataFrame):
        raise PlacementTableError(f"expected a pandas DataFrame, got {type(df).__name__!r}")
    missing = [c for c in REQUIRED_COLUMNS if c not in df.columns]
    if missing:
        raise PlacementTableError(
            f"missing column(s) {', '.join(map(repr, missing))}; "
            f"found {', '.join(map(repr, map(str, df.columns)))}")
    if len(df) == 0:
        raise PlacementTableError("the table has no placements")
    df = df.reset_index(drop=True)
    read = _numeric(df, "read")
    row = _bad(~np.isin(read, [1.0, 2.0]))
    if row is not None:
        raise PlacementTableError(
            f"read must be 1 (first) or 2 (repeat), got {df['read'].iloc[row]!r}", row + 1, "read")
    absent = _flag(df)
    xyz = np.column_stack([_numeric(df, c) for c in COORDINATE_COLUMNS])
    _check_coordinates(xyz, absent)
    clean = pd.DataFrame({name: _ids(df, name) for name in ID_COLUMNS})
    clean["read"] = read.astype(np.int64)
    for axis, name in enumerate(COORDINATE_COLUMNS):
        clean[name] = xyz[:, axis]
    clean["absent"] = absent
    clean["placed_at"] = _times(df)
    _check_keys(clean)
    return clean


def require_repeat_reads(clean: pd.DataFrame) -> None:
    """Refuse a table in which some reader has no repeat read at all.

    For designs in which repeat reads are part of the plan (every reader reads some cases
    a second time, read 2): a reader with only first reads, one point per case and
    landmark, would otherwise get only empty repeatability rows (n_pairs 0, a reason).

    Parameters
    ----------
    clean : pandas.DataFrame
        Output of :func:`validate_placements`.

    Raises
    ------
    PlacementTableError
        Naming the first such reader (in file order), with that reader's first row and
        the column ``read``; the message also lists any other reader without repeats.
    """
    codes = clean["reader"].cat.codes.to_numpy(dtype=np.int64)
    n_readers = len(clean["reader"].cat.categories)
    has_repeat = np.zeros(n_readers, dtype=bool)
    has_repeat[codes[clean["read"].to_numpy() == 2]] = True
    missing = _bad(~has_repeat[codes])
    if missing is None:
        return
    first_rows = pd.Series(np.arange(len(codes))).groupby(codes).min()
    lacking = [int(code) for code in np.flatnonzero(~has_repeat)]
    lacking.sort(key=lambda code: int(first_rows[code]))
    names = [key_label(clean["reader"].cat.categories[code]) for code in lacking]
    others = ""
    if len(names) > 1:
        who = "reader" if len(names) == 2 else "readers"
        others = f"; {who} {', '.join(map(repr, names[1:]))} also without any"
    raise PlacementTableError(
        f"repeat reads are required, but reader {names[0]!r} has none (no row with read 2; "
        f"this is the reader's first row){others}", missing + 1, "read")


@dataclass(frozen=True)
class DenseStudy:
    """Placements as dense arrays indexed (read, case, landmark, reader).

    Attributes
    ----------
    cases, landmarks, readers : pandas.Index
        Sorted identifiers of axes 1, 2 and 3.
    points_mm : (2, n_cases, n_landmarks, n_readers, 3) float64 array
        World mm, RAS+; read axis 0 is the first read, 1 the repeat read.
        NaN where no point was placed (absent or not read).
    absent : (2, n_cases, n_landmarks, n_readers) bool array
        True where the reader marked the landmark not visible.
    read : (2, n_cases, n_landmarks, n_readers) bool array
        True where a row exists (placed or absent).
    placed_at_ns : (2, n_cases, n_landmarks, n_readers) int64 array
        Nanoseconds since 1970-01-01 UTC; the minimum int64 where unknown.
    row : (2, n_cases, n_landmarks, n_readers) int64 array
        0-based input row of each cell, -1 where there is none.
    """

    cases: pd.Index
    landmarks: pd.Index
    readers: pd.Index
    points_mm: np.ndarray
    absent: np.ndarray
    read: np.ndarray
    placed_at_ns: np.ndarray
    row: np.ndarray

    @property
    def placed(self) -> np.ndarray:
        """(2, n_cases, n_landmarks, n_readers) bool: a point with coordinates exists."""
        return self.read & ~self.absent

    @property
    def shape(self) -> tuple[int, int, int]:
        """(n_cases, n_landmarks, n_readers)."""
        return len(self.cases), len(self.landmarks), len(self.readers)


def _codes(col: pd.Series) -> tuple[np.ndarray, pd.Index]:
    if isinstance(col.dtype, pd.CategoricalDtype):
        return col.cat.codes.to_numpy(dtype=np.int64), pd.Index(col.cat.categories)
    return _factorize(col)


def to_dense(clean: pd.DataFrame) -> DenseStudy:
    """Scatter a validated placements table into dense arrays.

    Parameters
    ----------
    clean : pandas.DataFrame
        Output of :func:`validate_placements`.

    Returns
    -------
    DenseStudy
        Arrays of shape (2, n_cases, n_landmarks, n_readers[, 3]); see the class.
    """
    ic, cases = _codes(clean["case"])
    il, landmarks = _codes(clean["landmark"])
    ir, readers = _codes(clean["reader"])
    ik = clean["read"].to_numpy(dtype=np.int64) - 1
    shape = (2, len(cases), len(landmarks), len(readers))
    points = np.full((*shape, 3), np.nan)
    points[ik, ic, il, ir] = clean[list(COORDINATE_COLUMNS)].to_numpy(dtype=np.float64)
    absent = np.zeros(shape, dtype=bool)
    absent[ik, ic, il, ir] = clean["absent"].to_numpy(dtype=bool)
    read = np.zeros(shape, dtype=bool)
    read[ik, ic, il, ir] = True
    stamps = np.full(shape, np.iinfo(np.int64).min, dtype=np.int64)
    times = clean["placed_at"]
    ns = times.dt.tz_convert("UTC").dt.tz_localize(None).to_numpy(dtype="datetime64[ns]")
    stamps[ik, ic, il, ir] = ns.view(np.int64)
    row = np.full(shape, -1, dtype=np.int64)
    row[ik, ic, il, ir] = np.arange(len(clean), dtype=np.int64)
    return DenseStudy(cases, landmarks, readers, points, absent, read, stamps, row)


def key_label(value: Hashable) -> str:
    """Identifier as text for column names and messages."""
    return str(value)
