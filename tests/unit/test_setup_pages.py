"""The coordinator's set-up pages: create, edit, protocol, members, preview, open, close.

Bad input gets a clear message and changes nothing; an open study's protocol changes
only through an explicit new protocol version; a closed study's not at all. The
preview's expected consensus error is checked against scipy's Maxwell distribution (the
length of an isotropic 3D Gaussian error is Maxwell distributed with the per-axis SD as
scale: common practice, e.g. Johnson, Kotz & Balakrishnan, from memory), and its reads
per reader against the reads the assignment actually creates on opening.
"""

from __future__ import annotations

import json
import math
import uuid
from pathlib import Path

import pytest
from django.contrib.messages import get_messages
from django.core.files.uploadedfile import SimpleUploadedFile
from django.test import Client
from scipy import stats

from studies.constants import Role, StudyStatus
from studies.models import Membership, Study
from studies.services import cases, reads, studies
from studies.services.errors import ServiceError
from tests.conftest import tiny_volume

DESIGN = {
    "readers_per_case": 2,
    "repeat_fraction": 0.5,
    "washout_days": 7,
    "seed": 11,
    "tolerance_mm": 2.5,
    "max_readers_per_case": 3,
    "consensus_method": "geomedian",
}


def login(user) -> Client:
    client = Client()
    client.force_login(user)
    return client


def snapshot(study: Study) -> dict:
    """Everything a refused request must leave as it was."""
    study.refresh_from_db()
    return {
        "study": {f.name: getattr(study, f.name) for f in Study._meta.fields},
        "landmarks": list(study.landmarks.values_list("protocol_version", "code", "name")),
        "members": sorted(study.memberships.values_list("user__username", "role")),
        "reads": list(study.reads.values_list("pk", "protocol_version", "status")),
        "studies": Study.objects.count(),
    }


def protocol_post(rows: list[dict], **extra) -> dict:
    data = {
        "lm-TOTAL_FORMS": str(len(rows)),
        "lm-INITIAL_FORMS": "0",
        "lm-MIN_NUM_FORMS": "0",
        "lm-MAX_NUM_FORMS": "1000",
        "action": "save",
    }
    for index, row in enumerate(rows):
        for key, value in row.items():
            if key == "may_be_absent":
                if value:
                    data[f"lm-{index}-may_be_absent"] = "on"
            else:
                data[f"lm-{index}-{key}"] = str(value)
    data.update(extra)
    return data


@pytest.fixture
def draft_study(cast, settings):
    """A draft study ready to open: two landmarks, three tiny cases, two readers, k = 2."""
    from studies.imaging.storage import write_case_files

    study = studies.create_study(
        name="Draft study", slug="draft-study", coordinator=cast["pi"], **DESIGN
    )
    studies.set_protocol(study, [{"code": "A", "name": "Point A"}, {"code": "B", "name": "B"}])
    for index in range(3):
        volume = tiny_volume(seed=10 + index)
        stored = write_case_files(Path(settings.CAIRN_DATA_DIR), f"d/{uuid.uuid4().hex}", volume)
        cases.create_case(study, stored, checksum=volume.checksum, label=f"draft-{index}")
    for name in ("reader_a", "reader_b"):
        studies.add_member(study, cast[name], Role.READER)
    return study


def new_study_form(**overrides) -> dict:
    data = {"name": "Knee pilot", "slug": "knee-pilot", "description": "Invented.", **DESIGN}
    data.update(overrides)
    return {key: value for key, value in data.items() if value is not None}


# ----------------------------------------------------------------------------- creating


def test_it_creates_a_draft_study_with_its_creator_as_coordinator(draft_study, cast) -> None:
    response = login(cast["pi"]).post("/new-study/", new_study_form(adaptive_reads="on"))
    assert response.status_code == 302 and response["Location"] == "/studies/knee-pilot/protocol/"
    study = Study.objects.get(slug="knee-pilot")
    assert study.status == StudyStatus.DRAFT and study.adaptive_reads
    assert (study.readers_per_case, study.repeat_fraction, study.washout_days) == (2, 0.5, 7.0)
    assert (study.seed, study.tolerance_mm, study.max_readers_per_case) == (11, 2.5, 3)
    assert list(study.memberships.values_list("user__username", "role")) == [
        ("pi", Role.COORDINATOR)
    ]


def test_it_lets_only_staff_and_coordinators_create_studies(draft_study, cast) -> None:
    assert login(cast["reader_a"]).get("/new-study/").status_code == 403
    assert login(cast["outsider"]).post("/new-study/", new_study_form()).status_code == 403
    assert not Study.objects.filter(slug="knee-pilot").exists()
    cast["outsider"].is_staff = True
    cast["outsider"].save()
    assert login(cast["outsider"]).get("/new-study/").status_code == 200
    home = login(cast["pi"]).get("/").content.decode()
    assert 'id="new-study"' in home
    assert 'id="new-study"' not in login(cast["reader_a"]).get("/").content.decode()


@pytest.mark.parametrize(
    ("overrides", "message"),
    [
        ({"repeat_fraction": 1.5}, "must be between 0 and 1, got 1.5"),
        ({"repeat_fraction": -0.1}, "must be between 0 and 1, got -0.1"),
        ({"washout_days": -3}, "cannot be negative, got -3"),
        ({"readers_per_case": 0}, "from 1 to 50, got 0"),
        ({"tolerance_mm": 0}, "positive number of mm, got 0"),
        ({"seed": -1}, "whole number &gt;= 0, got -1"),
        ({"max_readers_per_case": 1}, "maximum readers per case (1) cannot be below"),
        ({"repeat_fraction": "lots"}, "Enter a number"),
        ({"slug": "Not a slug!"}, "slug"),
        ({"slug": "draft-study"}, "short name &#x27;draft-study&#x27; already exists"),
    ],
)
def test_it_refuses_a_bad_new_study_and_stores_nothing(
    draft_study, cast, overrides, message
) -> None:
    before = snapshot(draft_study)
    response = login(cast["pi"]).post("/new-study/", new_study_form(**overrides))
    assert response.status_code == 400
    assert message in response.content.decode()
    assert snapshot(draft_study) == before


# ----------------------------------------------------------------------------- editing


def test_it_edits_the_details_and_design_of_a_draft(draft_study, cast) -> None:
    form = new_study_form(name="Renamed", readers_per_case=1, washout_days=0, slug=None)
    response = login(cast["pi"]).post("/studies/draft-study/edit/", form)
    assert response.status_code == 302
    draft_study.refresh_from_db()
    assert (draft_study.name, draft_study.readers_per_case, draft_study.washout_days) == (
        "Renamed",
        1,
        0.0,
    )


def test_it_keeps_the_design_of_an_open_study_frozen(open_study, cast) -> None:
    """Only name and description change; design fields are disabled and ignored."""
    form = new_study_form(name="Renamed", readers_per_case=1, seed=999, slug=None)
    response = login(cast["pi"]).post("/studies/test-study/edit/", form)
    assert response.status_code == 302
    open_study.refresh_from_db()
    assert (open_study.name, open_study.readers_per_case, open_study.seed) == ("Renamed", 2, 3)
    page = login(cast["pi"]).get("/studies/test-study/edit/").content.decode()
    assert "its design is frozen" in page and "disabled" in page


def test_it_refuses_a_bad_design_edit_and_changes_nothing(draft_study, cast) -> None:
    before = snapshot(draft_study)
    form = new_study_form(name="Renamed", washout_days=-1, slug=None)
    response = login(cast["pi"]).post("/studies/draft-study/edit/", form)
    assert response.status_code == 400 and "cannot be negative, got -1" in response.content.decode()
    assert snapshot(draft_study) == before


# ----------------------------------------------------------------------------- protocol


def test_it_replaces_a_draft_protocol_in_place(draft_study, cast) -> None:
    rows = [
        {"code": "N", "name": "Nasion", "description": "Deepest point", "order": 1},
        {"code": "S", "name": "Sella", "may_be_absent": True, "order": 0},
        {"code": "", "name": ""},  # an empty extra row is left out
    ]
    response = login(cast["pi"]).post("/studies/draft-study/protocol/", protocol_post(rows))
    assert response.status_code == 302
    draft_study.refresh_from_db()
    assert draft_study.protocol_version == 1
    assert [(lm.code, lm.may_be_absent) for lm in draft_study.current_landmarks()] == [
        ("S", True),
        ("N", False),
    ]


def test_it_refuses_duplicate_landmark_codes_and_changes_nothing(draft_study, cast) -> None:
    before = snapshot(draft_study)
    rows = [{"code": "A", "name": "one"}, {"code": "A", "name": "two"}]
    response = login(cast["pi"]).post("/studies/draft-study/protocol/", protocol_post(rows))
    assert response.status_code == 400
    assert "Duplicate landmark code &#x27;A&#x27; (rows 1 and 2)" in response.content.decode()
    assert snapshot(draft_study) == before


def test_it_refuses_a_silent_protocol_edit_after_opening(open_study, cast) -> None:
    """Opening froze the protocol: without the explicit new-version step nothing changes."""
    before = snapshot(open_study)
    rows = [{"code": "A", "name": "Point A, reworded"}, {"code": "B", "name": "Point B"}]
    client = login(cast["pi"])
    response = client.post("/studies/test-study/protocol/", protocol_post(rows))
    assert response.status_code == 400
    assert "Tick &#x27;Create protocol version 2&#x27;" in response.content.decode()
    stale = protocol_post(rows, **{"ver-new_version": "3", "ver-confirm": "on"})
    response = client.post("/studies/test-study/protocol/", stale)
    assert response.status_code == 400 and "reload the page" in response.content.decode()
    assert snapshot(open_study) == before


def test_it_creates_a_new_protocol_version_when_asked(open_study, cast) -> None:
    """Reads already opened keep version 1; reads not yet opened move to version 2."""
    started = open_study.reads.filter(reader=cast["reader_a"]).order_by("worklist_position")[0]
    reads.open_read(started, cast["reader_a"])
    rows = [{"code": "A", "name": "Point A"}, {"code": "C", "name": "Point C"}]
    confirmed = protocol_post(rows, **{"ver-new_version": "2", "ver-confirm": "on"})
    response = login(cast["pi"]).post("/studies/test-study/protocol/", confirmed)
    assert response.status_code == 302
    open_study.refresh_from_db()
    assert open_study.protocol_version == 2
    assert [lm.code for lm in open_study.current_landmarks()] == ["A", "C"]
    assert list(open_study.landmarks.filter(protocol_version=1).values_list("code", flat=True)) == [
        "A",
        "B",
    ]
    started.refresh_from_db()
    assert started.protocol_version == 1
    others = open_study.reads.exclude(pk=started.pk)
    assert set(others.values_list("protocol_version", flat=True)) == {2}
    export = login(cast["pi"]).get("/studies/test-study/protocol/export/json/?version=1")
    assert [lm["code"] for lm in json.loads(export.content)["landmarks"]] == ["A", "B"]


def test_it_refuses_every_protocol_change_on_a_closed_study(open_study, cast) -> None:
    studies.close_study(open_study)
    before = snapshot(open_study)
    client = login(cast["pi"])
    rows = [{"code": "Z", "name": "Z"}]
    confirmed = protocol_post(rows, **{"ver-new_version": "2", "ver-confirm": "on"})
    response = client.post("/studies/test-study/protocol/", confirmed)
    assert response.status_code == 400 and "This study is closed" in response.content.decode()
    upload = SimpleUploadedFile("p.csv", b"code\nZ\n", content_type="text/csv")
    response = client.post(
        "/studies/test-study/protocol/",
        {"action": "import", "imp-file": upload, "ver-new_version": "2", "ver-confirm": "on"},
    )
    assert response.status_code == 400
    assert snapshot(open_study) == before
    assert 'name="lm-0-code"' not in client.get("/studies/test-study/protocol/").content.decode()


def test_it_imports_a_protocol_file_and_exports_it_back(draft_study, cast) -> None:
    client = login(cast["pi"])
    text = (
        'code,name,description,may_be_absent,order\nS,Sella,"Fossa, centre",no,0\nX,Extra,,yes,1\n'
    )
    upload = SimpleUploadedFile("protocol.csv", text.encode(), content_type="text/csv")
    response = client.post(
        "/studies/draft-study/protocol/", {"action": "import", "imp-file": upload}
    )
    assert response.status_code == 302
    exported = client.get("/studies/draft-study/protocol/export/csv/")
    assert exported["Content-Disposition"] == 'attachment; filename="draft-study-protocol-v1.csv"'
    assert exported.content.decode().replace("\r\n", "\n") == text
    as_json = json.loads(client.get("/studies/draft-study/protocol/export/json/").content)
    upload = SimpleUploadedFile("again.json", json.dumps(as_json).encode())
    response = client.post(
        "/studies/draft-study/protocol/", {"action": "import", "imp-file": upload}
    )
    assert response.status_code == 302
    assert [lm.code for lm in draft_study.current_landmarks()] == ["S", "X"]


@pytest.mark.parametrize(
    ("name", "content", "message"),
    [
        ("p.csv", b"code,order\nA,0\nB,first\n", "line 3, column &#x27;order&#x27;"),
        ("p.csv", b"code\nA\nA\n", "duplicate landmark code &#x27;A&#x27;"),
        ("p.json", b'[{"code": "A", "size": 2}]', "item 1, field &#x27;size&#x27;"),
        ("p.txt", b"code\nA\n", "neither .csv nor .json"),
        ("p.csv", b"\xff\xfe\x00c", "not UTF-8"),
    ],
)
def test_it_refuses_a_bad_protocol_file_and_changes_nothing(
    draft_study, cast, name, content, message
) -> None:
    before = snapshot(draft_study)
    upload = SimpleUploadedFile(name, content)
    response = login(cast["pi"]).post(
        "/studies/draft-study/protocol/", {"action": "import", "imp-file": upload}
    )
    assert response.status_code == 400
    page = response.content.decode()
    assert message.lower() in page.lower() and "Nothing was changed" in page
    assert snapshot(draft_study) == before


def test_it_answers_404_for_an_unknown_export(draft_study, cast) -> None:
    client = login(cast["pi"])
    assert client.get("/studies/draft-study/protocol/export/xml/").status_code == 404
    assert client.get("/studies/draft-study/protocol/export/csv/?version=7").status_code == 404
    assert client.get("/studies/draft-study/protocol/export/csv/?version=x").status_code == 404


# ----------------------------------------------------------------------------- members


def test_it_adds_a_member_with_a_role(draft_study, cast, django_user_model) -> None:
    django_user_model.objects.create_user("adj", password="pw")
    response = login(cast["pi"]).post(
        "/studies/draft-study/members/", {"username": "adj", "role": Role.ADJUDICATOR}
    )
    assert response.status_code == 302
    assert Membership.objects.filter(
        study=draft_study, user__username="adj", role=Role.ADJUDICATOR
    ).exists()


@pytest.mark.parametrize(
    ("username", "role", "message"),
    [
        ("nobody", Role.READER, "There is no active user &#x27;nobody&#x27;"),
        ("reader_a", Role.COORDINATOR, "&#x27;reader_a&#x27; is already reader"),
        ("pi", Role.READER, "&#x27;pi&#x27; is already coordinator"),
        ("outsider", "owner", "Select a valid choice"),
    ],
)
def test_it_refuses_a_bad_member_and_changes_nothing(
    draft_study, cast, username, role, message
) -> None:
    before = snapshot(draft_study)
    response = login(cast["pi"]).post(
        "/studies/draft-study/members/", {"username": username, "role": role}
    )
    assert response.status_code == 400 and message in response.content.decode()
    assert snapshot(draft_study) == before


def test_it_keeps_readers_from_also_adjudicating_in_the_service(draft_study, cast) -> None:
    with pytest.raises(ServiceError, match="'reader_b' is already reader"):
        studies.add_member(draft_study, cast["reader_b"], Role.ADJUDICATOR)


def _remove(client: Client, username: str, role: str):
    return client.post("/studies/draft-study/members/remove/",
                       {"username": username, "role": role})


def test_it_lets_an_unstarted_reader_leave_an_open_study_and_moves_their_cases(
    draft_study, cast
) -> None:
    """Source: the design gives every case k first reads by distinct readers (k =
    readers_per_case; common practice in multi-reader studies). After a reader who opened
    nothing leaves, that must still hold with the remaining readers; the leaver's reads are
    gone and the audit log names who took the role away."""
    from audit.models import AuditEntry, AuditKind

    studies.add_member(draft_study, cast["outsider"], Role.READER)
    studies.open_study(draft_study)
    theirs = draft_study.reads.filter(reader=cast["outsider"]).count()
    assert theirs > 0
    client = login(cast["pi"])
    response = _remove(client, "outsider", Role.READER)
    assert response.status_code == 302
    assert not draft_study.reads.filter(reader=cast["outsider"]).exists()
    assert not Membership.objects.filter(study=draft_study, user=cast["outsider"]).exists()
    for case in draft_study.cases.all():
        firsts = draft_study.reads.filter(case=case, read_number=1)
        assert sorted(firsts.values_list("reader__username", flat=True)) == [
            "reader_a", "reader_b"]
    entry = AuditEntry.objects.get(kind=AuditKind.ROLE_REMOVED)
    assert (entry.username, entry.subject, entry.detail) == (
        "pi", cast["outsider"], {"role": Role.READER, "reads_dropped": theirs})
    page = client.get("/studies/draft-study/members/").content.decode()
    assert f"outsider is no longer reader. Their {theirs} unopened reads went to other" in page
    assert "<code>outsider</code>" not in page


def test_it_takes_a_role_from_a_draft_studys_member(draft_study, cast) -> None:
    studies.add_member(draft_study, cast["outsider"], Role.COORDINATOR)
    assert _remove(login(cast["outsider"]), "pi", Role.COORDINATOR).status_code == 302
    assert _remove(login(cast["outsider"]), "reader_b", Role.READER).status_code == 302
    assert sorted(draft_study.memberships.values_list("user__username", "role")) == [
        ("outsider", Role.COORDINATOR), ("reader_a", Role.READER)]


@pytest.mark.parametrize(
    ("setup", "username", "role", "message"),
    [
        ("draft", "pi", Role.COORDINATOR, "A study needs at least one coordinator"),
        ("draft", "nobody", Role.READER, "&#x27;nobody&#x27; is not reader in this study"),
        ("draft", "reader_a", Role.ADJUDICATOR, "&#x27;reader_a&#x27; is not adjudicator"),
        ("opened_read", "outsider", Role.READER, "&#x27;outsider&#x27; has opened 1 read;"),
        ("open", "reader_a", Role.READER,
         "Without &#x27;reader_a&#x27; the design cannot be met: readers_per_case=2"),
        ("closed", "outsider", Role.READER, "The study is closed; its readers and reads stay"),
    ],
)
def test_it_refuses_to_take_a_role_away_and_changes_nothing(
    draft_study, cast, setup, username, role, message
) -> None:
    """Opened reads are the record; k readers per case must stay possible; a study keeps
    a coordinator. Every refusal says why and leaves members and reads as they were."""
    if setup in ("opened_read", "closed"):
        studies.add_member(draft_study, cast["outsider"], Role.READER)
    if setup != "draft":
        studies.open_study(draft_study)
    if setup == "opened_read":
        read = draft_study.reads.filter(reader=cast["outsider"], read_number=1).first()
        reads.open_read(read, cast["outsider"])
    if setup == "closed":
        studies.close_study(Study.objects.get(pk=draft_study.pk))
    before = snapshot(draft_study)
    client = login(cast["pi"])
    assert _remove(client, username, role).status_code == 302
    assert message in client.get("/studies/draft-study/members/").content.decode()
    assert snapshot(draft_study) == before


def test_it_offers_no_button_where_the_role_must_stay(draft_study, cast) -> None:
    studies.add_member(draft_study, cast["outsider"], Role.READER)
    studies.open_study(draft_study)
    read = draft_study.reads.filter(reader=cast["outsider"], read_number=1).first()
    reads.open_read(read, cast["outsider"])
    page = login(cast["pi"]).get("/studies/draft-study/members/").content.decode()
    rows = {row.split("</code>")[0]: row for row in page.split("<tr><td><code>")[1:]}
    assert "keeps the role: the only coordinator" in rows["pi"]
    assert "keeps the role: has opened reads" in rows["outsider"]
    assert "Take role away" in rows["reader_a"] and "Take role away" not in rows["outsider"]


def test_it_keeps_the_last_coordinator_in_the_service(draft_study, cast) -> None:
    with pytest.raises(ServiceError, match="at least one coordinator"):
        studies.remove_member(draft_study, cast["pi"], Role.COORDINATOR)


# ----------------------------------------------------------------------------- preview


def test_it_previews_the_workload_that_opening_then_creates(draft_study, cast) -> None:
    """Reads per reader in the preview = the reads each reader gets when the study opens."""
    page = login(cast["pi"]).get("/studies/draft-study/preview/?minutes_per_read=6&sd_axis_mm=2")
    assert page.status_code == 200
    html = page.content.decode()
    # 3 cases x k 2 over 2 readers: 3 first reads each, 0.5 x 3 rounded half up = 2 repeats.
    assert "<dt>Reads per reader</dt><dd>5</dd>" in html
    assert "<dt>All reads</dt><dd>10</dd>" in html
    assert "<dt>Hours per reader</dt><dd>0.5</dd>" in html  # 5 reads x 6 minutes
    response = login(cast["pi"]).post("/studies/draft-study/open/")
    assert response.status_code == 302 and response["Location"] == "/studies/draft-study/"
    readers = ("reader_a", "reader_b")
    per_reader = [draft_study.reads.filter(reader=cast[name]).count() for name in readers]
    assert per_reader == [5, 5]


def test_it_shows_the_expected_consensus_error_of_the_chosen_k(draft_study, cast) -> None:
    """Mean length of the mean of k isotropic Gaussian errors = Maxwell mean with scale
    s / sqrt(k) (scipy.stats.maxwell), for s = 2 mm and k = 1, 2."""
    html = login(cast["pi"]).get("/studies/draft-study/preview/?sd_axis_mm=2").content.decode()
    for k in (1, 2):
        expected = stats.maxwell(scale=2.0 / math.sqrt(k)).mean()
        assert f"<td>{expected:.2f}</td>" in html
    assert "2 (this design)" in html


def test_it_explains_why_a_preview_has_no_workload_yet(cast, draft_study) -> None:
    studies.update_design(draft_study, readers_per_case=3, max_readers_per_case=3)
    html = login(cast["pi"]).get("/studies/draft-study/preview/").content.decode()
    assert "k must not exceed n_readers (2), got 3" in html
    assert "Readers per case is 3 but the study has 2 readers" in html
    assert 'id="open-study"' not in html
    bad = login(cast["pi"]).get("/studies/draft-study/preview/?minutes_per_read=-5")
    assert bad.status_code == 400 and "got -5" in bad.content.decode()


# ----------------------------------------------------------------------------- open and close


def test_it_refuses_to_open_with_more_readers_per_case_than_readers(draft_study, cast) -> None:
    studies.update_design(draft_study, readers_per_case=3, max_readers_per_case=3)
    before = snapshot(draft_study)
    client = login(cast["pi"])
    response = client.post("/studies/draft-study/open/")
    assert response.status_code == 302 and response["Location"] == "/studies/draft-study/preview/"
    shown = [str(m) for m in get_messages(response.wsgi_request)]
    assert any("readers_per_case=3 is larger than the number of readers (2)" in m for m in shown)
    assert any("Nothing was changed" in m for m in shown)
    assert snapshot(draft_study) == before
    assert draft_study.reads.count() == 0


def test_it_opens_a_draft_and_then_refuses_design_changes(draft_study, cast) -> None:
    client = login(cast["pi"])
    assert client.post("/studies/draft-study/open/").status_code == 302
    draft_study.refresh_from_db()
    assert draft_study.status == StudyStatus.OPEN and draft_study.reads.count() == 10
    response = client.post("/studies/draft-study/open/")
    shown = [str(m) for m in get_messages(response.wsgi_request)]
    assert any("only a draft study can be opened; this one is open" in m for m in shown)


def test_it_closes_an_open_study_and_stops_new_reads(open_study, cast) -> None:
    read = open_study.reads.filter(reader=cast["reader_a"]).order_by("worklist_position")[0]
    response = login(cast["pi"]).post("/studies/test-study/close/")
    assert response.status_code == 302
    open_study.refresh_from_db()
    assert open_study.status == StudyStatus.CLOSED and open_study.closed_at is not None
    with pytest.raises(ServiceError, match="the study is closed; no more reading"):
        reads.open_read(read, cast["reader_a"])
    assert not reads.worklist(cast["reader_a"]).exists()
    again = login(cast["pi"]).post("/studies/test-study/close/")
    shown = [str(m) for m in get_messages(again.wsgi_request)]
    assert any("only an open study can be closed" in m for m in shown)


def test_it_links_the_set_up_pages_from_the_study_page(draft_study, cast) -> None:
    html = login(cast["pi"]).get("/studies/draft-study/").content.decode()
    for path in ("edit/", "protocol/", "members/", "preview/"):
        assert f'href="/studies/draft-study/{path}"' in html


def test_a_new_study_page_says_what_to_do_next(cast) -> None:
    studies.create_study(name="Empty", slug="empty", coordinator=cast["pi"])
    page = login(cast["pi"]).get("/studies/empty/").content.decode()
    assert 'No landmarks yet: <a href="/studies/empty/protocol/">define the protocol</a>' in page
    assert 'No readers yet: <a href="/studies/empty/members/">add members</a>' in page
    assert 'No cases yet: <a href="/studies/empty/upload/">import scans</a>' in page
