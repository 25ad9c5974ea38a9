"""The audit log: logins, failed logins, role changes and exports, shown to coordinators."""

from __future__ import annotations

import re
from dataclasses import dataclass, field

import pytest
from django.test import Client
from django.urls import reverse

from audit.log import AuditKindError, entries_for_study, record
from audit.models import AuditEntry, AuditKind
from studies.constants import Role
from studies.services import studies

from .url_walk import leaves


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


def _signs_in(username: str, password: str) -> bool:
    response = Client().post(reverse("viewer-login"),
                             {"username": username, "password": password})
    return response.status_code == 302


def test_it_changes_a_password_keeps_this_session_and_ends_the_others(open_study, cast) -> None:
    """Source: Django's PasswordChangeView (django.contrib.auth.views) checks the old
    password and the configured validators, and rotates the session auth hash so that
    only the session making the change stays signed in."""
    here, elsewhere = Client(), Client()
    for client in (here, elsewhere):
        assert client.post(reverse("viewer-login"),
                           {"username": "reader_a", "password": "pw-reader_a"}).status_code == 302
    response = here.post(reverse("viewer-password-change"), {
        "old_password": "pw-reader_a",
        "new_password1": "granite-ledge-41",
        "new_password2": "granite-ledge-41",
    })
    assert response.status_code == 302 and response["Location"] == reverse("viewer-home")
    assert "Your password was changed." in here.get(reverse("viewer-home")).content.decode()
    assert elsewhere.get(reverse("viewer-home")).status_code == 302  # signed out
    assert _signs_in("reader_a", "granite-ledge-41")
    entry = AuditEntry.objects.get(kind=AuditKind.PASSWORD_CHANGED)
    assert entry.actor == cast["reader_a"] and entry in entries_for_study(open_study)
    assert "granite-ledge-41" not in repr(list(AuditEntry.objects.values()))


@pytest.mark.parametrize(
    ("old", "new1", "new2", "message"),
    [
        ("wrong", "granite-ledge-41", "granite-ledge-41", "Your old password was entered"),
        ("pw-reader_a", "short1", "short1", "at least 8 characters"),
        ("pw-reader_a", "password", "password", "This password is too common."),
        ("pw-reader_a", "granite-ledge-41", "granite-ledge-42", "didn\u2019t match"),
    ],
)
def test_it_refuses_a_bad_password_change_with_the_reason(cast, old, new1, new2, message) -> None:
    """Source: Django's own messages for PasswordChangeForm, MinimumLengthValidator (8) and
    CommonPasswordValidator (its shipped list); the password stays as it was."""
    client = Client()
    client.force_login(cast["reader_a"])
    response = client.post(reverse("viewer-password-change"),
                           {"old_password": old, "new_password1": new1, "new_password2": new2})
    assert response.status_code == 200
    assert message in response.content.decode()
    assert _signs_in("reader_a", "pw-reader_a")
    assert not AuditEntry.objects.filter(kind=AuditKind.PASSWORD_CHANGED).exists()


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


#: The client address of the download tests (a documentation address, RFC 5737).
CLIENT_ADDRESS = "192.0.2.44"


@dataclass(frozen=True)
class Download:
    """One download a coordinator can make: a URL name, its arguments besides the slug, an
    optional query string, and the file name it is saved under (`{slug}` filled in)."""

    label: str
    url_name: str
    file: str
    kwargs: dict = field(default_factory=dict)
    query: str = ""

    def url(self, slug: str) -> str:
        return reverse(self.url_name, kwargs={"slug": slug, **self.kwargs}) + self.query


#: Every download: the API's exports (studies/api/exports.py) and the pages' downloads
#: (viewer/dashboard_views.py, viewer/setup_views.py).
DOWNLOADS = (
    Download("api-reference-csv", "studies-export-reference", "{slug}-reference_set.csv",
             {"fmt": "csv"}),
    Download("api-reference-json", "studies-export-reference", "{slug}-reference_set.json",
             {"fmt": "json"}),
    Download("api-events", "studies-export-events", "{slug}-events.csv"),
    Download("api-adjudication-events", "studies-export-events",
             "{slug}-adjudication_events.csv", query="?kind=adjudication"),
    Download("api-analysis-table", "studies-export-table", "{slug}-consensus.csv",
             {"name": "consensus"}),
    Download("api-archive", "studies-export-archive", "{slug}-archive.zip"),
    Download("dashboard-table-csv", "viewer-dashboard-csv", "{slug}-consensus.csv",
             {"name": "consensus"}),
    Download("html-report", "viewer-report", "{slug}-report.html", query="?download=1"),
    Download("pdf-report", "viewer-report-pdf", "{slug}-report.pdf"),
    Download("protocol-csv", "viewer-study-protocol-export", "{slug}-protocol-v1.csv",
             {"fmt": "csv"}),
    Download("protocol-json", "viewer-study-protocol-export", "{slug}-protocol-v1.json",
             {"fmt": "json"}),
    Download("audit-csv", "viewer-study-audit-csv", "{slug}-audit.csv"),
    Download("audit-csv-one-kind", "viewer-study-audit-csv", "{slug}-audit-export.csv",
             query="?kind=export"),
)

_ATTACHMENT = re.compile(r'attachment; filename="(?P<name>[^"]+)"')


def signed_in(user) -> Client:
    client = Client(REMOTE_ADDR=CLIENT_ADDRESS)
    client.force_login(user)
    return client


def exports_after(pk: int):
    return AuditEntry.objects.filter(kind=AuditKind.EXPORT, pk__gt=pk)


def last_pk() -> int:
    return AuditEntry.objects.order_by("-pk").values_list("pk", flat=True).first() or 0


@pytest.mark.parametrize("download", DOWNLOADS, ids=lambda d: d.label)
def test_every_download_records_one_export_entry_with_the_user_study_and_file(
    analysed, cast, download
) -> None:
    study, _ = analysed
    client = signed_in(cast["pi"])
    before = last_pk()
    response = client.get(download.url(study.slug))
    assert response.status_code == 200, response.content[:300]
    saved_as = _ATTACHMENT.fullmatch(response.get("Content-Disposition", ""))
    assert saved_as, f"not an attachment: {response.get('Content-Disposition')!r}"
    assert saved_as["name"] == download.file.format(slug=study.slug)
    entry = exports_after(before).get()  # exactly one
    assert entry.actor == cast["pi"] and entry.username == "pi"
    assert entry.study == study and entry.study_slug == study.slug
    assert entry.detail == {"file": saved_as["name"]}
    assert entry.ip_address == CLIENT_ADDRESS


def test_the_download_list_covers_every_api_export() -> None:
    """Walks the URL conf, so a new API export fails here until it is added to DOWNLOADS."""
    api_exports = {
        name
        for name in (leaf.name.rsplit(":", 1)[-1] for leaf in leaves())
        if name.startswith("studies-export-")
    }
    assert api_exports, "the URL conf has no studies-export-* names"
    missing = api_exports - {d.url_name for d in DOWNLOADS}
    assert not missing, f"add these API exports to DOWNLOADS: {sorted(missing)}"


def test_the_coordinators_audit_page_lists_a_page_download(analysed, cast) -> None:
    study, _ = analysed
    client = signed_in(cast["pi"])
    url = reverse("viewer-dashboard-csv", kwargs={"slug": study.slug, "name": "consensus"})
    assert client.get(url).status_code == 200
    page = client.get(reverse("viewer-study-audit", args=[study.slug]))
    assert page.status_code == 200
    rows = re.findall(r'<tr class="audit-export">(.*?)</tr>', page.content.decode(), re.S)
    assert len(rows) == 1, rows
    assert "Export" in rows[0] and "<code>pi</code>" in rows[0]
    assert f"file: {study.slug}-consensus.csv" in rows[0]
    assert CLIENT_ADDRESS in rows[0]


def test_a_refused_or_missing_download_and_an_on_screen_report_record_no_export(
    analysed, cast
) -> None:
    study, _ = analysed
    before = last_pk()
    for name, status in (("reader_a", 403), ("outsider", 404)):
        client = signed_in(cast[name])
        for download in DOWNLOADS:
            response = client.get(download.url(study.slug))
            assert response.status_code == status, (name, download.label)
    pi = signed_in(cast["pi"])
    for url_name in ("viewer-dashboard-csv", "studies-export-table"):
        missing = reverse(url_name, kwargs={"slug": study.slug, "name": "no_such_table"})
        assert pi.get(missing).status_code == 404, url_name
    on_screen = pi.get(reverse("viewer-report", kwargs={"slug": study.slug}))
    assert on_screen.status_code == 200 and "Content-Disposition" not in on_screen
    assert not exports_after(before).exists()


def test_the_audit_page_shows_one_kind_and_its_csv_holds_the_same_rows(open_study, cast) -> None:
    """The filter keeps only the asked-for kind, on the page and in the CSV (RFC 4180
    text, read back with Python's csv module); an unknown kind shows everything."""
    import csv
    import io

    record(AuditKind.LOGIN, actor=cast["reader_a"])
    record(AuditKind.LOGIN_FAILED, username="reader_b")
    studies.add_member(open_study, cast["outsider"], Role.ADJUDICATOR, by=cast["pi"])
    client = signed_in(cast["pi"])
    url = reverse("viewer-study-audit", args=[open_study.slug])
    page = client.get(url, {"kind": AuditKind.LOGIN_FAILED}).content.decode()
    rows = page[page.index('id="audit"'):]
    assert "audit-login_failed" in rows and "audit-login\"" not in rows
    assert "audit-role_added" not in rows
    assert "audit-role_added" in client.get(url, {"kind": "nonsense"}).content.decode()

    csv_url = reverse("viewer-study-audit-csv", args=[open_study.slug])
    table = list(csv.DictReader(io.StringIO(client.get(csv_url).content.decode())))
    kinds = [row["what"] for row in table]
    assert AuditKind.LOGIN in kinds and AuditKind.ROLE_ADDED in kinds
    added = next(r for r in table if r["what"] == AuditKind.ROLE_ADDED
                 and r["about"] == "outsider")
    assert (added["who"], added["details"]) == ("pi", '{"role": "adjudicator"}')
    only = list(csv.DictReader(io.StringIO(
        client.get(csv_url, {"kind": AuditKind.LOGIN_FAILED}).content.decode())))
    assert [(r["what"], r["who"]) for r in only] == [(AuditKind.LOGIN_FAILED, "reader_b")]

