"""Detector predictions: upload, per-row validation, and scoring against the readers.

A predictions CSV has the columns of the analysis core (case, landmark, x_mm, y_mm, z_mm
in world mm RAS+, optional detector); `case` may be the case pseudonym or its unique
coordinator-side label. Every row is checked and every problem reported with its row and
column; a file with any error stores nothing. A valid file is scored by the analysis core
(studies.analysis.scoring through run_analysis) on the study's current submitted
placements, and stored as a DetectorRun with its detector and williams tables.
"""

from __future__ import annotations

import io
import math
from collections import Counter
from dataclasses import dataclass

import pandas as pd
from django.db import transaction

from ..analysis.pipeline import AnalysisParameterError
from ..analysis.scoring import DEFAULT_DETECTOR, PREDICTION_COLUMNS
from ..analysis.table import PlacementTableError
from ..constants import DetectorStatus
from ..models import DetectorRun, Study
from . import analysis_runs
from .errors import ServiceError

MAX_UPLOAD_BYTES = 20 * 1024 * 1024
MAX_ROWS = 200_000
MAX_REPORTED_ERRORS = 200
NAME_MAX = 100


@dataclass(frozen=True)
class RowError:
    """One problem in an uploaded file; row is the 1-based data row (0: the whole file)."""

    row: int
    column: str
    message: str

    def as_dict(self) -> dict:
        return {"row": self.row, "column": self.column, "message": self.message}


class PredictionsError(ServiceError):
    """An uploaded predictions file was refused; `row_errors` lists every problem found."""

    def __init__(self, row_errors: list[RowError]):
        self.row_errors = row_errors[:MAX_REPORTED_ERRORS]
        first = row_errors[0]
        where = f"row {first.row}, column {first.column!r}: " if first.row else ""
        more = f" (and {len(row_errors) - 1} more)" if len(row_errors) > 1 else ""
        super().__init__(f"predictions refused: {where}{first.message}{more}")


def parse_csv(data: bytes) -> pd.DataFrame:
    """The uploaded bytes as a text table (every cell a str), or PredictionsError."""
    if len(data) > MAX_UPLOAD_BYTES:
        raise PredictionsError(
            [RowError(0, "", f"the file is {len(data)} bytes; the limit is {MAX_UPLOAD_BYTES}")]
        )
    try:
        text = data.decode("utf-8-sig")
        frame = pd.read_csv(
            io.StringIO(text), dtype=str, keep_default_na=False, skipinitialspace=True
        )
    except UnicodeDecodeError as error:
        raise PredictionsError([RowError(0, "", f"not UTF-8 text: {error}")]) from None
    except (pd.errors.ParserError, pd.errors.EmptyDataError) as error:
        raise PredictionsError([RowError(0, "", f"not a readable CSV file: {error}")]) from None
    frame.columns = [str(c).strip() for c in frame.columns]
    return frame


def _case_names(study: Study, placed: set[str]) -> dict[str, str]:
    """Accepted spellings of a case (pseudonym, or a label used once) -> pseudonym."""
    cases = list(study.cases.values_list("pseudonym", "label"))
    labels = Counter(label for _, label in cases)
    names = {label: p for p, label in cases if labels[label] == 1 and p in placed}
    names.update({p: p for p, _ in cases if p in placed})
    return names


def _number(text: str) -> float | None:
    try:
        value = float(text)
    except ValueError:
        return None
    return value if math.isfinite(value) else None


def _check_row(
    n: int, row: dict, cases: dict[str, str], landmarks: set[str], errors: list[RowError]
) -> tuple[str, str, list[float]] | None:
    case, landmark = row["case"].strip(), row["landmark"].strip()
    ok = True
    if case not in cases:
        errors.append(
            RowError(n, "case", f"case {case!r} is not a case of this study with submitted reads")
        )
        ok = False
    if landmark not in landmarks:
        errors.append(RowError(n, "landmark", f"landmark {landmark!r} is not in the protocol"))
        ok = False
    texts = [row[c].strip() for c in ("x_mm", "y_mm", "z_mm")]
    xyz = []
    for column, text in zip(("x_mm", "y_mm", "z_mm"), texts, strict=True):
        value = _number(text) if text else math.nan
        if value is None:
            errors.append(RowError(n, column, f"not a finite number: {text!r}"))
            ok = False
        xyz.append(value)
    if ok and any(texts) and not all(texts):
        errors.append(RowError(n, "x_mm", f"give all three coordinates or none, got {texts}"))
        ok = False
    return (cases[case], landmark, xyz) if ok else None


def validate_upload(study: Study, frame: pd.DataFrame) -> tuple[pd.DataFrame, str]:
    """Check every row; return (clean predictions, detector name) or raise PredictionsError.

    The clean table has case (pseudonym), landmark, x_mm, y_mm, z_mm (float64, NaN for
    "no prediction") and detector.
    """
    missing = [c for c in PREDICTION_COLUMNS if c not in frame.columns]
    if missing:
        raise PredictionsError(
            [RowError(0, c, f"missing column {c!r}; found {list(frame.columns)}") for c in missing]
        )
    if frame.empty:
        raise PredictionsError([RowError(0, "", "the file has no rows")])
    if len(frame) > MAX_ROWS:
        raise PredictionsError([RowError(0, "", f"{len(frame)} rows; the limit is {MAX_ROWS}")])
    placed = set(analysis_runs.placements_table(study)["case"])
    cases = _case_names(study, placed)
    landmarks = set(study.current_landmarks().values_list("code", flat=True))
    errors: list[RowError] = []
    names = frame["detector"].str.strip() if "detector" in frame.columns else None
    detector = (
        next((n for n in names if n), DEFAULT_DETECTOR) if names is not None else DEFAULT_DETECTOR
    )
    seen: dict[tuple[str, str], int] = {}
    rows = []
    for n, row in enumerate(frame.to_dict(orient="records"), start=1):
        if names is not None and names.iloc[n - 1] not in ("", detector):
            errors.append(
                RowError(
                    n,
                    "detector",
                    f"one detector per file: {detector!r} above, {names.iloc[n - 1]!r} here",
                )
            )
        checked = _check_row(n, row, cases, landmarks, errors)
        if checked is None:
            continue
        key = checked[:2]
        if key in seen:
            errors.append(
                RowError(
                    n,
                    "landmark",
                    f"a second prediction for case {key[0]} landmark "
                    f"{key[1]!r} (first in row {seen[key]})",
                )
            )
            continue
        seen[key] = n
        rows.append([*key, *checked[2]])
    if errors:
        raise PredictionsError(errors)
    clean = pd.DataFrame(rows, columns=["case", "landmark", "x_mm", "y_mm", "z_mm"])
    clean["detector"] = detector
    return clean, detector


def upload_predictions(
    study: Study, user, data: bytes, *, name: str = "", file_name: str = ""
) -> DetectorRun:
    """Validate an uploaded predictions CSV, score it, and store a DetectorRun.

    Nothing is stored when any row is invalid (PredictionsError lists them all) or when the
    study has too few submitted reads to score against (ServiceError).
    """
    clean, detector = validate_upload(study, parse_csv(data))
    name = (name or "").strip() or detector
    if len(name) > NAME_MAX:
        raise ServiceError(f"the detector name is {len(name)} characters; keep it to {NAME_MAX}")
    try:
        tables, summary, digest = analysis_runs.execute_with_predictions(study, clean)
    except PlacementTableError as error:
        row = error.row or 0
        raise PredictionsError([RowError(row, error.column or "", str(error))]) from None
    except AnalysisParameterError as error:
        raise ServiceError(f"the study's analysis parameters are invalid: {error}") from None
    rows = [
        [r.case, r.landmark, *(None if math.isnan(v) else v for v in (r.x_mm, r.y_mm, r.z_mm))]
        for r in clean.itertuples(index=False)
    ]
    with transaction.atomic():
        return DetectorRun.objects.create(
            study=study,
            name=name,
            uploaded_by=user,
            file_name=file_name[:200],
            n_rows=len(rows),
            predictions={"columns": ["case", "landmark", "x_mm", "y_mm", "z_mm"], "data": rows},
            status=DetectorStatus.COMPLETED,
            analysis_input_digest=digest,
            code_version=analysis_runs.code_version(),
            tables={k: tables[k] for k in ("detector", "williams")},
            summary={"headline": summary.get("headline", {}), "counts": summary.get("counts", {})},
        )


def latest_detector_run(study: Study) -> DetectorRun | None:
    """The study's most recently uploaded and scored detector run."""
    return study.detector_runs.filter(status=DetectorStatus.COMPLETED).first()


def latest_detector_tables(study: Study) -> dict[str, pd.DataFrame]:
    """The latest detector run's tables as DataFrames: {"detector": ..., "williams": ...}.

    detector: landmark, rater (the detector first, then each reader), n, mre_mm, sd_mm,
    median_mm, sdr_2mm, sdr_2_5mm, sdr_3mm, sdr_4mm, reason; williams: landmark,
    williams_index, ci_low, ci_high, se, verdict (see studies.analysis.scoring). Empty when
    no detector was uploaded.
    """
    run = latest_detector_run(study)
    if run is None:
        return {}
    return {name: analysis_runs.frame_of(stored) for name, stored in run.tables.items()}


def predictions_frame(run: DetectorRun) -> pd.DataFrame:
    """A detector run's stored predictions as the analysis core's table."""
    return analysis_runs.frame_of(run.predictions)
