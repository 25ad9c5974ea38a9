"""Analysis runs: read a study's placements into the core's table, run it, store the result.

A run is keyed by its study and the fingerprint of its inputs (the placements table, the
parameters and the analysis code version): asking again for the same inputs returns the
stored run instead of computing a duplicate, and at most one run per study waits in the
queue (requests made meanwhile fold into it).
"""

from __future__ import annotations

import functools
import hashlib
import json
import logging
import math
from datetime import timedelta
from pathlib import Path

import numpy as np
import pandas as pd
from django.conf import settings
from django.db import transaction
from django.db.models import F, Q
from django.utils import timezone

from .. import analysis
from ..analysis.pipeline import AnalysisParameterError, run_analysis
from ..analysis.table import PlacementTableError
from ..constants import PlacementState, ReadStatus, RunStatus
from ..models import AnalysisRun, Placement, Study

log = logging.getLogger(__name__)

#: A run whose worker has not reported for this long may be taken over by a redelivery.
STALE_AFTER = timedelta(minutes=1)
#: progress_message prefix of a waiting run whose message could not reach the broker.
DEFERRED = "deferred:"
#: progress_message prefix of a run that waits out the debounce before it is sent.
DEBOUNCED = "waiting:"
PLACEMENT_COLUMNS = [
    "case", "landmark", "reader", "read", "x_mm", "y_mm", "z_mm", "absent", "placed_at",
]


@functools.cache
def code_version() -> str:
    """cairn's version plus a hash of the analysis core's source, so code changes rerun.

    Computed once per process: the sources do not change while it runs.
    """
    import cairn

    digest = hashlib.sha256()
    for path in sorted(Path(analysis.__file__).parent.glob("*.py")):
        digest.update(path.read_bytes())
    return f"{cairn.__version__}+{digest.hexdigest()[:12]}"


def placements_table(study: Study) -> pd.DataFrame:
    """The study's submitted placements as the core's long table (one query)."""
    rows = (
        Placement.objects.filter(read__study=study, read__status=ReadStatus.SUBMITTED)
        .order_by("read__case__pseudonym", "landmark__order", "read__reader__username",
                  "read__read_number")
        .values_list("read__case__pseudonym", "landmark__code", "read__reader__username",
                     "read__read_number", "x_mm", "y_mm", "z_mm", "state", "placed_at")
    )
    table = pd.DataFrame.from_records(list(rows), columns=PLACEMENT_COLUMNS)
    table["absent"] = (table["absent"] == PlacementState.ABSENT).astype(int)
    table["placed_at"] = [t.isoformat() for t in table["placed_at"]]
    return table


def parameters_of(study: Study) -> dict:
    return {"consensus": study.consensus_method, "tolerance_mm": float(study.tolerance_mm)}


def fingerprint(table: pd.DataFrame, parameters: dict, version: str) -> str:
    digest = hashlib.sha256(table.to_csv(index=False).encode())
    digest.update(json.dumps(parameters, sort_keys=True).encode())
    digest.update(version.encode())
    return digest.hexdigest()


def request_analysis(study: Study, *, delay_s: float = 0.0) -> AnalysisRun:
    """Ask for an analysis of the study's current placements.

    Returns the waiting run when one waits already, the stored run when the inputs have not
    changed since it was computed, else a new pending run. With `delay_s` (a submitted read
    asks with settings.CAIRN_ANALYSIS_DEBOUNCE_SECONDS) a new run is not sent at once: it
    waits in the database, marked DEBOUNCED, and `send_waiting_runs` sends it once the delay
    has passed, so reads submitted meanwhile fold into it. Asking with no delay sends a
    waiting run at once.

    The delay lives in the database, not in the broker: a message held back by the broker
    (an ETA task) sits unacknowledged in the worker, and kombu's Redis transport crashed the
    worker when it restored such a message after losing the broker (measured here with
    `make faulttest`, kombu 5.7.0).
    """
    with transaction.atomic():
        Study.objects.select_for_update().filter(pk=study.pk).first()
        waiting = study.analysis_runs.filter(status=RunStatus.PENDING).first()
        if waiting is not None:
            if waiting.progress_message.startswith(DEFERRED) or delay_s <= 0:
                transaction.on_commit(lambda: send(waiting.pk))
            return waiting
        parameters = parameters_of(study)
        version = code_version()
        digest = fingerprint(placements_table(study), parameters, version)
        done = study.analysis_runs.filter(input_digest=digest).exclude(status=RunStatus.FAILED)
        if done.exists():
            return done.first()
        run = AnalysisRun.objects.create(study=study, parameters=parameters, input_digest=digest,
                                         code_version=version)
        if delay_s > 0:
            due = timezone.localtime(run.requested_at + timedelta(seconds=delay_s))
            run.progress_message = (f"{DEBOUNCED} starts about {due:%H:%M:%S}, so reads "
                                    f"submitted meanwhile join this run")
            run.save(update_fields=["progress_message"])
        else:
            transaction.on_commit(lambda: send(run.pk))
    return run


def send(run_pk: int) -> bool:
    """Send a pending run to the workers now; True if this call sent it.

    The run is first marked queued by a conditional update, so two callers (two workers'
    timers, a poll and a "run now") send it once. When the broker cannot be reached the run
    is marked DEFERRED, with a visible message, and is sent again later.
    """
    from ..tasks import compute_analysis

    marked = AnalysisRun.objects.filter(pk=run_pk, status=RunStatus.PENDING).exclude(
        progress_message="queued").update(progress_message="queued")
    if not marked:
        return False
    try:
        compute_analysis.apply_async(kwargs={"run_pk": run_pk})
    except Exception as error:
        log.warning("analysis run %s deferred: broker unreachable (%s)", run_pk, error)
        AnalysisRun.objects.filter(pk=run_pk).update(
            progress_message=f"{DEFERRED} the task queue is unreachable; it will be sent again")
        return False
    return True


def send_waiting_runs(study: Study | None = None, now=None) -> int:
    """Send every run that waits and is due; return how many were sent.

    Due: a DEFERRED run (its message never reached the broker), or a DEBOUNCED run whose
    debounce (settings.CAIRN_ANALYSIS_DEBOUNCE_SECONDS since it was asked for) has passed.
    Called by each worker when it (re)connects and every few seconds after (cairn/celery.py),
    and by the dashboard's progress poll for its study.
    """
    now = now or timezone.now()
    debounce = timedelta(seconds=settings.CAIRN_ANALYSIS_DEBOUNCE_SECONDS)
    waiting = AnalysisRun.objects.filter(status=RunStatus.PENDING).filter(
        Q(progress_message__startswith=DEFERRED)
        | Q(progress_message__startswith=DEBOUNCED, requested_at__lte=now - debounce))
    if study is not None:
        waiting = waiting.filter(study=study)
    return sum(send(pk) for pk in list(waiting.values_list("pk", flat=True)))


def claim(run_pk: int) -> bool:
    """Move a run to running if it is pending, or running but stale; True if this caller won."""
    now = timezone.now()
    claimed = AnalysisRun.objects.filter(pk=run_pk, status=RunStatus.PENDING).update(
        status=RunStatus.RUNNING, started_at=now, heartbeat_at=now, progress=0.0)
    if claimed:
        return True
    return bool(AnalysisRun.objects.filter(
        pk=run_pk, status=RunStatus.RUNNING, heartbeat_at__lt=now - STALE_AFTER
    ).update(started_at=now, heartbeat_at=now, progress=0.0, attempts=F("attempts") + 1))


def _cell(value: object) -> object:
    """A table cell as exact JSON: floats keep every digit, NaN and NaT become null."""
    if value is None or (isinstance(value, float) and math.isnan(value)) or value is pd.NaT:
        return None
    if isinstance(value, np.generic):
        return _cell(value.item())
    if isinstance(value, pd.Timestamp):
        return value.isoformat()
    return value


def _frame_json(frame: pd.DataFrame) -> dict:
    rows = [[_cell(v) for v in row] for row in frame.astype(object).itertuples(index=False)]
    return {"columns": [str(c) for c in frame.columns], "data": rows}


def frame_of(stored: dict) -> pd.DataFrame:
    """A stored result table back as a DataFrame."""
    return pd.DataFrame(stored["data"], columns=stored["columns"])


class RunBusy(Exception):
    """The run is being computed by a worker that still reports; try again later."""


def execute(run_pk: int) -> AnalysisRun | None:
    """Compute a claimed run and store its tables; expected failures are stored, not raised.

    Returns None when the run is finished or gone (a duplicate message). Raises RunBusy
    when another worker holds it with a fresh heartbeat: that worker may have been killed
    (its message then comes back here), so the caller retries after the stale period.
    """
    if not claim(run_pk):
        if AnalysisRun.objects.filter(pk=run_pk, status=RunStatus.RUNNING).exists():
            raise RunBusy(f"analysis run {run_pk} is running elsewhere")
        log.info("analysis run %s is finished or gone; nothing to do", run_pk)
        return None
    run = AnalysisRun.objects.select_related("study").get(pk=run_pk)

    def progress(fraction: float, message: str) -> None:
        AnalysisRun.objects.filter(pk=run_pk).update(
            progress=round(0.1 + 0.85 * fraction, 3), progress_message=message[:200],
            heartbeat_at=timezone.now())

    table = placements_table(run.study)
    # Reads submitted after the request fold into a waiting run: store the fingerprint of
    # the rows analysed here, not of those seen when the run was asked for.
    run.code_version = code_version()
    run.input_digest = fingerprint(table, run.parameters, run.code_version)
    n_reads = int(table.groupby(["case", "reader", "read"]).ngroups) if len(table) else 0
    try:
        if table.empty or table.groupby("case")["reader"].nunique().max() < 2:
            raise PlacementTableError("too few reads to analyse: no case has submitted reads "
                                      "from two readers yet")
        result = run_analysis(table, **run.parameters, progress=progress)
    except (PlacementTableError, AnalysisParameterError) as error:
        return _finish(run, RunStatus.FAILED, n_reads, len(table), reason=str(error))
    tables = {name: _frame_json(frame) for name, frame in result.tables.items()}
    return _finish(run, RunStatus.COMPLETED, n_reads, len(table), tables=tables,
                   summary=result.summary)


@transaction.atomic
def _finish(run: AnalysisRun, status: str, n_reads: int, n_placements: int, *, reason: str = "",
            tables: dict | None = None, summary: dict | None = None) -> AnalysisRun:
    run.status = status
    run.n_reads, run.n_placements = n_reads, n_placements
    run.reason = reason
    run.tables = tables or {}
    run.summary = summary or {}
    run.progress = 1.0
    run.progress_message = "done" if status == RunStatus.COMPLETED else "failed"
    run.finished_at = timezone.now()
    run.save()
    if status == RunStatus.COMPLETED:
        _adaptive_reads(run)
    return run


def _adaptive_reads(run: AnalysisRun) -> None:
    """One more reader for each flagged case whose reads are all submitted (if enabled)."""
    from .reads import add_extra_read

    study = run.study
    if not study.adaptive_reads or "consensus" not in run.tables:
        return
    consensus = frame_of(run.tables["consensus"])
    flagged = set(consensus.loc[consensus["flagged"].astype(bool), "case"])
    for case in study.cases.filter(pseudonym__in=flagged):
        if not case.reads.exclude(status=ReadStatus.SUBMITTED).exists():
            add_extra_read(study, str(case.code))


def execute_with_predictions(study: Study, predictions: pd.DataFrame) -> tuple[dict, dict, str]:
    """Run the core on the study's current placements with a detector's predictions.

    Returns (stored tables, summary, input digest of the placements and parameters); the
    tables are in the form of AnalysisRun.tables (read back with `frame_of`). Raises
    PlacementTableError or AnalysisParameterError on input the core refuses.
    """
    table = placements_table(study)
    if table.empty or table.groupby("case")["reader"].nunique().max() < 2:
        raise PlacementTableError("too few reads to score a detector: no case has submitted "
                                  "reads from two readers yet")
    parameters = parameters_of(study)
    result = run_analysis(table, predictions, **parameters)
    tables = {name: _frame_json(frame) for name, frame in result.tables.items()}
    return tables, result.summary, fingerprint(table, parameters, code_version())


def latest_run(study: Study) -> AnalysisRun | None:
    return study.analysis_runs.order_by("-requested_at").first()
