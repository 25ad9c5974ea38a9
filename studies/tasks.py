"""Celery tasks: thin wrappers that re-fetch rows by id and call a service.

Task names are a wire contract between web servers and workers: keep them stable.
"""

from __future__ import annotations

import logging

from celery import shared_task

from .models import Study
from .services.rebuild import rebuild_placements

log = logging.getLogger(__name__)


@shared_task(name="studies.rebuild_placements", acks_late=True, time_limit=600)
def rebuild_placements_task(*, study_pk: int) -> int:
    """Repair a study's derived placements from its events; returns rows corrected."""
    study = Study.objects.filter(pk=study_pk).first()
    if study is None:
        log.info("study %s is gone; nothing to rebuild", study_pk)
        return 0
    return rebuild_placements(study)
