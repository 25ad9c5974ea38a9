"""The Django side of the results: progress, tables, figures and the report of one study.

Views call these with a study already fetched through studies.access. Nothing here changes
state. Figures are drawn from the study's current submitted placements (the same table the
analysis reads) and cached by the placements' fingerprint, so an unchanged study is drawn
once. The PDF is made by WeasyPrint from the same HTML as the report.
"""

from __future__ import annotations

import base64
import hashlib
import logging
import math
from dataclasses import dataclass
from datetime import datetime

import pandas as pd
from django.core.cache import cache
from django.db.models import Min
from django.template.loader import render_to_string
from django.utils import timezone

from ..analysis.detection import DEFAULT_RADII_MM
from ..analysis.repeatability import REPEATABILITY_FACTOR
from ..constants import ReadStatus
from ..models import AnalysisRun, Study
from ..services import analysis_runs
from ..services.adjudication import latest_completed_run
from ..services.analysis_runs import frame_of, latest_run, placements_table
from ..services.predictions import latest_detector_run, predictions_frame
from . import figures, quantities
from .methods import Methods, methods
from .progress import Pace, reader_pace, study_completion
from .tables import CSV_TABLES, SHOWN, cell_text, readers_table

__all__ = ["CAUTIONS", "Figure", "ReportError", "figure_svg", "latest_completed_run",
           "methods_parameters", "progress", "report_figures", "report_html", "report_pdf",
           "result_table", "run_status"]

#: The CUSUM settings of the drift table and the limits' SD multiple (pipeline defaults).
CUSUM_K, CUSUM_H, LOA_Z = 0.5, 5.0, 1.96
CACHE_SECONDS = 3600
CAUTIONS = (
    "Research use only: these results are not for clinical decisions.",
    "The consensus point is an estimate from the readers, not the true anatomy; its "
    "uncertainty grows when few readers placed the point or they disagree.",
    "Limits of agreement and repeatability assume differences that are roughly normal and do "
    "not depend on the position; check the Bland-Altman plots before relying on them.",
    "Drift statistics treat a reader's placements as independent; a CUSUM alarm is a prompt "
    "to look at the reader's recent work, not proof of a change.",
    "The figures are drawn from the submitted placements at the time the page is made; the "
    "tables come from the analysis run named at the top.",
)


class ReportError(ValueError):
    """A table, figure or option that does not exist for this study; the message quotes it."""


@dataclass(frozen=True)
class Figure:
    """One figure of the report: a heading, a caption and its SVG text."""

    key: str
    title: str
    caption: str
    svg: str

    @property
    def data_uri(self) -> str:
        return "data:image/svg+xml;base64," + base64.b64encode(self.svg.encode()).decode()


def run_status(study: Study) -> dict:
    """The latest run's state for the live progress bar (JSON-serialisable)."""
    # A deferred or debounced run that is due is sent while someone watches.
    analysis_runs.send_waiting_runs(study)
    run = latest_run(study)
    if run is None:
        return {"status": "none", "progress": 0.0, "message": "no analysis has been run yet"}
    return {
        "code": str(run.code), "status": run.status, "progress": float(run.progress),
        "message": run.progress_message, "reason": run.reason, "n_reads": run.n_reads,
        "n_placements": run.n_placements,
        "requested_at": run.requested_at.isoformat(),
        "finished_at": run.finished_at.isoformat() if run.finished_at else None,
    }


def progress(study: Study, now: datetime | None = None) -> dict:
    """Reads submitted / assigned per reader and per case, repeats in washout, projections."""
    now = now or timezone.now()
    reads = list(study.reads.select_related("reader", "case").order_by("reader__username",
                                                                       "worklist_position"))
    by_reader: dict = {}
    for read in reads:
        by_reader.setdefault(read.reader, []).append(read)
    rows, paces = [], []
    for reader, own in by_reader.items():
        submitted = [r.submitted_at for r in own if r.status == ReadStatus.SUBMITTED
                     and r.submitted_at]
        left = [r for r in own if r.status != ReadStatus.SUBMITTED]
        opened = [r.opened_at for r in own if r.opened_at]
        pace = reader_pace(submitted, len(left), now, started_at=min(opened) if opened else None,
                           available_from=[r.available_from for r in left])
        paces.append(pace)
        rows.append({
            "reader": reader.get_full_name() or reader.username, "username": reader.username,
            "assigned": len(own), "submitted": len(submitted), "remaining": len(left),
            "washout": sum(1 for r in left if r.available_from is None
                           or r.available_from > now),
            "percent": round(100 * len(submitted) / len(own)) if own else 0,
            "reads_per_day": pace.reads_per_day, "projected": pace.projected,
        })
    cases = (study.cases.order_by("label").values("label", "pseudonym")
             .annotate(first=Min("reads__submitted_at")))
    per_case = []
    for case in cases:
        own = [r for r in reads if r.case.pseudonym == case["pseudonym"]]
        per_case.append({"label": case["label"], "pseudonym": case["pseudonym"],
                         "assigned": len(own),
                         "submitted": sum(r.status == ReadStatus.SUBMITTED for r in own)})
    return {"readers": rows, "cases": per_case, "projected": _projection(paces),
            "submitted": sum(r["submitted"] for r in rows),
            "assigned": sum(r["assigned"] for r in rows),
            "washout": sum(r["washout"] for r in rows)}


def _projection(paces: list[Pace]) -> datetime | None:
    return study_completion(paces) if paces else None


def result_table(study: Study, run: AnalysisRun, name: str) -> pd.DataFrame:
    """A result table of the run (or of the latest scored detector run) by its CSV name."""
    if name not in CSV_TABLES:
        raise ReportError(f"no table {name!r}; tables: {', '.join(CSV_TABLES)}")
    if name == "readers":
        return readers_table(*(frame_of(run.tables[k]) for k in ("reader_bias", "repeatability",
                                                                 "drift")))
    if name in run.tables:
        return frame_of(run.tables[name])
    detector = latest_detector_run(study) if name in ("detector", "williams") else None
    if detector is not None and name in detector.tables:
        return frame_of(detector.tables[name])
    raise ReportError(f"table {name!r} is not available for this study yet")


def available_tables(study: Study, run: AnalysisRun) -> list[str]:
    """The CSV names that can be downloaded for this run."""
    out = []
    for name in CSV_TABLES:
        try:
            result_table(study, run, name)
        except ReportError:
            continue
        out.append(name)
    return out


def shown_tables(study: Study, run: AnalysisRun) -> list[dict]:
    """The tables on screen: title, columns and rows of text (with raw values for sorting)."""
    out = []
    for name, (title, columns) in SHOWN.items():
        try:
            frame = result_table(study, run, name)
        except ReportError:
            continue
        cols = [c for c in columns if c in frame.columns]
        rows = [[{"text": cell_text(v), "sort": _sort_key(v)} for v in row]
                for row in frame[cols].astype(object).itertuples(index=False)]
        out.append({"name": name, "title": title, "columns": cols, "rows": rows})
    return out


def detector_summary(study: Study, run: AnalysisRun | None) -> dict | None:
    """The latest scored detector against the readers, per landmark, for the dashboard.

    rows: landmark, the detector's MRE (mm), the readers' lowest and highest MRE (each
    against the consensus of the other readers), the Williams index with its 95% interval
    and verdict (studies.analysis.scoring). current: whether the detector was scored on
    the same placements and parameters as `run` (False when reads came in since).
    None when no detector has been scored.
    """
    detector = latest_detector_run(study)
    if detector is None:
        return None
    errors = frame_of(detector.tables["detector"])
    williams = frame_of(detector.tables["williams"]).set_index("landmark")
    rows = []
    for landmark, group in errors.groupby("landmark", sort=False):
        own = group[group["rater"] == detector.name]["mre_mm"]
        readers = group[group["rater"] != detector.name]["mre_mm"].dropna()
        w = williams.loc[landmark] if landmark in williams.index else None
        rows.append({
            "landmark": landmark,
            "detector_mre_mm": float(own.iloc[0]) if len(own) else math.nan,
            "readers_mre_mm": (float(readers.min()), float(readers.max())) if len(readers)
            else None,
            "williams": None if w is None else {
                "index": float(w["williams_index"]), "ci_low": float(w["ci_low"]),
                "ci_high": float(w["ci_high"]), "verdict": str(w["verdict"])},
        })
    return {"run": detector, "rows": rows,
            "current": run is not None and detector.analysis_input_digest == run.input_digest}


def _sort_key(value: object) -> str:
    if isinstance(value, bool) or value is None:
        return str(value)
    if isinstance(value, (int, float)):
        return "" if isinstance(value, float) and math.isnan(value) else repr(float(value))
    return str(value)


def _derived(study: Study, table: pd.DataFrame) -> quantities.Derived:
    return quantities.derive(table, study.consensus_method)


def _digest(table: pd.DataFrame) -> str:
    return hashlib.sha256(table.to_csv(index=False).encode()).hexdigest()[:20]


def figure_svg(study: Study, kind: str, options: dict[str, str] | None = None) -> str:
    """One dashboard figure as SVG text, cached by the placements' fingerprint.

    kind is one of figures.FIGURE_NAMES; options: pair (reader_a, reader_b), repeat and
    drift (reader), points (case, landmark).
    """
    if kind not in figures.FIGURE_NAMES:
        raise ReportError(f"no figure {kind!r}; figures: {', '.join(figures.FIGURE_NAMES)}")
    options = {k: str(v) for k, v in (options or {}).items()}
    table = placements_table(study)
    detector = latest_detector_run(study) if kind == "success" else None
    key = "cairn-figure:" + hashlib.sha256(repr((
        study.pk, study.consensus_method, study.tolerance_mm, _digest(table), kind,
        sorted(options.items()), detector.pk if detector else None)).encode()).hexdigest()
    cached = cache.get(key)
    if cached is not None:
        return cached
    if table.empty:
        raise ReportError("no submitted placements to draw yet")
    try:
        svg = _draw(study, _derived(study, table), kind, options)
    except (quantities.ReportingInputError, KeyError) as error:
        raise ReportError(str(error)) from error
    cache.set(key, svg, CACHE_SECONDS)
    return svg


def _draw(study: Study, derived: quantities.Derived, kind: str, options: dict) -> str:
    if kind == "distances":
        return figures.distance_svg(quantities.pairwise_long(derived))
    if kind == "pair":
        a, b = options["reader_a"], options["reader_b"]
        return figures.bland_altman_svg(quantities.reader_pair_differences(derived, a, b),
                                        f"{a} minus {b}", LOA_Z)
    if kind == "repeat":
        reader = options["reader"]
        return figures.bland_altman_svg(quantities.repeat_differences(derived, reader),
                                        f"{reader}: first read minus repeat read", LOA_Z)
    if kind == "drift":
        reader = options["reader"]
        series = quantities.error_series(derived, reader, k=CUSUM_K, h=CUSUM_H)
        return figures.error_time_svg(series, reader)
    if kind == "points":
        case, landmark = options["case"], options["landmark"]
        points, centre = quantities.points_at(derived, case, landmark)
        return figures.points_svg(points, centre, float(study.tolerance_mm),
                                  f"{case}, {landmark}")
    errors = quantities.reader_errors(derived)
    detector = latest_detector_run(study)
    name = None
    if detector is not None and detector.predictions:
        _, errors[detector.name] = quantities.detector_errors(derived, predictions_frame(detector))
        name = detector.name
    return figures.success_svg(errors, name)


def figure_choices(study: Study, run: AnalysisRun | None) -> dict:
    """Readers, reader pairs, repeat readers, cases and landmarks the figures can show."""
    table = placements_table(study)
    readers = sorted({str(r) for r in table["reader"]})
    repeaters = sorted({str(r) for r in table.loc[table["read"] == 2, "reader"]})
    cases = sorted({str(c) for c in table["case"]})
    landmarks = [lm.code for lm in study.current_landmarks()]
    flagged = None
    if run is not None and "consensus" in run.tables:
        consensus = frame_of(run.tables["consensus"])
        hits = consensus[consensus["flagged"].astype(bool)]
        if len(hits):
            flagged = (str(hits.iloc[0]["case"]), str(hits.iloc[0]["landmark"]))
    return {"readers": readers, "repeaters": repeaters, "cases": cases,
            "landmarks": landmarks, "first_flagged": flagged}


def report_figures(study: Study, run: AnalysisRun | None) -> list[Figure]:
    """Every figure of the report, in order (see the captions for what each shows)."""
    choices = figure_choices(study, run)
    readers = choices["readers"]
    out = [Figure("distances", "Inter-reader distances",
                  "Distance between every two readers' first-read points, per landmark.",
                  figure_svg(study, "distances"))]
    if len(readers) >= 2:
        a, b = readers[0], readers[1]
        out.append(Figure("pair", f"Bland-Altman: {a} and {b}",
                          f"{a} minus {b} per axis, with the mean difference and {LOA_Z} SD "
                          "limits of agreement.",
                          figure_svg(study, "pair", {"reader_a": a, "reader_b": b})))
    for reader in choices["repeaters"]:
        out.append(Figure(f"repeat-{reader}", f"Repeat reads: {reader}",
                          "First read minus repeat read per axis, with the mean difference "
                          f"and {LOA_Z} SD limits of agreement.",
                          figure_svg(study, "repeat", {"reader": reader})))
    for reader in readers:
        out.append(Figure(f"drift-{reader}", f"Drift: {reader}",
                          "Standardised distance to the other readers' consensus over time, "
                          f"its least-squares trend, and the CUSUM (k = {CUSUM_K:g}, "
                          f"h = {CUSUM_H:g}).", figure_svg(study, "drift", {"reader": reader})))
    point = choices["first_flagged"] or (
        (choices["cases"][0], choices["landmarks"][0]) if choices["cases"] else None)
    if point is not None:
        out.append(Figure("points", f"Points around the consensus: {point[0]}, {point[1]}",
                          "The readers' points in three orthogonal projections, in mm from "
                          f"the consensus, with the {study.tolerance_mm:g} mm tolerance circle.",
                          figure_svg(study, "points", {"case": point[0],
                                                       "landmark": point[1]})))
    out.append(Figure("success", "Success rate against radius",
                      "Share of each rater's points within a radius of the reference, 0 to "
                      "5 mm (readers against the consensus of the others).",
                      figure_svg(study, "success")))
    return out


def methods_parameters(study: Study, run: AnalysisRun) -> dict:
    """The plain parameters dict the methods paragraph is written from."""
    counts = run.summary.get("counts", {})
    params = run.summary.get("parameters", run.parameters)
    out = {
        "n_cases": counts.get("cases", study.cases.count()),
        "n_readers": counts.get("readers", 0),
        "n_landmarks": counts.get("landmarks", study.current_landmarks().count()),
        "readers_per_case": study.readers_per_case,
        "repeat_percent": round(100 * study.repeat_fraction, 2),
        "washout_days": study.washout_days,
        "n_reads": run.n_reads,
        "tolerance_mm": params.get("tolerance_mm", study.tolerance_mm),
        "consensus": params.get("consensus", study.consensus_method),
        "outlier_multiple": params.get("outlier_multiple", 3.0),
        "loa_z": LOA_Z, "rc_factor": REPEATABILITY_FACTOR, "cusum_k": CUSUM_K, "cusum_h": CUSUM_H,
    }
    detector = latest_detector_run(study)
    if detector is not None:
        out.update(detector=detector.name, sdr_radii_mm=list(DEFAULT_RADII_MM))
    return out


def report_context(study: Study, run: AnalysisRun) -> dict:
    text: Methods = methods(methods_parameters(study, run))
    return {"study": study, "run": run, "methods": text, "tables": shown_tables(study, run),
            "figures": report_figures(study, run), "cautions": CAUTIONS,
            "made_at": timezone.now(), "progress": progress(study)}


def report_html(study: Study, run: AnalysisRun) -> str:
    """The self-contained HTML report (styles inline, figures as data URIs)."""
    return render_to_string("viewer/report.html", report_context(study, run))


def report_pdf(html: str) -> bytes:
    """The report as PDF, made by WeasyPrint; each figure is a tagged Figure element."""
    from weasyprint import HTML

    logging.getLogger("weasyprint.progress").setLevel(logging.WARNING)  # one line per step
    return HTML(string=html).write_pdf(pdf_tags=True)
