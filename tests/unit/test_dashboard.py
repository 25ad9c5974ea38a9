"""The results dashboard: pages, figures, CSV downloads, the analysis endpoint, and roles."""

from __future__ import annotations

import io

import pandas as pd
import pytest
from django.urls import reverse

from studies.models import AnalysisRun
from studies.services import analysis_runs
from tests.unit.test_analysis_runs import submit_all


def login(client, user):
    client.force_login(user)
    return client


def urls(slug: str) -> list[str]:
    """Every coordinator-only URL of the dashboard and the report."""
    def fig(kind: str, query: str = "") -> str:
        return reverse("viewer-dashboard-figure", kwargs={"slug": slug, "kind": kind}) + query

    return [
        reverse("viewer-dashboard", kwargs={"slug": slug}),
        fig("distances"), fig("repeat", "?reader=reader_a"),
        reverse("viewer-dashboard-csv", kwargs={"slug": slug, "name": "consensus"}),
        reverse("viewer-report", kwargs={"slug": slug}),
        reverse("viewer-report-pdf", kwargs={"slug": slug}),
        reverse("studies-study-analysis", kwargs={"slug": slug}),
    ]


def test_it_shows_progress_the_latest_run_and_its_tables(client, cast, analysed):
    study, run = analysed
    page = login(client, cast["pi"]).get(reverse("viewer-dashboard", kwargs={"slug": study.slug}))
    assert page.status_code == 200
    html = page.content.decode()
    assert "6 of 6 reads submitted" in html  # 3 cases x 2 readers, no repeats
    assert f"on {run.n_reads} reads" in html
    for title in ("Agreement by landmark", "Consensus points", "Readers"):
        assert f"{title} <a" in html
    success = reverse("viewer-dashboard-figure", kwargs={"slug": study.slug, "kind": "success"})
    assert success in html
    assert 'id="dashboard-config"' in html and "<script>" not in html  # config, no inline code


def test_every_figure_endpoint_returns_svg(client, cast, analysed):
    study, _ = analysed
    login(client, cast["pi"])
    queries = {"distances": "", "pair": "?reader_a=reader_a&reader_b=reader_b",
               "drift": "?reader=reader_b", "success": "",
               "points": f"?case={study.cases.first().pseudonym}&landmark=A"}
    for kind, query in queries.items():
        url = reverse("viewer-dashboard-figure", kwargs={"slug": study.slug, "kind": kind})
        response = client.get(url + query)
        assert response.status_code == 200, (kind, response.content[:200])
        assert response["Content-Type"] == "image/svg+xml"
        assert b"<svg" in response.content


def test_a_figure_with_a_bad_option_is_a_404(client, cast, analysed):
    study, _ = analysed
    login(client, cast["pi"])
    url = reverse("viewer-dashboard-figure", kwargs={"slug": study.slug, "kind": "drift"})
    assert client.get(url + "?reader=nobody").status_code == 404
    assert client.get(url).status_code == 404  # the reader is required
    other = reverse("viewer-dashboard-figure", kwargs={"slug": study.slug, "kind": "pie"})
    assert client.get(other).status_code == 404


@pytest.mark.parametrize("name", ["agreement_by_landmark", "consensus", "drift", "readers"])
def test_it_downloads_each_table_as_csv_with_every_column(client, cast, analysed, name):
    study, run = analysed
    response = login(client, cast["pi"]).get(
        reverse("viewer-dashboard-csv", kwargs={"slug": study.slug, "name": name}))
    assert response.status_code == 200
    assert response["Content-Disposition"] == f'attachment; filename="{study.slug}-{name}.csv"'
    frame = pd.read_csv(io.StringIO(response.content.decode()))
    if name == "readers":
        assert list(frame["reader"]) == ["reader_a", "reader_b"]
        assert set(frame["drift_state"]) <= {"alarm", "trend", "stable"}
    else:
        stored = analysis_runs.frame_of(run.tables[name])
        assert list(frame.columns) == list(stored.columns) and len(frame) == len(stored)


def test_an_unknown_table_or_no_completed_run_is_a_404(client, cast, open_study):
    login(client, cast["pi"])
    url = reverse("viewer-dashboard-csv", kwargs={"slug": open_study.slug, "name": "consensus"})
    assert client.get(url).status_code == 404  # nothing has been analysed
    assert client.get(reverse("viewer-report", kwargs={"slug": open_study.slug})).status_code == 404
    page = client.get(reverse("viewer-dashboard", kwargs={"slug": open_study.slug}))
    assert page.status_code == 200 and b"No analysis has been run yet" in page.content


def test_a_reader_gets_403_and_an_outsider_404_everywhere(client, cast, analysed):
    """Access rule (studies.access): outsiders do not see the study exists; members without
    the coordinator role are refused."""
    study, _ = analysed
    for user, expected in ((cast["reader_a"], 403), (cast["outsider"], 404)):
        login(client, user)
        for url in urls(study.slug):
            assert client.get(url).status_code == expected, (user.username, url)
        run_url = reverse("viewer-dashboard-run", kwargs={"slug": study.slug})
        assert client.post(run_url).status_code == expected
        client.logout()


def test_an_anonymous_visitor_is_sent_to_sign_in(client, analysed):
    study, _ = analysed
    response = client.get(reverse("viewer-dashboard", kwargs={"slug": study.slug}))
    assert response.status_code == 302 and reverse("viewer-login") in response["Location"]
    api = client.get(reverse("studies-study-analysis", kwargs={"slug": study.slug}))
    assert api.status_code == 403


def test_the_analysis_endpoint_reports_the_latest_run(client, cast, analysed):
    study, run = analysed
    data = login(client, cast["pi"]).get(
        reverse("studies-study-analysis", kwargs={"slug": study.slug})).json()
    assert data["code"] == str(run.code) and data["status"] == "completed"
    assert data["progress"] == 1.0 and data["n_reads"] == run.n_reads


def test_running_now_queues_a_run_when_the_placements_changed(client, cast, open_study,
                                                               django_capture_on_commit_callbacks):
    submit_all(open_study, cast["reader_a"])
    submit_all(open_study, cast["reader_b"])
    AnalysisRun.objects.all().delete()
    login(client, cast["pi"])
    url = reverse("studies-study-analysis", kwargs={"slug": open_study.slug})
    with django_capture_on_commit_callbacks(execute=False) as callbacks:
        response = client.post(url)
    assert response.status_code == 202 and response.json()["status"] == "pending"
    assert len(callbacks) == 1  # one task sent after commit
    again = client.post(reverse("viewer-dashboard-run", kwargs={"slug": open_study.slug}))
    assert again.status_code == 302
    assert AnalysisRun.objects.filter(study=open_study).count() == 1  # folded into the waiting run


def test_the_analysis_endpoint_is_in_the_openapi_schema(client, cast):
    login(client, cast["pi"])
    schema = client.get(reverse("studies-schema")).content.decode()
    assert "/api/v1/studies/{slug}/analysis/" in schema


def test_the_study_page_links_to_the_dashboard(client, cast, open_study):
    page = login(client, cast["pi"]).get(reverse("viewer-study", kwargs={"slug": open_study.slug}))
    assert reverse("viewer-dashboard", kwargs={"slug": open_study.slug}).encode() in page.content


def test_the_progress_shows_each_reader_and_no_projection_until_everyone_has_a_pace(
        client, cast, open_study):
    """reader_a has submitted all 3 reads, reader_b none: the study's completion cannot be
    projected yet (reader_b has no pace)."""
    submit_all(open_study, cast["reader_a"])
    page = login(client, cast["pi"]).get(reverse("viewer-dashboard",
                                                 kwargs={"slug": open_study.slug}))
    html = page.content.decode()
    assert "3 of 6 reads submitted" in html
    assert "0 repeat reads waiting in washout" in html
    assert 'id="projected">not known yet<' in html
    rows = html.split('id="progress-readers"')[1].split("</table>")[0]
    assert rows.count("<tr>") == 3  # heading + two readers
    assert ">done<" in rows and ">not started<" in rows


def test_the_report_is_self_contained_and_may_use_its_own_styles(client, cast, analysed):
    """The report carries its styles in a <style> element (so it works as a saved file); its
    page policy allows inline styles and no script at all."""
    study, _ = analysed
    response = login(client, cast["pi"]).get(
        reverse("viewer-report", kwargs={"slug": study.slug}) + "?download=1")
    assert response.status_code == 200
    assert response["Content-Disposition"] == f'attachment; filename="{study.slug}-report.html"'
    policy = response["Content-Security-Policy"]
    assert "style-src 'unsafe-inline'" in policy and "script-src 'none'" in policy
    html = response.content.decode()
    assert "<style>" in html and "<script" not in html


def test_a_scored_detector_joins_the_success_rate_figure_and_the_methods(client, cast, analysed):
    """Detector points 1 mm from the consensus along x: its radial errors are all 1 mm, so
    its success rate is 0 below 1 mm and 1 above (SDR definition, check-values section 7)."""
    from studies.constants import DetectorStatus
    from studies.models import DetectorRun
    from studies.reporting import report

    study, run = analysed
    consensus = analysis_runs.frame_of(run.tables["consensus"]).dropna(subset=["x_mm"])
    predictions = [{"case": r.case, "landmark": r.landmark, "x_mm": r.x_mm + 1.0,
                    "y_mm": r.y_mm, "z_mm": r.z_mm, "detector": "auto"}
                   for r in consensus.itertuples()]
    stored = {"columns": ["case", "landmark", "x_mm", "y_mm", "z_mm"],  # as an upload stores
              "data": [[p["case"], p["landmark"], p["x_mm"], p["y_mm"], p["z_mm"]]
                       for p in predictions]}
    DetectorRun.objects.create(study=study, name="auto", uploaded_by=cast["pi"],
                               predictions=stored, status=DetectorStatus.COMPLETED)
    svg = login(client, cast["pi"]).get(reverse(
        "viewer-dashboard-figure", kwargs={"slug": study.slug, "kind": "success"})).content
    assert b'id="success-auto"' in svg
    from studies.reporting import quantities

    derived = quantities.derive(analysis_runs.placements_table(study), study.consensus_method)
    name, errors = quantities.detector_errors(derived, pd.DataFrame(predictions))
    assert name == "auto" and len(errors) == len(consensus)
    assert errors == pytest.approx([1.0] * len(consensus), abs=1e-9)
    text = report.methods(report.methods_parameters(study, run)).text
    assert "The automatic detector auto" in text


def test_the_dashboard_sums_up_the_latest_detector_against_the_readers(client, cast, analysed):
    """Detector points 1 mm from the consensus along x: its MRE is 1.00 mm on every
    landmark (radial error definition, check-values section 7); the Williams verdicts are
    the stored table's; a detector scored on other placements is marked as such."""
    from studies.models import DetectorRun
    from studies.services import predictions

    study, run = analysed
    consensus = analysis_runs.frame_of(run.tables["consensus"]).dropna(subset=["x_mm"])
    lines = ["case,landmark,x_mm,y_mm,z_mm,detector"] + [
        f"{r.case},{r.landmark},{r.x_mm + 1.0!r},{r.y_mm!r},{r.z_mm!r},plus-one"
        for r in consensus.itertuples()]
    predictions.upload_predictions(study, cast["pi"], ("\n".join(lines) + "\n").encode())
    page = login(client, cast["pi"]).get(reverse("viewer-dashboard", args=[study.slug]))
    html = page.content.decode()
    card = html[html.index('id="detector"'):html.index('id="figures"')]
    assert "Detector against the readers: plus-one" in card and "changed since" not in card
    williams = predictions.latest_detector_tables(study)["williams"]
    for landmark in sorted(set(consensus["landmark"])):
        assert f"<tr><td>{landmark}</td><td>1.00</td>" in card
    for verdict in williams["verdict"]:
        assert verdict in card
    DetectorRun.objects.filter(study=study).update(analysis_input_digest="other placements")
    html = client.get(reverse("viewer-dashboard", args=[study.slug])).content.decode()
    assert "Reads or settings changed since" in html
