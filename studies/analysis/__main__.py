"""Command-line analysis of a placements CSV file, no database needed.

Usage::

    python -m studies.analysis PLACEMENTS.csv --out DIR [--predictions PRED.csv]
        [--consensus mean|median|geomedian|weighted] [--tolerance MM]
        [--outlier-multiple K] [--require-repeats]

Writes agreement_by_landmark.csv, agreement_by_case.csv, consensus.csv,
repeatability.csv, reader_bias.csv, drift.csv (plus detector.csv and
williams.csv with --predictions) and summary.json into DIR, and prints a
short summary. Invalid input ends with exit code 2 and a one-line error that
names the row and column; no file is written then.

``--require-repeats`` says that repeat reads are part of the design: every
reader must have at least one repeat read (a row with read 2). A reader with
only first reads (one point per case and landmark) is then refused with exit
code 2, naming the reader, the reader's first row and the column ``read``.
Without the flag such a reader is accepted; their repeatability rows have
n_pairs 0 and a reason.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import tempfile
from collections.abc import Sequence

import numpy as np
import pandas as pd

from .consensus import METHODS
from .pipeline import AnalysisResult, run_analysis
from .scoring import read_predictions_csv
from .table import PlacementTableError, require_repeat_reads, validate_placements

__all__ = ["main"]


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="python -m studies.analysis",
        description="Agreement, consensus, repeatability, reader bias and drift, and detector "
                    "scoring from a long table of landmark placements (world mm, RAS+).")
    p.add_argument("placements", help="CSV with case, landmark, reader, read, x_mm, y_mm, z_mm, "
                                      "absent, placed_at")
    p.add_argument("--out", required=True, help="directory for the result files")
    p.add_argument("--predictions", help="detector CSV with case, landmark, x_mm, y_mm, z_mm "
                                         "[, detector]")
    p.add_argument("--consensus", choices=METHODS, default="geomedian",
                   help="consensus method (default: geomedian)")
    p.add_argument("--tolerance", type=float, default=3.0, metavar="MM",
                   help="spread in mm that flags a point for adjudication (default: 3)")
    p.add_argument("--outlier-multiple", type=float, default=3.0, metavar="K",
                   help="outlier threshold in multiples of the robust spread (default: 3)")
    p.add_argument("--require-repeats", action="store_true",
                   help="repeat reads are part of this design: refuse the input (exit code 2) "
                        "if any reader has no repeat read (read 2) at all, naming the reader "
                        "and that reader's first row")
    return p


def _read_csv(path: str) -> pd.DataFrame:
    try:
        return pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True)
    except (OSError, pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise PlacementTableError(f"cannot read {path!r}: {exc}") from exc


def _write(result: AnalysisResult, out_dir: str) -> list[str]:
    """Write every table and summary.json; all files appear together or none."""
    os.makedirs(out_dir, exist_ok=True)
    names = [f"{stem}.csv" for stem in result.tables] + ["summary.json"]
    tmp = tempfile.mkdtemp(prefix=".analysis-", dir=out_dir)
    try:
        for stem, table in result.tables.items():
            table.to_csv(os.path.join(tmp, f"{stem}.csv"), index=False)
        summary = dict(result.summary, files=names)
        with open(os.path.join(tmp, "summary.json"), "w", encoding="utf-8") as fh:
            json.dump(summary, fh, indent=2, allow_nan=False, default=str)
        for name in names:
            os.replace(os.path.join(tmp, name), os.path.join(out_dir, name))
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return names


def _summary_text(result: AnalysisResult) -> str:
    counts = result.summary["counts"]
    agree = result.tables["agreement_by_landmark"]
    flagged = result.tables["consensus"].groupby("landmark", observed=True)["flagged"].sum()
    table = pd.DataFrame({
        "landmark": agree["landmark"].astype(str),
        "cases": agree["n_cases"],
        "mean_pw_mm": agree["mean_pairwise_mm"],
        "icc2_1": agree[["icc2_1_x", "icc2_1_y", "icc2_1_z"]].mean(axis=1, skipna=False),
        "kappa_absent": agree["kappa_absent"],
        "flagged": flagged.reindex(agree["landmark"]).fillna(0).astype(int).to_numpy(),
    })
    head = (f"{counts['placements']} placements: {counts['cases']} cases, "
            f"{counts['landmarks']} landmarks, {counts['readers']} readers, "
            f"{counts['repeat_pairs']} repeat pairs; consensus "
            f"{result.summary['parameters']['consensus']}")
    body = table.to_string(index=False, float_format=lambda v: f"{v:.3f}", na_rep="-")
    return head + "\n" + body


def main(argv: Sequence[str] | None = None) -> int:
    """Run the analysis from the command line; returns the exit code (2 for bad input)."""
    args = _parser().parse_args(argv)
    try:
        placements = _read_csv(args.placements)
        if args.require_repeats:
            require_repeat_reads(validate_placements(placements))
        predictions = read_predictions_csv(args.predictions) if args.predictions else None
        result = run_analysis(placements, predictions, consensus=args.consensus,
                              tolerance_mm=args.tolerance, outlier_multiple=args.outlier_multiple)
    except ValueError as exc:  # PlacementTableError, AnalysisParameterError and kin
        where = f"{args.predictions}: " if "predictions" in str(exc) else f"{args.placements}: "
        print(f"error: {where}{exc}".replace("\n", " "), file=sys.stderr)
        return 2
    try:
        names = _write(result, args.out)
    except OSError as exc:
        print(f"error: cannot write to {args.out!r}: {exc}", file=sys.stderr)
        return 2
    with np.printoptions(precision=3):
        print(_summary_text(result))
    print(f"wrote {', '.join(names)} to {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
