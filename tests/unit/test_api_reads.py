"""The reading API: a reader's own reads only, events idempotent, refusals as JSON errors."""

from __future__ import annotations

import uuid
from pathlib import Path

import numpy as np
import pytest
import zstandard
from django.conf import settings
from django.utils import timezone
from rest_framework.test import APIClient

from studies.imaging.geometry import voxel_to_world
from studies.imaging.storage import read_canonical
from studies.models import PlacementEvent, Read


@pytest.fixture
def client_for(cast):
    def make(name: str) -> APIClient:
        client = APIClient()
        client.force_authenticate(cast[name])
        return client

    return make


def own_read(study, user):
    return study.reads.filter(reader=user).order_by("worklist_position").first()


def event_body(read, **overrides) -> dict:
    xyz = voxel_to_world(np.array(read.case.affine), np.array([2.0, 3.0, 4.0]))
    body = {
        "client_event_id": str(uuid.uuid4()),
        "client_time": timezone.now().isoformat(),
        "landmark": "A",
        "kind": "placed",
        "x_mm": xyz[0],
        "y_mm": xyz[1],
        "z_mm": xyz[2],
        "confidence": 2,
        "base_version": Read.objects.get(pk=read.pk).version,
    }
    body.update(overrides)
    return body


def test_it_lists_only_the_readers_own_available_reads(open_study, cast, client_for) -> None:
    response = client_for("reader_a").get("/api/v1/worklist/")
    assert response.status_code == 200
    codes = {r["code"] for r in response.json()["reads"]}
    assert codes == {str(r.code) for r in open_study.reads.filter(reader=cast["reader_a"])}


def test_it_gives_the_header_without_identifying_fields(open_study, cast, client_for) -> None:
    read = own_read(open_study, cast["reader_a"])
    data = client_for("reader_a").get(f"/api/v1/reads/{read.code}/").json()
    assert data["pseudonym"] == read.pseudonym
    assert data["volume"]["shape"] == read.case.shape
    text = str(data)
    assert read.case.label not in text and read.case.pseudonym not in text
    assert str(read.case.code) not in text


def test_it_returns_404_for_another_readers_read(open_study, cast, client_for) -> None:
    read = own_read(open_study, cast["reader_b"])
    for name in ("reader_a", "outsider", "pi"):
        response = client_for(name).get(f"/api/v1/reads/{read.code}/")
        assert response.status_code == 404
        assert "error" in response.json()


def test_it_serves_the_volume_bytes_in_i_fastest_order(open_study, cast, client_for) -> None:
    """The bytes equal nibabel's array of the stored canonical NIfTI, Fortran order."""
    read = own_read(open_study, cast["reader_a"])
    client = client_for("reader_a")
    url = f"/api/v1/reads/{read.code}/volume/full/"
    compressed = client.get(url, HTTP_ACCEPT_ENCODING="gzip, zstd")
    assert compressed["Content-Encoding"] == "zstd"
    payload = zstandard.ZstdDecompressor().decompress(b"".join(compressed.streaming_content))
    plain = b"".join(client.get(url, HTTP_ACCEPT_ENCODING="gzip").streaming_content)
    image = read_canonical(Path(settings.CAIRN_DATA_DIR), read.case.data_dir)
    expected = np.asanyarray(image.dataobj).astype("<i2").tobytes(order="F")
    assert payload == expected == plain


def test_it_stores_an_event_once_when_retried(open_study, cast, client_for) -> None:
    read = own_read(open_study, cast["reader_a"])
    client = client_for("reader_a")
    body = event_body(read)
    first = client.post(f"/api/v1/reads/{read.code}/events/", body, format="json")
    again = client.post(f"/api/v1/reads/{read.code}/events/", body, format="json")
    assert (first.status_code, again.status_code) == (201, 200)
    assert first.json()["version"] == again.json()["version"] == 1
    assert PlacementEvent.objects.count() == 1


@pytest.mark.parametrize(
    ("overrides", "status", "message"),
    [
        ({"kind": "teleported"}, 400, "kind"),
        ({"x_mm": "left-ish"}, 400, "x_mm"),
        ({"x_mm": 1e6}, 400, "outside the volume"),
        ({"landmark": "NOPE"}, 400, "protocol"),
        ({"client_event_id": "not-a-uuid"}, 400, "client_event_id"),
        ({"confidence": 7}, 400, "confidence"),
        ({"base_version": 5}, 409, "changed elsewhere"),
        ({"base_version": None}, 400, "base_version"),
    ],
)
def test_it_refuses_bad_events_with_a_message_and_stores_nothing(
    open_study, cast, client_for, overrides, status, message
) -> None:
    read = own_read(open_study, cast["reader_a"])
    response = client_for("reader_a").post(
        f"/api/v1/reads/{read.code}/events/", event_body(read, **overrides), format="json"
    )
    assert response.status_code == status
    assert message in response.json()["error"]
    assert PlacementEvent.objects.count() == 0


def test_it_refuses_a_malformed_body(open_study, cast, client_for) -> None:
    read = own_read(open_study, cast["reader_a"])
    response = client_for("reader_a").post(
        f"/api/v1/reads/{read.code}/events/", "{not json", content_type="application/json"
    )
    assert response.status_code == 400
    assert response.json()["error"]


def test_it_submits_a_complete_read_and_locks_it(open_study, cast, client_for) -> None:
    read = own_read(open_study, cast["reader_a"])
    client = client_for("reader_a")
    client.post(f"/api/v1/reads/{read.code}/events/", event_body(read), format="json")
    incomplete = client.post(f"/api/v1/reads/{read.code}/submit/")
    assert incomplete.status_code == 400 and "B" in incomplete.json()["error"]
    client.post(
        f"/api/v1/reads/{read.code}/events/",
        event_body(read, landmark="B", kind="marked_absent", x_mm=None, y_mm=None, z_mm=None),
        format="json",
    )
    done = client.post(f"/api/v1/reads/{read.code}/submit/")
    assert done.status_code == 200 and done.json()["status"] == "submitted"
    late = client.post(f"/api/v1/reads/{read.code}/events/", event_body(read), format="json")
    assert late.status_code == 400 and "submitted" in late.json()["error"]


def test_it_requires_login(open_study, cast) -> None:
    read = own_read(open_study, cast["reader_a"])
    response = APIClient().get(f"/api/v1/reads/{read.code}/")
    assert response.status_code == 403
    assert "error" in response.json()


def test_the_schema_lists_every_endpoint(db) -> None:
    response = APIClient().get("/api/schema/", HTTP_ACCEPT="application/vnd.oai.openapi+json")
    assert response.status_code == 200
    paths = set(response.json()["paths"]) if "json" in response["Content-Type"] else set()
    if not paths:
        import yaml  # drf-spectacular depends on PyYAML

        paths = set(yaml.safe_load(response.content)["paths"])
    for expected in (
        "/api/v1/worklist/",
        "/api/v1/reads/{code}/events/",
        "/api/v1/reads/{code}/submit/",
        "/api/v1/reads/{code}/volume/{level}/",
    ):
        assert expected in paths
    docs = APIClient().get("/api/docs/")
    assert docs.status_code == 200
