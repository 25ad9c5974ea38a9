"""Placements table: schema, validation messages and the dense arrays."""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
import pytest

from studies.analysis.table import (
    PlacementTableError,
    read_placements_csv,
    to_dense,
    validate_placements,
)

CSV = """case,landmark,reader,read,x_mm,y_mm,z_mm,absent,placed_at
c1,nasion,ann,1,1.5,-2.0,30.25,0,2026-03-02T09:00:00Z
c1,nasion,ben,1,,,,1,2026-03-02T09:05:00+01:00
c1,nasion,ann,2,1.0,-2.5,30.0,0,2026-03-23T09:00:00Z
c2,nasion,ann,1,4.0,5.0,6.0,0,
"""


def frame(text: str = CSV) -> pd.DataFrame:
    return pd.read_csv(io.StringIO(text), dtype=str, keep_default_na=False)


def error_for(text: str) -> PlacementTableError:
    with pytest.raises(PlacementTableError) as info:
        validate_placements(frame(text))
    return info.value


def test_it_reads_text_cells_with_empty_coordinates_for_absent_points(tmp_path):
    """The CSV form of the issue: coordinates empty when absent, time stamps ISO 8601."""
    path = tmp_path / "placements.csv"
    path.write_text(CSV)
    clean = read_placements_csv(str(path))
    assert clean["absent"].tolist() == [False, True, False, False]
    assert np.isnan(clean.loc[1, ["x_mm", "y_mm", "z_mm"]].to_numpy(dtype=float)).all()
    assert clean.loc[0, "z_mm"] == 30.25
    assert clean["read"].tolist() == [1, 1, 2, 1]
    # +01:00 is converted to UTC; an empty time is NaT
    assert clean.loc[1, "placed_at"] == pd.Timestamp("2026-03-02T08:05:00Z")
    assert pd.isna(clean.loc[3, "placed_at"])


def test_it_scatters_rows_into_dense_arrays_indexed_read_case_landmark_reader():
    study = to_dense(validate_placements(frame()))
    assert list(study.cases) == ["c1", "c2"]
    assert list(study.readers) == ["ann", "ben"]
    assert study.points_mm.shape == (2, 2, 1, 2, 3)
    np.testing.assert_array_equal(study.points_mm[0, 0, 0, 0], [1.5, -2.0, 30.25])
    np.testing.assert_array_equal(study.points_mm[1, 0, 0, 0], [1.0, -2.5, 30.0])
    assert study.absent[0, 0, 0, 1] and study.read[0, 0, 0, 1] and not study.placed[0, 0, 0, 1]
    assert not study.read[1, 1, 0, 0]  # c2 has no repeat read
    assert study.row[0, 1, 0, 0] == 3


def test_it_accepts_an_already_typed_frame_and_strips_identifiers():
    df = frame()
    typed = df.assign(x_mm=pd.to_numeric(df["x_mm"]), read=df["read"].astype(int),
                      absent=df["absent"].astype(int), reader=" " + df["reader"])
    clean = validate_placements(typed)
    assert list(clean["reader"].cat.categories) == ["ann", "ben"]


def test_it_names_the_missing_columns():
    err = error_for(CSV.replace(",placed_at", ",when"))
    assert "'placed_at'" in str(err) and "missing column" in str(err)


@pytest.mark.parametrize(
    ("old", "new", "row", "column", "quoted"),
    [
        ("1.5,-2.0", "1.5cm,-2.0", 1, "x_mm", "'1.5cm'"),
        ("30.25", "inf", 1, "z_mm", "'inf'"),
        ("30.25", "nan", 1, "z_mm", "'nan'"),
        (",ann,2,", ",ann,3,", 3, "read", "3"),
        (",0,2026-03-02T09:00:00Z", ",2,2026-03-02T09:00:00Z", 1, "absent", "'2'"),
        ("2026-03-23T09:00:00Z", "next tuesday", 3, "placed_at", "'next tuesday'"),
        (",,,,1,", ",,7,,1,", 2, "y_mm", "7.0"),
        ("4.0,5.0,6.0,0", "4.0,,6.0,0", 4, "y_mm", "absent is 0"),
        ("c2,nasion,ann", ",nasion,ann", 4, "case", "empty identifier"),
    ],
)
def test_it_names_row_and_column_of_a_bad_cell(old, new, row, column, quoted):
    """Row numbers are 1-based CSV data rows (header not counted)."""
    err = error_for(CSV.replace(old, new, 1))
    assert err.row == row and err.column == column
    assert f"row {row} (1-based data row" in str(err)
    assert quoted in str(err)
    assert isinstance(err, ValueError)


def test_it_rejects_a_duplicate_placement_and_names_both_rows():
    text = CSV + "c1,nasion,ann,1,9,9,9,0,2026-03-02T10:00:00Z\n"
    err = error_for(text)
    assert err.row == 5 and "duplicate placement" in str(err) and "row 1" in str(err)


def test_it_rejects_a_repeat_read_without_a_first_read():
    text = CSV + "c2,nasion,ben,2,1,1,1,0,2026-03-24T10:00:00Z\n"
    err = error_for(text)
    assert err.row == 5 and "no first read" in str(err) and "'ben'" in str(err)


def test_it_rejects_an_empty_table_and_a_non_frame():
    with pytest.raises(PlacementTableError, match="no placements"):
        validate_placements(frame(CSV.splitlines()[0] + "\n"))
    with pytest.raises(PlacementTableError, match="'list'"):
        validate_placements([1, 2])  # type: ignore[arg-type]


def test_it_reports_an_unreadable_file(tmp_path):
    with pytest.raises(PlacementTableError, match="cannot read"):
        read_placements_csv(str(tmp_path / "missing.csv"))
