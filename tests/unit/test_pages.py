"""Pages route by role; coordinators' pages are closed to readers and outsiders."""

from __future__ import annotations

from django.test import Client


def login(user) -> Client:
    client = Client()
    client.force_login(user)
    return client


def test_it_asks_anonymous_visitors_to_sign_in(db) -> None:
    response = Client().get("/")
    assert response.status_code == 302 and response["Location"].startswith("/login/")
    page = Client().get("/login/")
    assert page.status_code == 200 and b"Research use only" in page.content


def test_it_signs_in_with_a_password(open_study, cast) -> None:
    client = Client()
    response = client.post("/login/", {"username": "reader_a", "password": "pw-reader_a"})
    assert response.status_code == 302
    assert b"Your worklist" in client.get("/").content


def test_it_shows_a_reader_their_worklist_only(open_study, cast) -> None:
    page = login(cast["reader_a"]).get("/").content.decode()
    own = open_study.reads.filter(reader=cast["reader_a"])
    others = open_study.reads.filter(reader=cast["reader_b"])
    assert all(r.pseudonym in page for r in own)
    assert not any(r.pseudonym in page for r in others)
    assert "reader_b" not in page and "Studies you coordinate" not in page


def test_it_shows_a_coordinator_their_studies_and_reads(open_study, cast) -> None:
    client = login(cast["pi"])
    assert "Test study" in client.get("/").content.decode()
    page = client.get("/studies/test-study/").content.decode()
    assert "reader_a" in page and "case-0" in page


def test_it_hides_the_study_page_from_readers_and_outsiders(open_study, cast) -> None:
    assert login(cast["reader_a"]).get("/studies/test-study/").status_code == 403
    assert login(cast["outsider"]).get("/studies/test-study/").status_code == 404


def test_it_opens_the_reading_page_only_for_the_owner(open_study, cast) -> None:
    read = open_study.reads.filter(reader=cast["reader_a"]).first()
    assert login(cast["reader_a"]).get(f"/read/{read.code}/").status_code == 200
    assert login(cast["reader_b"]).get(f"/read/{read.code}/").status_code == 404
    assert login(cast["pi"]).get(f"/read/{read.code}/").status_code == 404


def test_it_says_how_many_reads_open_later_and_from_when(open_study, cast) -> None:
    from datetime import timedelta

    from django.utils import timezone

    own = list(open_study.reads.filter(reader=cast["reader_a"]).order_by("worklist_position"))
    waiting, unscheduled = own[0], own[1]
    waiting.available_from = timezone.now() + timedelta(days=3)
    waiting.save(update_fields=["available_from"])
    unscheduled.available_from = None
    unscheduled.save(update_fields=["available_from"])
    page = login(cast["reader_a"]).get("/").content.decode()
    assert f"0 of your {len(own)} reads submitted" in page
    assert waiting.pseudonym not in page and unscheduled.pseudonym not in page
    first = timezone.localtime(waiting.available_from)
    assert f"2 more open later, the first on {first.day} {first:%b %Y}." in page
