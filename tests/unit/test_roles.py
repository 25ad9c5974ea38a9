"""Role tests: every page and API endpoint as anonymous, reader, adjudicator, a reader of
another study, a coordinator of another study, and the study's own coordinator.

The rule (studies/access.py, the study design's blinding section): anonymous visitors are
sent to sign in (pages) or refused (API, 403 from session authentication); someone with
no role in the study gets 404 (it does not exist for them); a member without the needed
role gets 403; a reader reaches only their own reads (404 for everyone else). The URL
names come from the URL conf itself, so a new endpoint fails
`test_it_has_an_expectation_for_every_named_url` until its row is added here.
"""

from __future__ import annotations

import json
import uuid
from dataclasses import dataclass, field
from datetime import timedelta
from pathlib import Path

import pytest
from django.db import transaction
from django.test import Client
from django.urls import reverse
from django.utils import timezone

from studies.constants import Role
from studies.imaging.storage import write_case_files
from studies.services import cases, studies
from tests.conftest import tiny_volume

from .url_walk import all_urls, leaves

PERSONAS = (
    "anonymous",
    "reader",
    "adjudicator",
    "other_reader",
    "other_coordinator",
    "coordinator",
)
LOGIN = "login"  # 302 to the sign-in page with ?next=
ALLOWED = "allowed"  # past the access check: 2xx, a redirect of the page's own, 400 or 409
ALLOWED_STATUSES = {200, 201, 302, 400, 409}


@dataclass(frozen=True)
class Expect:
    """Expected outcome per persona for one URL name, with its kwargs and method."""

    outcomes: dict
    kwargs: str = "none"  # which kwargs builder (see `kwargs_for`)
    method: str = "get"
    body: dict | None = None
    extra: dict = field(default_factory=dict)  # persona -> extra accepted statuses


def _rows(anonymous, reader, adjudicator, other_reader, other, coordinator) -> dict:
    """One outcome per persona, in the order of PERSONAS.

    `other_reader` reads in another study and has no role in this one: like the other
    coordinator, this study does not exist for them (404), but their own pages work.
    """
    outcomes = (anonymous, reader, adjudicator, other_reader, other, coordinator)
    return dict(zip(PERSONAS, outcomes, strict=True))


COORDINATOR_PAGE = _rows(LOGIN, 403, 403, 404, 404, 200)
COORDINATOR_ACTION = _rows(LOGIN, 403, 403, 404, 404, ALLOWED)
COORDINATOR_API = _rows(403, 403, 403, 404, 404, ALLOWED)
OWN_READ_API = _rows(403, 200, 404, 404, 404, 404)
OWN_READ_ACTION = _rows(403, ALLOWED, 404, 404, 404, 404)
REVIEW_API = _rows(403, 403, 404, 404, 404, ALLOWED)  # the adjudicator's queue is empty here
ANY_USER_API = _rows(403, 200, 200, 200, 200, 200)
PUBLIC = _rows(200, 200, 200, 200, 200, 200)

EXPECTED: dict[str, Expect] = {
    # pages
    "viewer-home": Expect(_rows(LOGIN, 200, 200, 200, 200, 200)),
    "viewer-login": Expect(_rows(200, 302, 302, 302, 302, 302)),
    "viewer-logout": Expect(_rows(302, 302, 302, 302, 302, 302), method="post"),
    "viewer-password-change": Expect(_rows(LOGIN, 200, 200, 200, 200, 200)),
    "viewer-study": Expect(COORDINATOR_PAGE, "slug"),
    "viewer-read": Expect(_rows(LOGIN, 200, 404, 404, 404, 404), "read"),
    # only staff and coordinators (of any study) may create a study
    "viewer-study-new": Expect(_rows(LOGIN, 403, 403, 403, 200, 200)),
    "viewer-study-edit": Expect(COORDINATOR_PAGE, "slug"),
    "viewer-study-protocol": Expect(COORDINATOR_PAGE, "slug"),
    "viewer-study-protocol-export": Expect(COORDINATOR_PAGE, "export"),
    "viewer-study-members": Expect(COORDINATOR_PAGE, "slug"),
    "viewer-study-member-remove": Expect(COORDINATOR_ACTION, "slug", method="post"),
    "viewer-study-preview": Expect(COORDINATOR_PAGE, "slug"),
    "viewer-study-open": Expect(COORDINATOR_ACTION, "slug", method="post"),
    "viewer-study-close": Expect(COORDINATOR_ACTION, "slug", method="post"),
    # reading API
    "studies-study-list": Expect(ANY_USER_API),
    "studies-worklist": Expect(ANY_USER_API),
    "studies-read-detail": Expect(OWN_READ_API, "read"),
    "studies-read-volume": Expect(OWN_READ_API, "read_volume"),
    "studies-read-events": Expect(OWN_READ_ACTION, "read", method="post", body={}),
    "studies-read-submit": Expect(OWN_READ_ACTION, "read", method="post"),
    "studies-read-activity": Expect(OWN_READ_ACTION, "read", method="post", body={"seconds": 1.0}),
    # adjudication and review
    "studies-adjudication-queue": Expect(_rows(403, 403, 200, 404, 404, 200), "slug"),
    "studies-review-detail": Expect(REVIEW_API, "review"),
    "studies-review-decisions": Expect(REVIEW_API, "review", method="post", body={}),
    "studies-review-volume": Expect(REVIEW_API, "review_volume"),
    # exports and detector predictions (coordinators only)
    "studies-export-reference": Expect(COORDINATOR_API, "reference"),
    "studies-export-events": Expect(COORDINATOR_API, "slug"),
    # no analysis has run in the fixture, so the coordinator's table request finds no table
    "studies-export-table": Expect(COORDINATOR_API, "table", extra={"coordinator": {404}}),
    "studies-export-archive": Expect(COORDINATOR_API, "slug"),
    "studies-predictions": Expect(COORDINATOR_API, "slug"),
    "studies-study-analysis": Expect(COORDINATOR_API, "slug"),
    # results dashboard, report, audit (no analysis has run in the fixture: the coordinator
    # may get a 404 for a figure, table or report that does not exist yet)
    "viewer-dashboard": Expect(COORDINATOR_PAGE, "slug"),
    "viewer-dashboard-run": Expect(COORDINATOR_ACTION, "slug", method="post"),
    "viewer-dashboard-figure": Expect(COORDINATOR_PAGE, "figure", extra={"coordinator": {404}}),
    "viewer-dashboard-csv": Expect(COORDINATOR_PAGE, "table", extra={"coordinator": {404}}),
    "viewer-report": Expect(COORDINATOR_PAGE, "slug", extra={"coordinator": {404}}),
    "viewer-report-pdf": Expect(COORDINATOR_PAGE, "slug", extra={"coordinator": {404}}),
    "viewer-study-audit": Expect(COORDINATOR_PAGE, "slug"),
    "viewer-study-audit-csv": Expect(COORDINATOR_PAGE, "slug"),
    # adjudication pages: adjudicators see the queue, and only queued cases (none here)
    "viewer-adjudication": Expect(_rows(LOGIN, 403, 200, 404, 404, 200), "slug"),
    "viewer-review": Expect(_rows(LOGIN, 403, 404, 404, 404, ALLOWED), "review"),
    "viewer-exports": Expect(COORDINATOR_PAGE, "slug"),
    "viewer-predictions": Expect(COORDINATOR_PAGE, "slug"),
    # case upload (no upload job exists in the fixture: its status pages are 404 for all)
    "viewer-study-upload": Expect(COORDINATOR_PAGE, "slug"),
    "viewer-study-upload-status": Expect(COORDINATOR_PAGE, "job", extra={"coordinator": {404}}),
    "viewer-study-upload-progress": Expect(
        COORDINATOR_PAGE, "job", extra={"coordinator": {404}}
    ),
    # the API schema and its docs page hold no study data
    "studies-schema": Expect(PUBLIC),
    "studies-docs": Expect(PUBLIC),
}


def open_other_study(coordinator, reader, data_dir: Path):
    """Another open study, one tiny case, read by `reader` alone (who has a read in it)."""
    other = studies.create_study(
        name="Other study", slug="other-study", coordinator=coordinator, readers_per_case=1
    )
    studies.set_protocol(other, [{"code": "A", "name": "Point A"}])
    volume = tiny_volume(seed=7)
    stored = write_case_files(data_dir, f"o/{uuid.uuid4().hex}", volume)
    cases.create_case(other, stored, checksum=volume.checksum, label="other-case")
    studies.add_member(other, reader, Role.READER)
    return studies.open_study(other, now=timezone.now() - timedelta(days=1))


@pytest.fixture
def people(open_study, cast, django_user_model, settings):
    """The six personas, and the objects the URLs are built from."""
    adjudicator = django_user_model.objects.create_user("adjudicator", password="pw-adj")
    studies.add_member(open_study, adjudicator, Role.ADJUDICATOR)
    other = django_user_model.objects.create_user("other_coordinator", password="pw-oc")
    other_reader = django_user_model.objects.create_user("other_reader", password="pw-or")
    other_study = open_other_study(other, other_reader, Path(settings.CAIRN_DATA_DIR))
    users = {
        "anonymous": None,
        "reader": cast["reader_a"],
        "adjudicator": adjudicator,
        "other_reader": other_reader,
        "other_coordinator": other,
        "coordinator": cast["pi"],
    }
    read = open_study.reads.filter(reader=cast["reader_a"]).order_by("worklist_position")[0]
    return {
        "users": users,
        "study": open_study,
        "read": read,
        "case": read.case,
        "other_study": other_study,
    }


def kwargs_for(kind: str, objects: dict) -> dict:
    study, read, case = objects["study"], objects["read"], objects["case"]
    return {
        "none": {},
        "slug": {"slug": study.slug},
        "read": {"code": read.code},
        "read_volume": {"code": read.code, "level": "full"},
        "export": {"slug": study.slug, "fmt": "csv"},
        "review": {"slug": study.slug, "case": case.code, "landmark": "A"},
        "review_volume": {"slug": study.slug, "case": case.code, "level": "full"},
        "reference": {"slug": study.slug, "fmt": "csv"},
        "table": {"slug": study.slug, "name": "agreement"},
        "figure": {"slug": study.slug, "kind": "pair"},
        "job": {"slug": study.slug, "job": "no-such-job"},
    }[kind]


def client_for(user) -> Client:
    client = Client(raise_request_exception=False)
    if user is not None:
        client.force_login(user)
    return client


def call(client: Client, method: str, path: str, body: dict | None):
    """One request whose changes are rolled back, so every persona meets the same state."""
    with transaction.atomic():
        if method == "post" and body is not None:
            response = client.post(path, json.dumps(body), content_type="application/json")
        else:
            response = getattr(client, method)(path)
        transaction.set_rollback(True)
    return response


def outcome_ok(expected, response, extra: set) -> bool:
    status = response.status_code
    if status in extra:
        return True
    if expected == LOGIN:
        return status == 302 and response["Location"].startswith(reverse("viewer-login") + "?next=")
    if expected == ALLOWED:
        return status in ALLOWED_STATUSES
    return status == expected


def test_it_has_an_expectation_for_every_named_url(db) -> None:
    """Every URL name outside the admin has a row in EXPECTED (and no row is stale)."""
    names = {leaf.name for leaf in leaves() if not leaf.name.startswith("admin:")}
    assert names - set(EXPECTED) == set(), "add these URL names to EXPECTED"
    assert set(EXPECTED) - names == set(), "these EXPECTED rows name no URL"


@pytest.mark.parametrize("persona", PERSONAS)
def test_it_gives_each_persona_exactly_its_access(people, persona) -> None:
    """Each URL name as one persona, against the table above."""
    user = people["users"][persona]
    wrong = []
    for name, expect in EXPECTED.items():
        path = reverse(name, kwargs=kwargs_for(expect.kwargs, people))
        response = call(client_for(user), expect.method, path, expect.body)
        wanted = expect.outcomes[persona]
        if not outcome_ok(wanted, response, expect.extra.get(persona, set())):
            wrong.append(
                f"{expect.method.upper()} {name} {path}: {response.status_code}, expected {wanted}"
            )
    assert not wrong, "\n".join(wrong)


def test_a_reader_of_another_study_keeps_their_own_pages_and_sees_none_of_this_one(
    people,
) -> None:
    """The other study's reader: home, worklist and their own read work; this study is 404.

    The walk above checks status codes; this checks what the 200s hold (the access rule
    of studies/access.py: an outsider to a study is told nothing about it).
    """
    study, other_study = people["study"], people["other_study"]
    user = people["users"]["other_reader"]
    own = other_study.reads.get(reader=user)
    client = client_for(user)

    worklist = client.get(reverse("studies-worklist"))
    assert worklist.status_code == 200
    assert [r["code"] for r in worklist.json()["reads"]] == [str(own.code)]

    listed = client.get(reverse("studies-study-list")).json()["studies"]
    assert [(s["slug"], s["roles"]) for s in listed] == [(other_study.slug, [Role.READER])]

    home = client.get(reverse("viewer-home"))
    assert home.status_code == 200
    page = home.content.decode()
    assert other_study.name in page and study.name not in page

    assert client.get(reverse("studies-read-detail", kwargs={"code": own.code})).status_code == 200
    assert client.get(reverse("viewer-read", kwargs={"code": own.code})).status_code == 200
    this_read = reverse("studies-read-detail", kwargs={"code": people["read"].code})
    assert client.get(this_read).status_code == 404
    this_study = reverse("viewer-study", kwargs={"slug": study.slug})
    assert client.get(this_study).status_code == 404


@pytest.mark.parametrize("persona", PERSONAS)
def test_it_refuses_post_only_actions_on_get(people, persona) -> None:
    """GET on an action that changes state is 405 once signed in (and changes nothing)."""
    user = people["users"][persona]
    for name in ("viewer-study-open", "viewer-study-close"):
        path = reverse(name, kwargs=kwargs_for("slug", people))
        response = call(client_for(user), "get", path, None)
        expected = 302 if user is None else 405
        assert response.status_code == expected, (name, persona, response.status_code)
    people["study"].refresh_from_db()
    assert people["study"].status == "open"


def test_it_keeps_the_admin_closed_to_everyone_without_staff_access(people, admin_user) -> None:
    """Every admin URL (walked from the URL conf) sends non-staff users away; staff get in.

    Only the admin's own sign-in page answers 200; everything else redirects (to that
    page, or from an object's address to its change page, which redirects in turn).
    """
    study, read = people["study"], people["read"]
    values = {
        ("str", "*"): [str(read.pk)],
        ("path", "*"): [str(read.pk)],
        ("regex", "app_label"): ["studies"],
        ("regex", "url"): ["no-such-page"],
        ("uuid", "*"): [str(read.code)],
        ("slug", "*"): [study.slug],
    }
    admin_urls = [url for url in all_urls(values) if url.leaf.name.startswith("admin:")]
    assert len(admin_urls) > 20
    wrong = []
    for persona, user in people["users"].items():
        client = client_for(user)
        for url in admin_urls:
            response = client.get(url.path)
            allowed = {200} if url.leaf.name == "admin:login" else {301, 302, 405}
            if response.status_code not in allowed:
                wrong.append(f"{persona} GET {url.path}: {response.status_code}")
    assert not wrong, "\n".join(wrong)
    staff = client_for(admin_user)
    assert staff.get(reverse("admin:index")).status_code == 200
