"""The audit log: logins, failed logins, role changes and exports, shown to coordinators."""

from __future__ import annotations

import pytest
from django.test import Client
from django.urls import reverse

from audit.log import AuditKindError, entries_for_study, record
from audit.models import AuditEntry, AuditKind
from studies.constants import Role
from studies.services import studies


def test_it_records_a_login_with_the_client_address(cast) -> None:
    client = Client(REMOTE_ADDR="192.0.2.7")
    response = client.post(
        reverse("viewer-login"), {"username": "reader_a", "password": "pw-reader_a"}
    )
    assert response.status_code == 302
    entry = AuditEntry.objects.get(kind=AuditKind.LOGIN)
    assert entry.actor == cast["reader_a"]
    assert entry.username == "reader_a"
    assert entry.ip_address == "192.0.2.7"


def test_it_records_a_failed_login_without_the_password(cast) -> None:
    Client().post(reverse("viewer-login"), {"username": "reader_a", "password": "s3cret-typo"})
    entry = AuditEntry.objects.get(kind=AuditKind.LOGIN_FAILED)
    assert entry.actor is None
    assert entry.username == "reader_a"
    stored = repr(list(AuditEntry.objects.values()))
    assert "s3cret-typo" not in stored


def test_it_records_a_sign_out(cast) -> None:
    client = Client()
    client.force_login(cast["reader_b"])
    client.post(reverse("viewer-logout"))
    assert AuditEntry.objects.filter(kind=AuditKind.LOGOUT, actor=cast["reader_b"]).exists()


def test_it_records_role_changes_with_who_made_them(open_study, cast) -> None:
    studies.add_member(open_study, cast["outsider"], Role.ADJUDICATOR, by=cast["pi"])
    entry = AuditEntry.objects.filter(kind=AuditKind.ROLE_ADDED, subject=cast["outsider"]).get()
    assert entry.actor == cast["pi"]
    assert entry.study == open_study
    assert entry.detail == {"role": "adjudicator"}
    readers = AuditEntry.objects.filter(kind=AuditKind.ROLE_ADDED, detail__role="reader")
    assert sorted(e.subject.username for e in readers) == ["reader_a", "reader_b"]


def test_it_does_not_record_a_role_that_was_already_held(open_study, cast) -> None:
    before = AuditEntry.objects.count()
    studies.add_member(open_study, cast["reader_a"], Role.READER, by=cast["pi"])
    assert AuditEntry.objects.count() == before


def test_it_records_nothing_when_a_role_change_is_refused(open_study, cast) -> None:
    """A reader cannot also adjudicate; the refusal leaves no audit entry behind."""
    before = AuditEntry.objects.count()
    with pytest.raises(ValueError, match="blinded"):
        studies.add_member(open_study, cast["reader_a"], Role.ADJUDICATOR, by=cast["pi"])
    assert AuditEntry.objects.count() == before


def test_it_records_an_export_through_the_helper(open_study, cast) -> None:
    entry = record(AuditKind.EXPORT, actor=cast["pi"], study=open_study, files=3, fmt="zip")
    assert entry in entries_for_study(open_study)
    assert entry.detail == {"files": 3, "fmt": "zip"}


def test_it_refuses_an_unknown_kind_with_its_name(cast) -> None:
    with pytest.raises(AuditKindError, match="'deleted_everything'"):
        record("deleted_everything", actor=cast["pi"])


def test_it_keeps_audit_entries_append_only(cast) -> None:
    entry = record(AuditKind.LOGIN, actor=cast["pi"])
    with pytest.raises(PermissionError):
        entry.save()
    with pytest.raises(PermissionError):
        entry.delete()
    with pytest.raises(PermissionError):
        AuditEntry.objects.filter(pk=entry.pk).update(username="someone else")
    with pytest.raises(PermissionError):
        AuditEntry.objects.all().delete()


def test_it_keeps_the_entries_of_a_deleted_user(cast) -> None:
    record(AuditKind.LOGIN, actor=cast["outsider"])
    cast["outsider"].delete()
    entry = AuditEntry.objects.get(username="outsider")
    assert entry.actor is None


def test_it_shows_a_coordinator_their_study_and_members_only(open_study, cast) -> None:
    other = studies.create_study(name="Other", slug="other", coordinator=cast["outsider"])
    record(AuditKind.EXPORT, actor=cast["outsider"], study=other, fmt="zip")
    record(AuditKind.LOGIN, actor=cast["outsider"])
    record(AuditKind.LOGIN, actor=cast["reader_a"])
    record(AuditKind.LOGIN_FAILED, username="reader_b")
    record(AuditKind.LOGIN_FAILED, username="nobody-here")
    kinds = [(e.kind, e.username) for e in entries_for_study(open_study)]
    assert (AuditKind.LOGIN, "reader_a") in kinds
    assert (AuditKind.LOGIN_FAILED, "reader_b") in kinds
    assert all(name not in ("outsider", "nobody-here") for _, name in kinds)

    client = Client()
    client.force_login(cast["pi"])
    page = client.get(reverse("viewer-study-audit", args=[open_study.slug]))
    assert page.status_code == 200
    html = page.content.decode()
    assert "Failed login" in html and "reader_b" in html
    assert "nobody-here" not in html


def test_it_hides_the_audit_page_from_everyone_but_coordinators(open_study, cast) -> None:
    url = reverse("viewer-study-audit", args=[open_study.slug])
    assert Client().get(url).status_code == 302  # to the login page
    for name, status in (("reader_a", 403), ("outsider", 404)):
        client = Client()
        client.force_login(cast[name])
        assert client.get(url).status_code == status, name
