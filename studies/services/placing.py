"""Recording placement events and deriving current placements from them.

The events table is the truth. `record_event` appends one event and updates the derived
Placement row in the same transaction; `apply_event` is the single rule for how an event
changes a placement, used both here and when placements are rebuilt from events.
"""

from __future__ import annotations

import math
import uuid
from dataclasses import dataclass
from datetime import datetime

import numpy as np
from django.db import IntegrityError, transaction
from django.utils import timezone

from ..constants import CONFIDENCE_RANGE, VOLUME_MARGIN_VOXELS, EventKind, PlacementState
from ..imaging.geometry import world_to_voxel
from ..models import Case, Landmark, Placement, PlacementEvent, Read
from .errors import ConflictError, ServiceError
from .reads import _writable


@dataclass(frozen=True)
class EventInput:
    """A reader's action as the page sends it (world mm, RAS+)."""

    landmark: str
    kind: str
    client_event_id: uuid.UUID
    client_time: datetime
    x_mm: float | None = None
    y_mm: float | None = None
    z_mm: float | None = None
    confidence: int | None = None
    base_version: int | None = None


@dataclass(frozen=True)
class PlacementSnapshot:
    """The state an event leaves a landmark in (None: nothing placed)."""

    state: str
    xyz_mm: tuple[float, float, float] | None
    ijk_vox: tuple[float, float, float] | None
    confidence: int | None
    placed_at: datetime


def apply_event(
    current: PlacementSnapshot | None, event: PlacementEvent
) -> PlacementSnapshot | None:
    """The placement after `event`, given the placement before it.

    A move without a confidence keeps the confidence given before.
    """
    if event.kind == EventKind.REMOVED:
        return None
    confidence = event.confidence
    if confidence is None and current is not None and event.kind == EventKind.MOVED:
        confidence = current.confidence
    if event.kind == EventKind.MARKED_ABSENT:
        return PlacementSnapshot(PlacementState.ABSENT, None, None, confidence, event.client_time)
    return PlacementSnapshot(
        PlacementState.PLACED,
        (event.x_mm, event.y_mm, event.z_mm),
        (event.i_vox, event.j_vox, event.k_vox),
        confidence,
        event.client_time,
    )


def snapshot_of(placement: Placement | None) -> PlacementSnapshot | None:
    """The stored placement row as a snapshot (None when there is no row)."""
    if placement is None:
        return None
    placed = placement.state == PlacementState.PLACED
    return PlacementSnapshot(
        placement.state,
        (placement.x_mm, placement.y_mm, placement.z_mm) if placed else None,
        (placement.i_vox, placement.j_vox, placement.k_vox) if placed else None,
        placement.confidence,
        placement.placed_at,
    )


def point_in_case(case: Case, xyz: tuple, what: str) -> tuple[tuple[float, ...], tuple[float, ...]]:
    """Check a world point (mm, RAS+) lies in the case's volume; return (xyz, canonical ijk).

    The one check used for readers' placements and adjudicators' new points: finite
    coordinates, inside the volume up to half a voxel beyond the outermost voxel centres.
    """
    if any(v is None for v in xyz):
        raise ServiceError(f"{what} needs x_mm, y_mm and z_mm")
    if not all(isinstance(v, int | float) and math.isfinite(v) for v in xyz):
        raise ServiceError(f"coordinates must be finite numbers, got {list(xyz)}")
    ijk = world_to_voxel(np.array(case.affine), np.array(xyz, dtype=np.float64))
    shape = np.array(case.shape)
    low, high = -VOLUME_MARGIN_VOXELS, shape - 1 + VOLUME_MARGIN_VOXELS
    if np.any(ijk < low) or np.any(ijk > high):
        raise ServiceError(
            f"point {list(xyz)} mm is outside the volume (voxel {np.round(ijk, 2).tolist()}, "
            f"shape {shape.tolist()})"
        )
    return tuple(float(v) for v in xyz), tuple(float(v) for v in ijk)


# The lookups of a placement save use get(), not first(): no ORDER BY to compile (measured:
# ordering was about a fifth of a save's CPU time in the web worker).


def _landmark(read: Read, code: str) -> Landmark:
    try:
        return Landmark.objects.only("id", "code", "may_be_absent").get(
            study_id=read.study_id, protocol_version=read.protocol_version, code=code
        )
    except Landmark.DoesNotExist:
        raise ServiceError(f"landmark {code!r} is not in this read's protocol") from None


def _current(read: Read, landmark: Landmark) -> Placement | None:
    """The landmark's stored placement in this read, with `landmark` set on it (None: none)."""
    try:
        placement = Placement.objects.get(read=read, landmark=landmark)
    except Placement.DoesNotExist:
        return None
    placement.landmark = landmark
    return placement


def _check_values(data: EventInput) -> None:
    """Checks that need no database: the kind and the confidence."""
    if data.kind not in EventKind.values:
        raise ServiceError(
            f"unknown event kind {data.kind!r}; use one of {', '.join(EventKind.values)}"
        )
    if data.confidence is not None and not (
        isinstance(data.confidence, int)
        and CONFIDENCE_RANGE[0] <= data.confidence <= CONFIDENCE_RANGE[1]
    ):
        raise ServiceError(f"confidence must be 1, 2 or 3, got {data.confidence!r}")


def _check_kind(landmark: Landmark, current: Placement | None, kind: str) -> None:
    if kind == EventKind.MARKED_ABSENT and not landmark.may_be_absent:
        raise ServiceError(f"landmark {landmark.code} cannot be marked not visible")
    if kind in (EventKind.REMOVED, EventKind.MOVED) and current is None:
        raise ServiceError(f"landmark {landmark.code} has nothing to {kind.rstrip('d')}")


@dataclass(frozen=True)
class Recorded:
    """What `record_event` did.

    event: the stored event (the one stored before, for a retry); created: False for a
    retry; version: the read's version now; placement: the landmark's current placement
    (None when nothing is placed), with its landmark loaded.
    """

    event: PlacementEvent
    created: bool
    version: int
    placement: Placement | None


def record_event(read: Read, user, data: EventInput) -> Recorded:
    """Append one event and update the placement, in one transaction.

    A retried event (same client_event_id) returns the stored one and changes nothing.
    With `base_version` set, the event is refused with ConflictError unless the read is
    still at that version, so a second tab cannot silently overwrite the first. Only the
    read's row is locked; a placement save costs seven queries inside the transaction.
    """
    _check_values(data)
    try:
        with transaction.atomic():
            return _record(read, user, data)
    except IntegrityError:
        stored = _stored(data.client_event_id)
        if stored is None:
            raise
        return _retried(read, stored)


def _stored(client_event_id: uuid.UUID) -> PlacementEvent | None:
    """The event already stored under this client id (a retry), if any."""
    try:
        return PlacementEvent.objects.get(client_event_id=client_event_id)
    except PlacementEvent.DoesNotExist:
        return None


def _retried(read: Read, stored: PlacementEvent) -> Recorded:
    if stored.read_id != read.pk:
        raise ServiceError("this event id was already used for another read")
    version = Read.objects.filter(pk=read.pk).values_list("version", flat=True).get()
    return Recorded(stored, False, version, _current(read, stored.landmark))


def _record(read: Read, user, data: EventInput) -> Recorded:
    stored = _stored(data.client_event_id)
    if stored is not None:
        return _retried(read, stored)
    read = _writable(read, user)
    if data.base_version is not None and data.base_version != read.version:
        raise ConflictError(
            f"this read changed elsewhere (version {read.version}, this page had "
            f"{data.base_version}); reload to continue"
        )
    landmark = _landmark(read, data.landmark)
    current = _current(read, landmark)
    _check_kind(landmark, current, data.kind)
    xyz = ijk = (None, None, None)
    if data.kind in (EventKind.PLACED, EventKind.MOVED):
        xyz, ijk = point_in_case(read.case, (data.x_mm, data.y_mm, data.z_mm),
                                 f"a {data.kind} event")
    read.version += 1
    if read.opened_at is None:
        read.opened_at = timezone.now()
        read.status = "open"
    read.save(update_fields=["version", "opened_at", "status"])
    event = PlacementEvent.objects.create(
        read=read,
        landmark=landmark,
        kind=data.kind,
        x_mm=xyz[0],
        y_mm=xyz[1],
        z_mm=xyz[2],
        i_vox=ijk[0],
        j_vox=ijk[1],
        k_vox=ijk[2],
        confidence=data.confidence,
        client_time=data.client_time,
        server_time=timezone.now(),
        client_event_id=data.client_event_id,
        read_version=read.version,
    )
    placement = store_snapshot(read, landmark, current, apply_event(snapshot_of(current), event),
                               event)
    return Recorded(event, True, read.version, placement)


def store_snapshot(
    read: Read,
    landmark: Landmark,
    current: Placement | None,
    snapshot: PlacementSnapshot | None,
    event: PlacementEvent,
) -> Placement | None:
    """Write a snapshot to the Placement table, one query; return the row (None: deleted).

    `current` is the stored row (None when there is none); nothing is placed when
    `snapshot` is None, and then the row is deleted.
    """
    if snapshot is None:
        if current is not None:
            current.delete()
        return None
    placement = current or Placement(read=read, landmark=landmark)
    placement.state = snapshot.state
    placement.x_mm, placement.y_mm, placement.z_mm = snapshot.xyz_mm or (None, None, None)
    placement.i_vox, placement.j_vox, placement.k_vox = snapshot.ijk_vox or (None, None, None)
    placement.confidence = snapshot.confidence
    placement.placed_at = snapshot.placed_at
    placement.last_event = event
    if current is None:
        placement.save(force_insert=True)
    else:
        placement.save(force_update=True)
    return placement
