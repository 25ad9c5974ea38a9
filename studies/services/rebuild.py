"""Rebuilding current placements from the events table, or checking them against it."""

from __future__ import annotations

from dataclasses import dataclass

from django.db import transaction

from ..models import Placement, PlacementEvent
from .placing import PlacementSnapshot, apply_event, snapshot_of, store_snapshot


@dataclass(frozen=True)
class Mismatch:
    read: str
    landmark: str
    stored: PlacementSnapshot | None
    from_events: PlacementSnapshot | None


def placements_from_events(
    study=None,
) -> dict[tuple[int, int], tuple[PlacementSnapshot | None, PlacementEvent]]:
    """Replay every event in order: (read id, landmark id) -> (final snapshot, last event)."""
    events = PlacementEvent.objects.order_by("read_id", "read_version")
    if study is not None:
        events = events.filter(read__study=study)
    state: dict[tuple[int, int], tuple[PlacementSnapshot | None, PlacementEvent]] = {}
    for event in events.iterator(chunk_size=5000):
        key = (event.read_id, event.landmark_id)
        previous = state.get(key, (None, event))[0]
        state[key] = (apply_event(previous, event), event)
    return state


def find_mismatches(study=None) -> list[Mismatch]:
    """Placements that differ from what the events say they should be."""
    replayed = placements_from_events(study)
    stored_rows = Placement.objects.select_related("read", "landmark")
    if study is not None:
        stored_rows = stored_rows.filter(read__study=study)
    stored = {(p.read_id, p.landmark_id): p for p in stored_rows}
    mismatches = []
    for key in sorted(set(replayed) | set(stored)):
        expected = replayed.get(key, (None, None))[0]
        row = stored.get(key)
        actual = snapshot_of(row)
        if expected != actual:
            event = replayed.get(key, (None, None))[1]
            read = row.read if row else event.read
            landmark = row.landmark if row else event.landmark
            mismatches.append(Mismatch(read.pseudonym, landmark.code, actual, expected))
    return mismatches


@transaction.atomic
def rebuild_placements(study=None) -> int:
    """Rewrite the Placement table from events; return how many rows were corrected."""
    mismatches = find_mismatches(study)
    if not mismatches:
        return 0
    replayed = placements_from_events(study)
    stored_rows = (
        Placement.objects.all() if study is None else Placement.objects.filter(read__study=study)
    )
    stored = {(p.read_id, p.landmark_id): p for p in stored_rows}
    for key in set(replayed) | set(stored):
        snapshot, event = replayed.get(key, (None, None))
        row = stored.get(key)
        if snapshot_of(row) == snapshot:
            continue
        if event is None:
            row.delete()
        else:
            store_snapshot(event.read, event.landmark, row, snapshot, event)
    return len(mismatches)
