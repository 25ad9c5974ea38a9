"""Blinding, server side: reader A never receives anything that belongs to reader B.

The walk covers every URL pattern in the URL conf (tests/unit/url_walk.py), so a new page
or endpoint is tested the day it is added. Each pattern is requested with GET, HEAD,
OPTIONS and an empty POST, with its parameters filled from reader A's and reader B's own
objects; every body and header must be free of reader B's usernames and name, read codes
and pseudonyms, of any case's label, pseudonym or code, and of reader B's coordinates as
JSON or HTML would print them. The requirement is the study design's blinding rule;
printing floats with repr (Python's json and Django templates both use it) and as fixed
decimals is common practice.
"""

from __future__ import annotations

import html
import json
import uuid
from datetime import timedelta

import numpy as np
import pytest
from django.test import Client
from django.utils import timezone

from studies.imaging.geometry import voxel_to_world
from studies.models import Case, Placement, PlacementEvent
from studies.services import placing, reads

from .url_walk import all_urls, leaves

METHODS = ("get", "head", "options", "post")
# Server errors found by the walk and reported, not caused by blinding: drf-spectacular's
# docs page answers OPTIONS with a 500 (its HTML renderer has no template for metadata).
KNOWN_SERVER_ERRORS: set[tuple[str, str]] = set()
# Distinctive voxel positions (canonical voxel index): reader B's first placement, its move,
# the second landmark, and reader A's own point.
B_VOXELS = ((3.173, 5.419, 2.637), (4.281, 6.953, 3.517), (7.649, 2.361, 6.143))
A_VOXEL = (8.417, 9.283, 1.759)


def _event(read, landmark: str, kind: str, voxel=None) -> placing.EventInput:
    xyz = (None, None, None)
    if voxel is not None:
        xyz = tuple(float(v) for v in voxel_to_world(np.array(read.case.affine), np.array(voxel)))
    return placing.EventInput(
        landmark=landmark,
        kind=kind,
        client_event_id=uuid.uuid4(),
        client_time=timezone.now() - timedelta(minutes=5),
        x_mm=xyz[0],
        y_mm=xyz[1],
        z_mm=xyz[2],
        confidence=2,
    )


@pytest.fixture
def blinded(open_study, cast):
    """Reader B has placed, moved and submitted; reader A has one point of their own."""
    reader_a, reader_b = cast["reader_a"], cast["reader_b"]
    reader_b.first_name, reader_b.last_name = "Bettina", "Quarrington"
    reader_b.save()
    b_reads = list(open_study.reads.filter(reader=reader_b).order_by("worklist_position"))
    first, second = b_reads[0], b_reads[1]
    placing.record_event(first, reader_b, _event(first, "A", "placed", B_VOXELS[0]))
    placing.record_event(first, reader_b, _event(first, "A", "moved", B_VOXELS[1]))
    placing.record_event(first, reader_b, _event(first, "B", "placed", B_VOXELS[2]))
    reads.submit_read(first, reader_b)
    placing.record_event(second, reader_b, _event(second, "A", "placed", B_VOXELS[0]))
    own = open_study.reads.filter(reader=reader_a).order_by("worklist_position").first()
    placing.record_event(own, reader_a, _event(own, "A", "placed", A_VOXEL))
    return {"study": open_study, "own": own, "b_reads": b_reads}


def _number_forms(value: float) -> set[str]:
    """How a coordinate may be printed: repr (JSON, templates) and 2 to 4 fixed decimals.

    Forms with fewer than four significant digits are left out: they are too common to
    mean anything (the admin's login page holds a "6.95", for one).
    """
    forms = {repr(value), json.dumps(value), f"{value:.4f}", f"{value:.3f}", f"{value:.2f}"}
    return {f for f in forms if len(f.replace("-", "").replace(".", "").lstrip("0")) >= 4}


def reader_b_secrets(study, reader_b) -> dict[str, str]:
    """Every string that would reveal reader B's work, or any case's identity, to reader A."""
    secrets = {"username": reader_b.username, "last name": reader_b.last_name}
    for read in study.reads.filter(reader=reader_b):
        secrets[f"read pseudonym {read.pk}"] = read.pseudonym
        secrets[f"read code {read.pk}"] = str(read.code)
    for case in Case.objects.filter(study=study):
        secrets[f"case label {case.pk}"] = case.label
        secrets[f"case pseudonym {case.pk}"] = case.pseudonym
        secrets[f"case code {case.pk}"] = str(case.code)
    rows = list(Placement.objects.filter(read__reader=reader_b)) + list(
        PlacementEvent.objects.filter(read__reader=reader_b)
    )
    for row in rows:
        for axis in ("x_mm", "y_mm", "z_mm", "i_vox", "j_vox", "k_vox"):
            value = getattr(row, axis)
            if value is not None:
                for form in _number_forms(value):
                    secrets[f"{type(row).__name__} {row.pk} {axis} as {form}"] = form
    return secrets


def walk_values(study, own, b_reads) -> dict:
    """Candidate values for every path converter, taken from the fixture's real objects."""
    case = own.case
    placement = Placement.objects.filter(read=b_reads[0]).first()
    codes = [str(own.code), str(b_reads[0].code), str(case.code), str(study.code)]
    ids = [str(placement.pk)]
    return {
        ("uuid", "*"): codes,
        ("slug", "*"): [study.slug],
        ("str", "level"): ["full", "coarse"],
        ("str", "fmt"): ["csv", "json"],
        ("str", "landmark"): ["A"],
        ("str", "*"): ids,
        ("path", "*"): ids,
        ("int", "*"): ids,
        ("regex", "app_label"): ["studies"],
        ("regex", "url"): ["no-such-page"],
    }


def response_text(response) -> str:
    """Body and headers as text; JSON is re-serialised and HTML entities are decoded."""
    if response.streaming:
        body = b"".join(response.streaming_content)
    else:
        body = response.content
    text = body.decode("utf-8", errors="replace")
    extra = [html.unescape(text)]
    if response.get("Content-Type", "").startswith("application/json") and text:
        extra.append(json.dumps(json.loads(text), ensure_ascii=False))
    headers = "\n".join(f"{key}: {value}" for key, value in response.items())
    return "\n".join([text, *extra, headers])


def request(client: Client, method: str, path: str):
    return getattr(client, method)(path)


def test_it_never_shows_reader_a_anything_of_reader_b(blinded, cast) -> None:
    """Every URL pattern x method as reader A: no secret of reader B in any response."""
    study, own, b_reads = blinded["study"], blinded["own"], blinded["b_reads"]
    secrets = reader_b_secrets(study, cast["reader_b"])
    own_codes = {str(r.code) for r in study.reads.filter(reader=cast["reader_a"])}
    leaks, errors, seen, binary = [], [], set(), 0
    for url in all_urls(walk_values(study, own, b_reads)):
        client = Client(raise_request_exception=False)
        client.force_login(cast["reader_a"])
        for method in METHODS:
            response = request(client, method, url.path)
            seen.add(url.leaf.name)
            if response.status_code >= 500 and (method.upper(), url.leaf.name) not in (
                KNOWN_SERVER_ERRORS
            ):
                errors.append(f"{method.upper()} {url.path} -> {response.status_code}")
            if response.get("Content-Type", "").startswith("application/octet-stream"):
                assert response.status_code == 200, url.path
                assert dict(url.params)["code"] in own_codes, url.path
                response.close()
                binary += 1
                continue
            text = response_text(response)
            leaks += [
                f"{method.upper()} {url.path} -> {response.status_code} shows {label}"
                for label, secret in secrets.items()
                if secret in text
            ]
    assert not leaks, "\n".join(leaks[:30])
    assert not errors, "\n".join(errors[:30])
    assert seen == {leaf.name for leaf in leaves()}
    assert binary >= 2  # reader A's own volumes were served (full and coarse)


def test_it_finds_reader_bs_strings_where_they_may_be_shown(blinded, cast) -> None:
    """The secrets are detectable: reader B's own read and the coordinator's page show them.

    Guards the test above against passing because the strings are formatted differently
    from what the pages print.
    """
    study, b_reads = blinded["study"], blinded["b_reads"]
    secrets = reader_b_secrets(study, cast["reader_b"])
    reader_b = Client()
    reader_b.force_login(cast["reader_b"])
    detail = response_text(reader_b.get(f"/api/v1/reads/{b_reads[0].code}/"))
    coordinates = [label for label, s in secrets.items() if "_mm as" in label and s in detail]
    assert len(coordinates) >= 6  # x, y, z of both of the read's current placements
    assert secrets[f"read pseudonym {b_reads[0].pk}"] in detail
    pi = Client()
    pi.force_login(cast["pi"])
    page = response_text(pi.get(f"/studies/{study.slug}/"))
    assert "Quarrington" in page
    assert all(case.label in page and case.pseudonym in page for case in study.cases.all())


def test_it_keeps_reader_as_own_placements_visible_to_reader_a(blinded, cast) -> None:
    """Blinding hides the others, not the reader's own work: A's point is in A's read."""
    own = blinded["own"]
    client = Client()
    client.force_login(cast["reader_a"])
    detail = client.get(f"/api/v1/reads/{own.code}/").json()
    placement = Placement.objects.get(read=own)
    assert [p["x_mm"] for p in detail["placements"]] == [placement.x_mm]
    assert detail["pseudonym"] == own.pseudonym
