"""The Celery app, configured from Django settings (CELERY_ namespace)."""

from __future__ import annotations

import logging
import os

from celery import Celery, bootsteps

os.environ.setdefault("DJANGO_SETTINGS_MODULE", "cairn.settings")

log = logging.getLogger(__name__)
app = Celery("cairn")
app.config_from_object("django.conf:settings", namespace="CELERY")
app.autodiscover_tasks()


class ResendDeferredRuns(bootsteps.StartStopStep):
    """Each time a worker (re)connects to the broker, send the runs that could not be sent.

    A run requested while the broker was down is stored as pending and marked deferred;
    this is what makes it happen once the broker is back, with nobody having to ask again.
    """

    requires = {"celery.worker.consumer.connection:Connection"}

    def start(self, consumer) -> None:
        from studies.services.analysis_runs import resend_all_deferred

        try:
            sent = resend_all_deferred()
        except Exception:
            log.exception("could not resend deferred analysis runs")
            return
        if sent:
            log.info("resent %d deferred analysis run(s)", sent)


app.steps["consumer"].add(ResendDeferredRuns)


def _check_settings_on_worker_start() -> None:
    from .startup import check_settings

    check_settings()


_check_settings_on_worker_start()
