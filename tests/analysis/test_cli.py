"""python -m studies.analysis: files written, summary printed, exit code 2 on bad input."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pandas as pd

from tests.analysis.placement_factory import as_csv_text, make_placements

ROOT = Path(__file__).resolve().parents[2]


def run_cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "studies.analysis", *args], cwd=ROOT,
                          capture_output=True, text=True, timeout=120)


def write_study(tmp_path: Path) -> Path:
    df, _ = make_placements(n_cases=15, n_landmarks=2, n_readers=4, absent_rate=0.05, seed=9)
    path = tmp_path / "placements.csv"
    as_csv_text(df).to_csv(path, index=False)
    return path


def test_it_writes_every_table_and_the_summary(tmp_path):
    placements = write_study(tmp_path)
    df = pd.read_csv(placements)
    pred = df[(df["read"] == 1) & (df["reader"] == "reader_a")][["case", "landmark", "x_mm",
                                                                  "y_mm", "z_mm"]]
    pred = pred.assign(x_mm=pred["x_mm"] + 0.3)
    pred.to_csv(tmp_path / "pred.csv", index=False)
    out = tmp_path / "out"
    proc = run_cli(str(placements), "--out", str(out), "--predictions", str(tmp_path / "pred.csv"),
                   "--consensus", "median", "--tolerance", "2.5")
    assert proc.returncode == 0, proc.stderr
    names = {"agreement_by_landmark", "agreement_by_case", "consensus", "repeatability",
             "reader_bias", "drift", "detector", "williams"}
    assert {p.stem for p in out.glob("*.csv")} == names
    summary = json.loads((out / "summary.json").read_text())
    assert summary["parameters"]["consensus"] == "median"
    assert summary["parameters"]["tolerance_mm"] == 2.5
    assert "LM0" in proc.stdout and "placements" in proc.stdout
    cons = pd.read_csv(out / "consensus.csv")
    assert len(cons) == 30 and (cons["method"] == "median").all()
    assert (pd.read_csv(out / "detector.csv")["rater"] == "detector").sum() == 2


def test_it_exits_2_with_a_one_line_error_and_writes_nothing(tmp_path):
    placements = write_study(tmp_path)
    lines = placements.read_text().splitlines()
    cells = lines[5].split(",")
    cells[4] = "12,5"  # a decimal comma: shifts the columns
    lines[5] = ",".join(cells[:4]) + ",twelve," + ",".join(cells[5:])
    bad = tmp_path / "bad.csv"
    bad.write_text("\n".join(lines) + "\n")
    out = tmp_path / "out"
    proc = run_cli(str(bad), "--out", str(out))
    assert proc.returncode == 2
    err = proc.stderr.strip()
    assert len(err.splitlines()) == 1 and "Traceback" not in proc.stderr
    assert "row 5" in err and "'x_mm'" in err and "'twelve'" in err
    assert not out.exists()


def test_it_names_missing_columns_and_bad_options(tmp_path):
    placements = write_study(tmp_path)
    df = pd.read_csv(placements).drop(columns="absent")
    df.to_csv(tmp_path / "noabsent.csv", index=False)
    proc = run_cli(str(tmp_path / "noabsent.csv"), "--out", str(tmp_path / "o"))
    assert proc.returncode == 2 and "'absent'" in proc.stderr
    proc = run_cli(str(placements), "--out", str(tmp_path / "o"), "--tolerance", "-2")
    assert proc.returncode == 2 and "-2.0" in proc.stderr
    proc = run_cli(str(placements), "--out", str(tmp_path / "o"), "--consensus", "mode")
    assert proc.returncode == 2


def write_without_repeats(tmp_path: Path, *readers: str) -> tuple[Path, pd.DataFrame]:
    """The study of `write_study`, with every repeat read (read 2) of `readers` removed."""
    df = pd.read_csv(write_study(tmp_path), dtype=str, keep_default_na=False)
    df = df[~(df["reader"].isin(readers) & (df["read"] == "2"))].reset_index(drop=True)
    path = tmp_path / "no_repeats.csv"
    df.to_csv(path, index=False)
    return path, df


def first_row_of(df: pd.DataFrame, reader: str) -> int:
    """1-based data row (header not counted), as the error messages count rows."""
    return int(df.index[df["reader"] == reader][0]) + 1


def test_it_refuses_a_reader_without_repeat_reads_when_repeats_are_required(tmp_path):
    path, df = write_without_repeats(tmp_path, "reader_c")
    assert (df["read"] == "2").any()  # the other readers still have their repeats
    out = tmp_path / "out"
    proc = run_cli(str(path), "--out", str(out), "--require-repeats")
    assert proc.returncode == 2
    err = proc.stderr.strip()
    assert len(err.splitlines()) == 1 and "Traceback" not in proc.stderr
    assert "reader 'reader_c' has none (no row with read 2" in err
    assert f"row {first_row_of(df, 'reader_c')} " in err and "column 'read'" in err
    assert "'reader_a'" not in err and "'reader_b'" not in err and "'reader_d'" not in err
    assert not out.exists()


def test_it_names_every_reader_without_repeats_and_the_first_ones_row(tmp_path):
    path, df = write_without_repeats(tmp_path, "reader_d", "reader_b")
    proc = run_cli(str(path), "--out", str(tmp_path / "out"), "--require-repeats")
    assert proc.returncode == 2
    err = proc.stderr.strip()
    # reader_b comes first in the file, so its row is the one given
    assert f"row {first_row_of(df, 'reader_b')} " in err
    assert "reader 'reader_b' has none" in err and "'reader_d' also without any" in err


def test_without_the_flag_a_reader_without_repeats_is_accepted_as_before(tmp_path):
    """Repeat reads are optional unless asked for: the reader's repeatability is empty."""
    path, _ = write_without_repeats(tmp_path, "reader_c")
    out = tmp_path / "out"
    proc = run_cli(str(path), "--out", str(out))
    assert proc.returncode == 0, proc.stderr
    repeat = pd.read_csv(out / "repeatability.csv").set_index(["reader", "landmark"])
    assert (repeat.loc["reader_c", "n_pairs"] == 0).all()
    assert repeat.loc["reader_c", "reason"].notna().all()
    assert (repeat.loc["reader_a", "n_pairs"] == 4).all()  # make_placements: 4 repeat cases


def test_the_flag_changes_nothing_when_every_reader_has_repeats(tmp_path):
    placements = write_study(tmp_path)
    plain, strict = tmp_path / "plain", tmp_path / "strict"
    assert run_cli(str(placements), "--out", str(plain)).returncode == 0
    proc = run_cli(str(placements), "--out", str(strict), "--require-repeats")
    assert proc.returncode == 0, proc.stderr
    for name in ("repeatability.csv", "consensus.csv", "summary.json"):
        assert (strict / name).read_bytes() == (plain / name).read_bytes(), name


def test_the_help_documents_the_flag():
    proc = run_cli("--help")
    assert proc.returncode == 0 and "--require-repeats" in proc.stdout
