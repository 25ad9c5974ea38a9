"""Recording placement events: idempotent retries, refusals that store nothing, conflicts."""

from __future__ import annotations

import uuid

import numpy as np
import pytest
from django.utils import timezone

from studies.constants import EventKind, PlacementState
from studies.imaging.geometry import voxel_to_world
from studies.models import Placement, PlacementEvent, Read
from studies.services import placing, reads
from studies.services.errors import ConflictError, NotAllowed, ServiceError


def first_read(study, user) -> Read:
    return study.reads.filter(reader=user).order_by("worklist_position").first()


def place(read, user, landmark="A", ijk=(3.25, 4.5, 2.0), **extra):
    xyz = voxel_to_world(np.array(read.case.affine), np.array(ijk))
    data = placing.EventInput(
        landmark=landmark,
        kind=extra.pop("kind", EventKind.PLACED),
        client_event_id=extra.pop("client_event_id", uuid.uuid4()),
        client_time=timezone.now(),
        x_mm=float(xyz[0]),
        y_mm=float(xyz[1]),
        z_mm=float(xyz[2]),
        **extra,
    )
    return placing.record_event(read, user, data)


def test_it_stores_world_mm_and_the_continuous_voxel_index(open_study, cast) -> None:
    read = first_read(open_study, cast["reader_a"])
    recorded = place(read, cast["reader_a"], ijk=(3.25, 4.5, 2.0))
    event = recorded.event
    assert recorded.created and recorded.version == 1
    np.testing.assert_allclose([event.i_vox, event.j_vox, event.k_vox], [3.25, 4.5, 2.0], atol=1e-9)
    placement = Placement.objects.get(read=read)
    assert placement.state == PlacementState.PLACED
    assert (placement.x_mm, placement.y_mm, placement.z_mm) == (event.x_mm, event.y_mm, event.z_mm)


def test_it_stores_a_retried_event_once(open_study, cast) -> None:
    read = first_read(open_study, cast["reader_a"])
    event_id = uuid.uuid4()
    first = place(read, cast["reader_a"], client_event_id=event_id)
    again = place(read, cast["reader_a"], client_event_id=event_id)
    assert first.created and not again.created
    assert first.event.pk == again.event.pk
    assert again.version == 1 and again.placement.pk == first.placement.pk
    assert PlacementEvent.objects.filter(client_event_id=event_id).count() == 1
    read.refresh_from_db()
    assert read.version == 1


@pytest.mark.parametrize(
    ("ijk", "message"),
    [((-2.0, 0.0, 0.0), "outside the volume"), ((0.0, 0.0, 10.6), "outside the volume")],
)
def test_it_refuses_points_outside_the_volume(open_study, cast, ijk, message) -> None:
    read = first_read(open_study, cast["reader_a"])
    with pytest.raises(ServiceError, match=message):
        place(read, cast["reader_a"], ijk=ijk)
    assert not PlacementEvent.objects.exists() and not Placement.objects.exists()


def test_it_accepts_a_point_within_half_a_voxel_of_the_edge(open_study, cast) -> None:
    read = first_read(open_study, cast["reader_a"])
    assert place(read, cast["reader_a"], ijk=(-0.49, 13.49, 9.49)).created


def test_it_refuses_non_finite_coordinates(open_study, cast) -> None:
    read = first_read(open_study, cast["reader_a"])
    data = placing.EventInput(
        "A", EventKind.PLACED, uuid.uuid4(), timezone.now(), x_mm=float("nan"), y_mm=0.0, z_mm=0.0
    )
    with pytest.raises(ServiceError, match="finite"):
        placing.record_event(read, cast["reader_a"], data)
    assert not PlacementEvent.objects.exists()


def test_it_refuses_a_landmark_outside_the_protocol(open_study, cast) -> None:
    read = first_read(open_study, cast["reader_a"])
    with pytest.raises(ServiceError, match="not in this read's protocol"):
        place(read, cast["reader_a"], landmark="Z")


def test_it_refuses_not_visible_for_a_landmark_that_must_be_present(open_study, cast) -> None:
    read = first_read(open_study, cast["reader_a"])
    data = placing.EventInput("A", EventKind.MARKED_ABSENT, uuid.uuid4(), timezone.now())
    with pytest.raises(ServiceError, match="cannot be marked not visible"):
        placing.record_event(read, cast["reader_a"], data)


def test_it_refuses_another_readers_read(open_study, cast) -> None:
    read = first_read(open_study, cast["reader_a"])
    with pytest.raises(NotAllowed):
        place(read, cast["reader_b"])
    assert not PlacementEvent.objects.exists()


def test_it_refuses_events_on_a_submitted_read(open_study, cast) -> None:
    user = cast["reader_a"]
    read = first_read(open_study, user)
    place(read, user, landmark="A")
    placing.record_event(
        read, user, placing.EventInput("B", EventKind.MARKED_ABSENT, uuid.uuid4(), timezone.now())
    )
    reads.submit_read(read, user)
    with pytest.raises(ServiceError, match="submitted"):
        place(read, user, landmark="A", kind=EventKind.MOVED)
    assert PlacementEvent.objects.count() == 2


def test_it_refuses_a_stale_version_from_a_second_tab(open_study, cast) -> None:
    user = cast["reader_a"]
    read = first_read(open_study, user)
    place(read, user, base_version=0)
    with pytest.raises(ConflictError, match="changed elsewhere"):
        place(read, user, landmark="A", kind=EventKind.MOVED, base_version=0)
    place(read, user, landmark="A", kind=EventKind.MOVED, base_version=1)


def test_it_removes_a_placement_and_keeps_the_events(open_study, cast) -> None:
    user = cast["reader_a"]
    read = first_read(open_study, user)
    place(read, user)
    placing.record_event(
        read, user, placing.EventInput("A", EventKind.REMOVED, uuid.uuid4(), timezone.now())
    )
    assert not Placement.objects.filter(read=read).exists()
    assert PlacementEvent.objects.filter(read=read).count() == 2


def test_it_refuses_to_submit_an_incomplete_read(open_study, cast) -> None:
    user = cast["reader_a"]
    read = first_read(open_study, user)
    place(read, user, landmark="A")
    with pytest.raises(ServiceError, match="B"):
        reads.submit_read(read, user)
