"""Events cannot be changed or deleted through the models; placements rebuild from events."""

from __future__ import annotations

import uuid

import pytest
from django.core.management import call_command
from django.core.management.base import CommandError
from django.utils import timezone

from studies.constants import EventKind
from studies.models import Placement, PlacementEvent
from studies.services import placing


def _one_event(study, user):
    read = study.reads.filter(reader=user).first()
    x, y, z = (
        read.case.affine[0][3] + 2.0,
        read.case.affine[1][3] + 3.0,
        read.case.affine[2][3] + 4.0,
    )
    data = placing.EventInput(
        "A", EventKind.PLACED, uuid.uuid4(), timezone.now(), x_mm=x, y_mm=y, z_mm=z
    )
    return placing.record_event(read, user, data).event


def test_it_refuses_save_on_an_existing_event(open_study, cast) -> None:
    event = _one_event(open_study, cast["reader_a"])
    event.x_mm = 0.0
    with pytest.raises(PermissionError):
        event.save()


def test_it_refuses_delete_on_an_event_and_on_querysets(open_study, cast) -> None:
    event = _one_event(open_study, cast["reader_a"])
    with pytest.raises(PermissionError):
        event.delete()
    with pytest.raises(PermissionError):
        PlacementEvent.objects.all().delete()
    with pytest.raises(PermissionError):
        PlacementEvent.objects.filter(pk=event.pk).update(x_mm=1.0)
    assert PlacementEvent.objects.get(pk=event.pk).x_mm == event.x_mm


def test_it_reports_no_mismatch_when_placements_match_events(open_study, cast, capsys) -> None:
    _one_event(open_study, cast["reader_a"])
    call_command("rebuild_placements", "--check")
    assert "no mismatch" in capsys.readouterr().out


def test_it_finds_and_repairs_a_tampered_placement(open_study, cast) -> None:
    event = _one_event(open_study, cast["reader_a"])
    Placement.objects.filter(last_event=event).update(x_mm=event.x_mm + 5.0)
    with pytest.raises(CommandError, match="1 placement"):
        call_command("rebuild_placements", "--check")
    call_command("rebuild_placements")
    call_command("rebuild_placements", "--check")
    assert Placement.objects.get(last_event=event).x_mm == event.x_mm


def test_it_recreates_a_deleted_placement_from_events(open_study, cast) -> None:
    event = _one_event(open_study, cast["reader_a"])
    Placement.objects.all().delete()
    call_command("rebuild_placements")
    assert Placement.objects.get().last_event == event
