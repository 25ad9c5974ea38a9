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


class SendWaitingRuns(bootsteps.StartStopStep):
    """Send the analysis runs that wait in the database, from every worker.

    On each (re)connection to the broker, and every SEND_EVERY_S seconds after: runs asked
    for while the broker was down (deferred) and runs whose debounce has passed
    (studies.services.analysis_runs.send_waiting_runs). So a deferred run happens once the
    broker is back and a debounced one on time, with nobody having to ask again.
    """

    requires = {"celery.worker.consumer.connection:Connection"}
    SEND_EVERY_S = 5.0

    def __init__(self, parent, **kwargs) -> None:
        super().__init__(parent, **kwargs)
        self.tick = None

    def start(self, consumer) -> None:
        self.send()
        timer = getattr(consumer, "timer", None)
        if timer is not None and self.tick is None:
            self.tick = timer.call_repeatedly(self.SEND_EVERY_S, self.send)

    def stop(self, consumer) -> None:
        if self.tick is not None:
            self.tick.cancel()
            self.tick = None

    def send(self) -> None:
        from django.db import close_old_connections

        from studies.services.analysis_runs import send_waiting_runs

        try:
            close_old_connections()  # a long-lived process: drop a connection gone stale
            sent = send_waiting_runs()
        except Exception:
            log.exception("could not send the waiting analysis runs")
            return
        if sent:
            log.info("sent %d waiting analysis run(s)", sent)


app.steps["consumer"].add(SendWaitingRuns)


def _check_settings_on_worker_start() -> None:
    from .startup import check_settings

    check_settings()


_check_settings_on_worker_start()
