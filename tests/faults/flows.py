"""Steps the fault test runs inside the stack: `python -m tests.faults.flows NAME JSON`.

Each prints one JSON line. They go through the services, as the web server and the
worker do; only `new_run` writes an AnalysisRun row itself, so that the same inputs can
be computed twice (request_analysis would return the stored run instead).
"""

from __future__ import annotations

import hashlib
import json
import sys
import uuid


def _setup() -> None:
    import django

    django.setup()


def submit_reads(slug: str, readers: int) -> dict:
    """The first `readers` readers place every landmark of every read and submit it.

    Points are a per-case, per-landmark position plus seeded reader noise (about 1.5 mm),
    so the analysis has real agreement to compute.
    """
    import numpy as np
    from django.contrib.auth import get_user_model
    from django.utils import timezone

    from studies.models import Study
    from studies.services import placing, reads

    study = Study.objects.get(slug=slug)
    rng = np.random.default_rng(20261202)
    users = get_user_model().objects.filter(username__startswith="reader").order_by("username")
    submitted = 0
    for user in list(users)[:readers]:
        for read in study.reads.filter(reader=user).select_related("case"):
            affine = np.array(read.case.affine)
            shape = np.array(read.case.shape)
            case_rng = np.random.default_rng(read.case.pk)
            for landmark in study.current_landmarks():
                ijk = case_rng.uniform(3, shape - 4) + rng.normal(0, 0.8, 3)
                xyz = (affine @ np.append(ijk, 1.0))[:3]
                placing.record_event(read, user, placing.EventInput(
                    landmark=landmark.code, kind="placed", client_event_id=uuid.uuid4(),
                    client_time=timezone.now(), x_mm=float(xyz[0]), y_mm=float(xyz[1]),
                    z_mm=float(xyz[2]), confidence=2))
            reads.submit_read(read, user)
            submitted += 1
    return {"submitted": submitted}


def new_run(slug: str, send: bool = True) -> dict:
    """A fresh pending run of the study's current inputs, sent to the workers if `send`."""
    from studies.models import AnalysisRun, Study
    from studies.services import analysis_runs as runs

    study = Study.objects.get(slug=slug)
    parameters = runs.parameters_of(study)
    version = runs.code_version()
    digest = runs.fingerprint(runs.placements_table(study), parameters, version)
    run = AnalysisRun.objects.create(study=study, parameters=parameters, input_digest=digest,
                                     code_version=version)
    sent = runs.send(run.pk) if send else False
    return {"run_pk": run.pk, "sent": sent}


def send_run(run_pk: int) -> dict:
    from studies.services import analysis_runs as runs

    return {"run_pk": run_pk, "sent": runs.send(run_pk)}


def request(slug: str) -> dict:
    """What a coordinator's "run the analysis" does."""
    from studies.models import Study
    from studies.services.analysis_runs import request_analysis

    run = request_analysis(Study.objects.get(slug=slug))
    run.refresh_from_db()
    return {"run_pk": run.pk, "status": run.status, "message": run.progress_message}


def run_state(run_pk: int) -> dict:
    from studies.models import AnalysisRun

    run = AnalysisRun.objects.get(pk=run_pk)
    tables = json.dumps(run.tables, sort_keys=True)
    return {
        "status": run.status,
        "attempts": run.attempts,
        "message": run.progress_message,
        "reason": run.reason,
        "tables_sha256": hashlib.sha256(tables.encode()).hexdigest(),
        "summary_sha256": hashlib.sha256(json.dumps(run.summary, sort_keys=True).encode())
        .hexdigest(),
    }


def consistency() -> dict:
    """Half-written rows: reads whose version differs from their number of events, and
    placements whose last event is not the latest event of that read and landmark."""
    from django.db.models import Count, F, Max, Q

    from studies.models import Placement, Read

    reads = Read.objects.annotate(n=Count("events")).exclude(version=F("n")).count()
    latest = Placement.objects.annotate(
        newest=Max("read__events__read_version", filter=Q(read__events__landmark=F("landmark")))
    ).exclude(last_event__read_version=F("newest")).count()
    return {"read_version_mismatch": reads, "placement_not_latest": latest}


if __name__ == "__main__":
    _setup()
    name, arguments = sys.argv[1], json.loads(sys.argv[2]) if len(sys.argv) > 2 else {}
    print(json.dumps(globals()[name](**arguments)))
