"""The coordinator's results dashboard, its figures and CSV files, and the report.

Every view fetches the study through studies.access.get_study with the coordinator role:
an outsider gets a 404, a reader or adjudicator a 403. The work is in studies.reporting.
Every download (a table's CSV, the HTML report saved as a file, the PDF report) is recorded
in the audit log as an export, like the API's exports.
"""

from __future__ import annotations

from csp.constants import NONE, UNSAFE_INLINE
from csp.decorators import csp_replace
from django.contrib.auth.decorators import login_required
from django.http import Http404, HttpRequest, HttpResponse
from django.shortcuts import redirect, render
from django.urls import reverse
from django.utils.text import slugify
from django.views.decorators.http import require_GET, require_POST

from audit import log as audit
from studies.access import get_study
from studies.constants import Role
from studies.reporting import report as results
from studies.services.analysis_runs import latest_run, request_analysis

COORDINATOR = [Role.COORDINATOR]
#: Figure options a URL may carry, per figure kind.
FIGURE_OPTIONS = {"pair": ("reader_a", "reader_b"), "repeat": ("reader",), "drift": ("reader",),
                  "points": ("case", "landmark")}


def _figure_url(slug: str, kind: str, **options: str) -> str:
    url = reverse("viewer-dashboard-figure", kwargs={"slug": slug, "kind": kind})
    if options:
        from urllib.parse import urlencode

        url += "?" + urlencode(options)
    return url


def _choices_from(request: HttpRequest, choices: dict) -> dict:
    """The reader pair and case x landmark on screen: from the query, else defaults."""
    readers = choices["readers"]
    pair_a = request.GET.get("reader_a") or (readers[0] if readers else "")
    pair_b = request.GET.get("reader_b") or (readers[1] if len(readers) > 1 else "")
    flagged = choices["first_flagged"]
    case = request.GET.get("case") or (flagged[0] if flagged else
                                       (choices["cases"][0] if choices["cases"] else ""))
    landmark = request.GET.get("landmark") or (flagged[1] if flagged else
                                               (choices["landmarks"][0]
                                                if choices["landmarks"] else ""))
    return {"reader_a": pair_a, "reader_b": pair_b, "case": case, "landmark": landmark}


@login_required
@require_GET
def dashboard(request: HttpRequest, slug: str) -> HttpResponse:
    """Progress, the latest analysis with its tables, and the figures."""
    study = get_study(request.user, slug, COORDINATOR)
    run = latest_run(study)
    done = results.latest_completed_run(study)
    choices = results.figure_choices(study, done)
    chosen = _choices_from(request, choices)
    figures = []
    if choices["readers"]:
        figures.append(("Inter-reader distances", _figure_url(slug, "distances"), False))
        if chosen["reader_a"] and chosen["reader_b"] and chosen["reader_a"] != chosen["reader_b"]:
            figures.append((f"Bland-Altman: {chosen['reader_a']} and {chosen['reader_b']}",
                            _figure_url(slug, "pair", reader_a=chosen["reader_a"],
                                        reader_b=chosen["reader_b"]), True))
        figures += [(f"Repeat reads: {r}", _figure_url(slug, "repeat", reader=r), True)
                    for r in choices["repeaters"]]
        figures += [(f"Drift: {r}", _figure_url(slug, "drift", reader=r), False)
                    for r in choices["readers"]]
        if chosen["case"] and chosen["landmark"]:
            figures.append((f"Points: {chosen['case']}, {chosen['landmark']}",
                            _figure_url(slug, "points", case=chosen["case"],
                                        landmark=chosen["landmark"]), True))
        figures.append(("Success rate against radius", _figure_url(slug, "success"), False))
    config = {"status": reverse("studies-study-analysis", kwargs={"slug": slug}),
              "run": str(run.code) if run else None,
              "state": run.status if run else "none"}
    return render(request, "viewer/dashboard.html", {
        "study": study, "run": run, "done": done, "progress": results.progress(study),
        "tables": results.shown_tables(study, done) if done else [],
        "csv_tables": results.available_tables(study, done) if done else [],
        "choices": choices, "chosen": chosen, "figures": figures,
        "detector": results.detector_summary(study, done),
        "config": config,
    })


@login_required
@require_POST
def dashboard_run(request: HttpRequest, slug: str) -> HttpResponse:
    """Run the analysis now (queued for a worker); the page then shows its progress."""
    study = get_study(request.user, slug, COORDINATOR)
    request_analysis(study)
    return redirect("viewer-dashboard", slug=slug)


@login_required
@require_GET
def dashboard_figure(request: HttpRequest, slug: str, kind: str) -> HttpResponse:
    """One figure as SVG; its options come from the query string."""
    study = get_study(request.user, slug, COORDINATOR)
    options = {k: request.GET[k] for k in FIGURE_OPTIONS.get(kind, ()) if k in request.GET}
    missing = [k for k in FIGURE_OPTIONS.get(kind, ()) if k not in options]
    if missing:
        raise Http404(f"figure {kind!r} needs {', '.join(missing)}")
    try:
        svg = results.figure_svg(study, kind, options)
    except results.ReportError as error:
        raise Http404(str(error)) from error
    response = HttpResponse(svg, content_type="image/svg+xml")
    response["Cache-Control"] = "private, max-age=60"
    return response


@login_required
@require_GET
def dashboard_csv(request: HttpRequest, slug: str, name: str) -> HttpResponse:
    """One result table of the latest completed run as a CSV download (every column)."""
    study = get_study(request.user, slug, COORDINATOR)
    run = results.latest_completed_run(study)
    if run is None:
        raise Http404("no completed analysis yet")
    try:
        frame = results.result_table(study, run, name)
    except results.ReportError as error:
        raise Http404(str(error)) from error
    response = HttpResponse(frame.to_csv(index=False), content_type="text/csv; charset=utf-8")
    return audit.export_download(request, study, response, f"{study.slug}-{name}.csv")


def _report_parts(request: HttpRequest, slug: str):
    study = get_study(request.user, slug, COORDINATOR)
    run = results.latest_completed_run(study)
    if run is None:
        raise Http404("no completed analysis yet: run the analysis first")
    return study, run


@login_required
@require_GET
@csp_replace({"style-src": [UNSAFE_INLINE], "script-src": [NONE]})  # its own <style>, no code
def report(request: HttpRequest, slug: str) -> HttpResponse:
    """The self-contained HTML report; ?download=1 saves it as a file (an audited export)."""
    study, run = _report_parts(request, slug)
    response = HttpResponse(results.report_html(study, run), content_type="text/html")
    if request.GET.get("download"):
        name = slugify(f"{study.slug}-report")
        return audit.export_download(request, study, response, f"{name}.html")
    return response


@login_required
@require_GET
def report_pdf(request: HttpRequest, slug: str) -> HttpResponse:
    """The report as PDF (the same HTML, laid out by WeasyPrint)."""
    study, run = _report_parts(request, slug)
    pdf = results.report_pdf(results.report_html(study, run))
    response = HttpResponse(pdf, content_type="application/pdf")
    return audit.export_download(request, study, response, f"{study.slug}-report.pdf")
