"""Celery tasks: thin wrappers that re-fetch rows by id and call a service.

Task names are a wire contract between web servers and workers: keep them stable.
"""

from __future__ import annotations

import logging

from celery import shared_task
from django.db import OperationalError

from .models import Study
from .services.analysis_runs import STALE_AFTER, RunBusy, execute
from .services.rebuild import rebuild_placements
from .services.uploads import run_upload

log = logging.getLogger(__name__)


@shared_task(name="studies.rebuild_placements", acks_late=True, time_limit=600)
def rebuild_placements_task(*, study_pk: int) -> int:
    """Repair a study's derived placements from its events; returns rows corrected."""
    study = Study.objects.filter(pk=study_pk).first()
    if study is None:
        log.info("study %s is gone; nothing to rebuild", study_pk)
        return 0
    return rebuild_placements(study)


@shared_task(
    bind=True,
    name="studies.compute_analysis",
    acks_late=True,
    reject_on_worker_lost=True,
    time_limit=1800,
    soft_time_limit=1700,
    autoretry_for=(OperationalError,),
    max_retries=3,
    default_retry_delay=10,
)
def compute_analysis(self, *, run_pk: int) -> str | None:
    """Compute one analysis run (a duplicate or late message for a finished run does nothing).

    When another worker holds the run, check again after the stale period: if that worker
    was killed, this delivery takes the run over and computes it from the start.
    """
    try:
        run = execute(run_pk)
    except RunBusy as busy:
        raise self.retry(
            exc=busy, countdown=STALE_AFTER.total_seconds() + 5, max_retries=10
        ) from busy
    return run.status if run is not None else None


@shared_task(name="studies.import_upload", acks_late=True, time_limit=3600)
def import_upload_task(*, job_id: str) -> str:
    """Import one saved coordinator upload; returns its final state (finished or failed)."""
    status = run_upload(job_id)
    log.info("upload %s: %s", job_id, status.get("state"))
    return str(status.get("state"))
