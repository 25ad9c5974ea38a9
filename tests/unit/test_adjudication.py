"""Adjudication: the queue, decisions as append-only events, access, the final point."""

from __future__ import annotations

import uuid
from pathlib import Path

import numpy as np
import pytest
from django.core.exceptions import PermissionDenied
from django.http import Http404
from django.urls import reverse
from rest_framework.test import APIClient

from studies.access import get_review_case
from studies.constants import AdjudicationDecision
from studies.models import AdjudicationEvent, AnalysisRun
from studies.services import adjudication
from studies.services.errors import ConflictError, ServiceError
from tests.unit.results_study import CLICK_B, analysed


@pytest.fixture
def results(cast, django_user_model, settings, tmp_path):
    return analysed(cast, django_user_model, Path(settings.CAIRN_DATA_DIR), tmp_path)


ACCEPT, TAKE, NEW = (
    AdjudicationDecision.ACCEPT_CONSENSUS,
    AdjudicationDecision.TAKE_READER,
    AdjudicationDecision.NEW_POINT,
)


def decide(case, user, decision, reason="checked on the sagittal view", **fields):
    data = adjudication.DecisionInput(decision, reason, uuid.uuid4(), **fields)
    return adjudication.record_decision(case, "B", user, data)[0]


def flagged_cases(results):
    items = adjudication.adjudication_queue(results.study)
    return [results.study.cases.get(pseudonym=i.case) for i in items]


def test_it_queues_the_flagged_pairs_worst_first(results) -> None:
    """Reader b is 4 voxels of 1.7 mm (6.8 mm) off on one case and 4 of 0.9 mm (3.6 mm) on
    another; with a 3 mm tolerance both are flagged for spread, the 6.8 mm one first; the
    case where both readers agree is not queued. Distances: plain geometry of the clicks."""
    items = adjudication.adjudication_queue(results.study)
    assert [i.landmark for i in items] == ["B", "B"]
    # 1e-6 mm: the NIfTI header stores the affine as float32.
    np.testing.assert_allclose([i.spread_mm for i in items], [6.8, 3.6], atol=1e-6)
    assert all("spread" in i.reasons and i.decision is None for i in items)
    assert len(adjudication.queued_cases(results.study)) == 2


def test_accepting_the_consensus_records_the_consensus_point(results, cast) -> None:
    case = flagged_cases(results)[0]
    event = decide(case, cast["adjudicator"], ACCEPT)
    row = adjudication.consensus_row(results.run, case, case.study.landmarks.get(code="B"))
    assert (event.x_mm, event.y_mm, event.z_mm) == (row["x_mm"], row["y_mm"], row["z_mm"])
    assert event.analysis_run == results.run
    final = adjudication.reference_table(results.study, results.run)
    hit = final[(final["case"] == case.pseudonym) & (final["landmark"] == "B")].iloc[0]
    assert hit["method"] == "adjudicated" and hit["decision"] == ACCEPT
    assert hit["se_mm"] == row["se_mm"]


def test_taking_a_reader_copies_that_readers_point_exactly(results, cast) -> None:
    case = flagged_cases(results)[0]
    read = case.reads.get(reader=cast["reader_a"])
    placement = read.placements.get(landmark__code="B")
    event = decide(case, cast["adjudicator"], TAKE, source_read=str(read.code))
    assert (event.x_mm, event.y_mm, event.z_mm) == (placement.x_mm, placement.y_mm, placement.z_mm)
    np.testing.assert_allclose(
        [placement.i_vox, placement.j_vox, placement.k_vox], CLICK_B, atol=1e-9
    )
    final = adjudication.reference_table(results.study, results.run)
    hit = final[(final["case"] == case.pseudonym) & (final["landmark"] == "B")].iloc[0]
    assert np.isnan(hit["se_mm"]) and hit["adjudicator"] == "adj"


def test_a_revision_is_a_new_event_and_the_latest_counts(results, cast) -> None:
    case = flagged_cases(results)[0]
    first = decide(case, cast["adjudicator"], ACCEPT)
    xyz = np.array(case.affine)[:3, 3] + 1.0
    second = decide(
        case,
        cast["pi"],
        NEW,
        reason="both readers missed the tip",
        x_mm=float(xyz[0]),
        y_mm=float(xyz[1]),
        z_mm=float(xyz[2]),
    )
    history = adjudication.decision_history(case, case.study.landmarks.get(code="B"))
    assert [e.pk for e in history] == [first.pk, second.pk]
    final = adjudication.reference_table(results.study, results.run)
    hit = final[(final["case"] == case.pseudonym) & (final["landmark"] == "B")].iloc[0]
    assert (hit["x_mm"], hit["decision"], hit["adjudicator"]) == (xyz[0], NEW, "pi")


def test_decisions_cannot_be_changed_or_deleted(results, cast) -> None:
    event = decide(flagged_cases(results)[0], cast["adjudicator"], ACCEPT)
    event.reason = "edited"
    with pytest.raises(PermissionError):
        event.save()
    with pytest.raises(PermissionError):
        event.delete()
    with pytest.raises(PermissionError):
        AdjudicationEvent.objects.all().delete()
    with pytest.raises(PermissionError):
        AdjudicationEvent.objects.update(reason="x")


def test_a_retried_decision_is_stored_once(results, cast) -> None:
    case = flagged_cases(results)[0]
    data = adjudication.DecisionInput(ACCEPT, "fine", uuid.uuid4())
    first, created = adjudication.record_decision(case, "B", cast["adjudicator"], data)
    again, created_again = adjudication.record_decision(case, "B", cast["adjudicator"], data)
    assert created and not created_again and first.pk == again.pk
    assert AdjudicationEvent.objects.count() == 1


@pytest.mark.parametrize(
    ("decision", "fields", "reason", "words"),
    [
        (ACCEPT, {}, "  ", "reason"),
        (ACCEPT, {}, "x" * 201, "201 characters"),
        ("guess", {}, "fine", "'guess'"),
        (NEW, {"x_mm": 1e4, "y_mm": 0.0, "z_mm": 0.0}, "fine", "outside the volume"),
        (NEW, {"x_mm": None, "y_mm": 0.0, "z_mm": 0.0}, "fine", "x_mm, y_mm and z_mm"),
        (TAKE, {"source_read": str(uuid.uuid4())}, "fine", "not a submitted read"),
        (TAKE, {"source_read": "no-such-read"}, "fine", "'no-such-read' is not a submitted read"),
    ],
)
def test_it_refuses_bad_decisions_and_stores_nothing(
    results, cast, decision, fields, reason, words
) -> None:
    case = flagged_cases(results)[0]
    with pytest.raises(ServiceError, match=words):
        decide(case, cast["adjudicator"], decision, reason=reason, **fields)
    assert AdjudicationEvent.objects.count() == 0


def test_it_refuses_a_pair_that_is_not_flagged(results, cast) -> None:
    case = flagged_cases(results)[0]
    data = adjudication.DecisionInput(ACCEPT, "fine", uuid.uuid4())
    with pytest.raises(ServiceError, match="not flagged"):
        adjudication.record_decision(case, "A", cast["adjudicator"], data)


def test_a_decision_based_on_an_older_analysis_is_a_conflict(results, cast) -> None:
    case = flagged_cases(results)[0]
    stale = AnalysisRun.objects.create(study=results.study)
    data = adjudication.DecisionInput(ACCEPT, "fine", uuid.uuid4(), run=str(stale.code))
    with pytest.raises(ConflictError, match="reload"):
        adjudication.record_decision(case, "B", cast["adjudicator"], data)


def test_only_coordinators_and_adjudicators_reach_the_review(results, cast) -> None:
    """Outsiders get a 404, readers a 403; adjudicators only queued cases."""
    slug = results.study.slug
    queued = flagged_cases(results)[0]
    calm = results.study.cases.exclude(pseudonym__in=adjudication.queued_cases(results.study)).get()
    assert get_review_case(cast["adjudicator"], slug, str(queued.code)) == queued
    assert get_review_case(cast["pi"], slug, str(calm.code)) == calm
    with pytest.raises(Http404):
        get_review_case(cast["adjudicator"], slug, str(calm.code))
    with pytest.raises(PermissionDenied):
        get_review_case(cast["reader_a"], slug, str(queued.code))
    with pytest.raises(Http404):
        get_review_case(cast["outsider"], slug, str(queued.code))


def test_the_review_api_shows_every_reader_to_the_adjudicator_only(results, cast) -> None:
    case = flagged_cases(results)[0]
    url = reverse(
        "studies-review-detail",
        kwargs={"slug": results.study.slug, "case": case.code, "landmark": "B"},
    )
    client = APIClient()
    for name, status in (("reader_a", 403), ("outsider", 404), ("adjudicator", 200)):
        client.force_authenticate(cast[name])
        assert client.get(url).status_code == status, name
    body = client.get(url).json()
    assert sorted(r["reader"] for r in body["readers"]) == ["reader_a", "reader_b"]
    assert body["case_label"] is None and body["consensus"]["flagged"] is True
    response = client.post(
        body["api"]["decisions"],
        {
            "client_event_id": str(uuid.uuid4()),
            "decision": TAKE,
            "reason": "sharper edge",
            "source_read": body["readers"][1]["read"],
            "run": body["analysis_run"],
        },
        format="json",
    )
    assert response.status_code == 201, response.content
    assert response.json()["decision"]["source_reader"] == body["readers"][1]["reader"]
    queue = client.get(reverse("studies-adjudication-queue", kwargs={"slug": results.study.slug}))
    decided = [i for i in queue.json()["items"] if i["decision"]]
    assert [i["case"] for i in decided] == [case.pseudonym]


def test_the_pages_route_a_decision_through_the_review_form(results, cast) -> None:
    """Queue page -> review page -> form POST -> back on the queue with the pair decided."""
    from django.test import Client

    slug = results.study.slug
    client = Client()
    client.force_login(cast["adjudicator"])
    queue = client.get(f"/studies/{slug}/adjudication/").content.decode()
    item = adjudication.adjudication_queue(results.study)[0]
    review_url = f"/studies/{slug}/review/{item.case_code}/B/"
    assert review_url in queue and 'data-state="open"' in queue
    page = client.get(review_url)
    assert page.status_code == 200 and b"reader_a" in page.content and b"reader_b" in page.content
    form = {
        "choice": "accept_consensus",
        "reason": "consensus sits on the edge",
        "client_event_id": str(uuid.uuid4()),
        "run": str(results.run.code),
    }
    assert client.post(review_url, {**form, "reason": ""}).status_code == 400
    response = client.post(review_url, form)
    assert response.status_code == 302 and response["Location"].endswith("/adjudication/")
    assert 'data-state="decided"' in client.get(f"/studies/{slug}/adjudication/").content.decode()
    for name, status in (("reader_a", 403), ("outsider", 404)):
        other = Client()
        other.force_login(cast[name])
        assert other.get(review_url).status_code == status, name
    pi = Client()
    pi.force_login(cast["pi"])
    exports_page = pi.get(f"/studies/{slug}/exports/").content.decode()
    assert "reference_set.csv" in exports_page and "1 adjudication decision " in exports_page
