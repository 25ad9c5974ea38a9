"""The report of the demo study: HTML, its PDF, and the methods paragraph's numbers.

The demo study is built once for the module inside a transaction that is rolled back at
the end, so the other tests never see it.
"""

from __future__ import annotations

import io
import re

import pytest
from django.db import connection, transaction
from pypdf import PdfReader
from pypdf.generic import ContentStream

from studies.analysis.detection import DEFAULT_RADII_MM
from studies.constants import RunStatus
from studies.reporting import report
from studies.services import analysis_runs
from studies.services.demo import build_demo
from tests.unit.test_methods_paragraph import numbers_in

# Each test also takes the test database (pytest-django points the connection at it only
# once some test asks for it); the module's data live in the fixture's outer transaction.
pytestmark = pytest.mark.django_db


@pytest.fixture(scope="module")
def demo(django_db_setup, django_db_blocker):
    """(study, run, html, pdf bytes, figures, methods parameters) of the demo study."""
    with django_db_blocker.unblock(), transaction.atomic():
        if connection.vendor == "sqlite" and "memory" not in str(connection.settings_dict["NAME"]):
            pytest.fail("the report fixture must run on the test database")
        study = build_demo()
        run = analysis_runs.execute(analysis_runs.request_analysis(study).pk)
        html = report.report_html(study, run)
        parts = {
            "study": study, "run": run, "html": html, "pdf": report.report_pdf(html),
            "figures": report.report_figures(study, run),
            "params": report.methods_parameters(study, run),
            "readers": sorted(set(analysis_runs.placements_table(study)["reader"])),
            "repeaters": sorted(set(analysis_runs.placements_table(study).query("read == 2")
                                    ["reader"])),
            "n_cases": study.cases.count(), "n_landmarks": study.current_landmarks().count(),
        }
        yield parts
        transaction.set_rollback(True)


def pdf_figures(pdf: bytes) -> int:
    """Images in the PDF: marked-content sequences tagged /Figure (WeasyPrint tags each
    image it draws so; PDF 1.7, ISO 32000-1, section 14.8.4.5, Figure)."""
    reader = PdfReader(io.BytesIO(pdf))
    count = 0
    for page in reader.pages:
        stream = ContentStream(page.get_contents(), reader)
        count += sum(1 for operands, op in stream.operations
                     if op == b"BDC" and operands and operands[0] == "/Figure")
    return count


def test_the_demo_analysis_completes(demo):
    assert demo["run"].status == RunStatus.COMPLETED
    assert demo["readers"] == ["ada", "ben", "cleo"]  # dev has a fresh worklist


def test_the_report_renders_with_methods_tables_figures_and_cautions(demo):
    html = demo["html"]
    assert html.startswith("<!doctype html>")
    for section in ("methods", "progress", "tables", "figures", "cautions"):
        assert f'<section id="{section}">' in html
    for title in ("Agreement by landmark", "Consensus points", "Readers"):
        assert f">{title}</h3>" in html
    assert "<script" not in html and "<link" not in html  # self-contained: nothing to fetch
    assert html.count('src="data:image/svg+xml;base64,') == len(demo["figures"])
    assert "Research use only" in html


def test_the_report_has_every_figure_the_study_calls_for(demo):
    """One distance figure, one reader-pair Bland-Altman, one repeat-read Bland-Altman per
    reader with repeats, one drift figure per reader, one point cloud and one success-rate
    figure."""
    expected = 4 + len(demo["repeaters"]) + len(demo["readers"])
    assert len(demo["figures"]) == expected == 10  # 3 readers, all with repeat reads


def test_the_pdf_has_the_expected_number_of_figures(demo):
    pdf = demo["pdf"]
    assert pdf.startswith(b"%PDF-")
    assert pdf_figures(pdf) == len(demo["figures"]) == 10


def test_every_number_in_the_demo_methods_paragraph_matches_the_study(demo):
    """The demo's own parameters (studies.services.demo: 12 cases, 6 landmarks, 3 readers
    per case, 25% repeats after 14 days, tolerance 3 mm) and the run's counts."""
    study, run = demo["study"], demo["run"]
    text = re.search(r'<p id="methods-paragraph">(.*?)</p>', demo["html"], re.S).group(1)
    text = text.replace("&#x27;", "'")
    expected = {
        demo["n_cases"], demo["n_landmarks"], len(demo["readers"]), study.readers_per_case,
        100 * study.repeat_fraction, study.washout_days, run.n_reads, study.tolerance_mm,
        run.summary["parameters"]["outlier_multiple"], 1.96, 2.77, 0.5, 5.0,
        *DEFAULT_RADII_MM,  # the demo's simulated detector: success rates at these radii
    }
    found = set(numbers_in(text))
    assert found == {float(v) for v in expected}
    assert (demo["n_cases"], demo["n_landmarks"], study.readers_per_case) == (12, 6, 3)
    assert f"{demo['n_cases']} cases" in text and f"{run.n_reads} submitted reads" in text
    assert "25% of each reader's cases" in text and "at least 14 days" in text
