"""Flows run in a subprocess against a real database: `python -m tests.integration.flows NAME JSON`.

Each prints one JSON line with what it observed, for the integration tests to check.
"""

from __future__ import annotations

import json
import sys
import uuid
from datetime import timedelta
from pathlib import Path


def _setup() -> None:
    import django

    django.setup()
    from django.test.utils import setup_test_environment

    setup_test_environment()


def placement_flow() -> dict:
    """Create an open study, place, retry, move, mark not visible, submit through the API."""
    import numpy as np
    from django.conf import settings
    from django.contrib.auth import get_user_model
    from django.db import connection, transaction
    from django.test import Client
    from django.utils import timezone

    from studies.constants import Role
    from studies.imaging.geometry import voxel_to_world
    from studies.imaging.storage import write_case_files
    from studies.models import Placement, PlacementEvent
    from studies.services import cases, studies
    from studies.services.rebuild import find_mismatches
    from tests.conftest import tiny_volume

    users = get_user_model().objects
    pi = users.create_user("pi", password="pw")
    reader = users.create_user("reader_a", password="pw")
    study = studies.create_study(
        name="IT", slug="it-study", coordinator=pi, readers_per_case=1, repeat_fraction=0.0, seed=1
    )
    studies.set_protocol(
        study, [{"code": "A", "name": "A"}, {"code": "B", "name": "B", "may_be_absent": True}]
    )
    volume = tiny_volume()
    stored = write_case_files(Path(settings.CAIRN_DATA_DIR), "it/case", volume)
    cases.create_case(study, stored, checksum=volume.checksum, label="it-case")
    studies.add_member(study, reader, Role.READER)
    studies.open_study(study, now=timezone.now() - timedelta(hours=1))
    read = study.reads.get()
    client = Client()
    client.force_login(reader)
    xyz = voxel_to_world(np.array(read.case.affine), np.array([3.5, 4.25, 5.0]))
    body = {
        "client_event_id": str(uuid.uuid4()),
        "client_time": timezone.now().isoformat(),
        "landmark": "A",
        "kind": "placed",
        "x_mm": xyz[0],
        "y_mm": xyz[1],
        "z_mm": xyz[2],
        "base_version": 0,
    }
    url = f"/api/v1/reads/{read.code}/events/"
    statuses = [
        client.post(url, body, content_type="application/json").status_code for _ in range(3)
    ]
    moved = dict(body, client_event_id=str(uuid.uuid4()), kind="moved", x_mm=xyz[0] + 1.0,
                 base_version=1)
    statuses.append(client.post(url, moved, content_type="application/json").status_code)
    absent = {
        "client_event_id": str(uuid.uuid4()),
        "client_time": timezone.now().isoformat(),
        "landmark": "B",
        "kind": "marked_absent",
        "base_version": 2,
    }
    statuses.append(client.post(url, absent, content_type="application/json").status_code)
    statuses.append(client.post(f"/api/v1/reads/{read.code}/submit/").status_code)
    trigger = {}
    if connection.vendor == "postgresql":
        for sql in (
            "UPDATE studies_placementevent SET x_mm = 0",
            "DELETE FROM studies_placementevent",
        ):
            try:
                with transaction.atomic(), connection.cursor() as cursor:
                    cursor.execute(sql)
                trigger[sql.split()[0]] = "allowed"
            except Exception as error:
                trigger[sql.split()[0]] = str(error).splitlines()[0]
    placement = Placement.objects.get(landmark__code="A")
    return {
        "vendor": connection.vendor,
        "statuses": statuses,
        "events": PlacementEvent.objects.count(),
        "placements": Placement.objects.count(),
        "moved_x_ok": bool(abs(placement.x_mm - (xyz[0] + 1.0)) < 1e-9),
        "mismatches": len(find_mismatches()),
        "trigger": trigger,
        "study_pk": study.pk,
    }


def tamper(study_pk: int) -> dict:
    from studies.models import Placement

    changed = Placement.objects.filter(read__study_id=study_pk, state="placed").update(x_mm=123.0)
    return {"changed": changed}


def send_rebuild(study_pk: int) -> dict:
    from studies.tasks import rebuild_placements_task

    rebuild_placements_task.delay(study_pk=study_pk)
    return {"sent": True}


def runs() -> dict:
    """Every analysis run: [status, progress message, reason], oldest first."""
    from studies.models import AnalysisRun

    rows = AnalysisRun.objects.order_by("pk").values_list("status", "progress_message", "reason")
    return {"runs": [list(row) for row in rows]}


def mismatches() -> dict:
    from studies.services.rebuild import find_mismatches

    return {"mismatches": len(find_mismatches())}


if __name__ == "__main__":
    _setup()
    name, arguments = sys.argv[1], json.loads(sys.argv[2] if len(sys.argv) > 2 else "{}")
    print(json.dumps(globals()[name](**arguments)))
