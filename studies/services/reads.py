"""Turning the study design into Read rows, and a reader's passage through a read."""

from __future__ import annotations

from datetime import datetime

from django.conf import settings
from django.db import transaction
from django.db.models import Q, QuerySet
from django.utils import timezone

from ..constants import FIRST_READ, PlacementState, ReadStatus, Role, StudyStatus
from ..models import Read, Study
from .assignment import (
    Design,
    DesignError,
    ExistingRead,
    plan_extra_read,
    plan_reads,
    repeat_available_from,
)
from .errors import NotAllowed, ServiceError
from .pseudonyms import new_pseudonym

_PARKED = 1_000_000  # positions are moved out of the way here while being renumbered


def design_of(study: Study) -> Design:
    return Design(
        readers_per_case=study.readers_per_case,
        repeat_fraction=study.repeat_fraction,
        washout_days=study.washout_days,
        seed=int(study.seed),
        max_readers_per_case=study.max_readers_per_case if study.adaptive_reads else None,
    )


def _existing(study: Study) -> dict[tuple[str, str, int], Read]:
    reads = study.reads.select_related("case")
    return {(str(r.case.code), str(r.reader_id), r.read_number): r for r in reads}


@transaction.atomic
def sync_reads(study: Study, now: datetime | None = None) -> int:
    """Bring the study's reads in line with its design; return how many were created.

    Opened reads never change. Reads not yet opened may be renumbered or dropped when
    readers or cases are added, which is what keeps the loads balanced.
    """
    now = now or timezone.now()
    readers = [
        str(uid)
        for uid in study.memberships.filter(role=Role.READER).values_list("user_id", flat=True)
    ]
    cases = {str(code): pk for code, pk in study.cases.values_list("code", "pk")}
    existing = _existing(study)
    try:
        plan = plan_reads(
            sorted(cases),
            sorted(readers),
            design_of(study),
            [
                ExistingRead(case, reader, number, r.worklist_position, r.opened_at is not None)
                for (case, reader, number), r in existing.items()
            ],
        )
    except DesignError as error:
        raise ServiceError(str(error)) from None
    planned = {(p.case, p.reader, p.read_number): p.position for p in plan}
    stale = [r.pk for key, r in existing.items() if key not in planned]
    study.reads.filter(pk__in=stale, opened_at__isnull=True).delete()
    moving = [
        r for key, r in existing.items() if key in planned and r.worklist_position != planned[key]
    ]
    for read in moving:
        if read.opened_at is not None:
            raise ServiceError(f"the design would move opened read {read.pseudonym}")
        read.worklist_position += _PARKED
        read.save(update_fields=["worklist_position"])
    for read in moving:
        key = (str(read.case.code), str(read.reader_id), read.read_number)
        read.worklist_position = planned[key]
        read.save(update_fields=["worklist_position"])
    new = [
        Read(
            study=study,
            case_id=cases[case],
            reader_id=int(reader),
            read_number=number,
            pseudonym=new_pseudonym("R"),
            worklist_position=position,
            protocol_version=study.protocol_version,
            available_from=now if number == FIRST_READ else None,
        )
        for (case, reader, number), position in planned.items()
        if (case, reader, number) not in existing
    ]
    Read.objects.bulk_create(new)
    return len(new)


@transaction.atomic
def add_extra_read(study: Study, case_code: str, now: datetime | None = None) -> Read | None:
    """Adaptive read: one more reader for a case flagged for disagreement, up to the cap."""
    if not study.adaptive_reads or study.status != StudyStatus.OPEN:
        return None
    existing = _existing(study)
    readers = sorted(
        str(uid)
        for uid in study.memberships.filter(role=Role.READER).values_list("user_id", flat=True)
    )
    planned = [
        ExistingRead(case, reader, number, r.worklist_position, r.opened_at is not None)
        for (case, reader, number), r in existing.items()
    ]
    extra = plan_extra_read(str(case_code), readers, design_of(study), planned)
    if extra is None:
        return None
    return Read.objects.create(
        study=study,
        case=study.cases.get(code=case_code),
        reader_id=int(extra.reader),
        read_number=extra.read_number,
        pseudonym=new_pseudonym("R"),
        worklist_position=extra.position,
        protocol_version=study.protocol_version,
        available_from=now or timezone.now(),
    )


def worklist(user, study: Study | None = None, now: datetime | None = None) -> QuerySet[Read]:
    """The reads a reader may work on now, in their order (washout reads are hidden)."""
    now = now or timezone.now()
    reads = Read.objects.filter(
        reader=user,
        study__status=StudyStatus.OPEN,
        study__memberships__user=user,
        study__memberships__role=Role.READER,
        available_from__lte=now,
    )
    if study is not None:
        reads = reads.filter(study=study)
    return reads.select_related("study").order_by("study__name", "worklist_position").distinct()


_LOCKED_FIELDS = ("reader_id", "status", "available_from", "opened_at", "version",
                  "active_seconds")


def _writable(read: Read, user) -> Read:
    """The read, locked for this transaction, if its reader may still change it.

    Only the read's own row is locked (FOR UPDATE OF) and re-read, with its study's
    status; its case is the one the caller fetched (a case's geometry never changes).
    Locking the study or case rows too would make every event of every reader queue
    behind one lock.
    """
    try:
        fresh = (Read.objects.select_for_update(of=("self",))
                 .values(*_LOCKED_FIELDS, "study__status").get(pk=read.pk))
    except Read.DoesNotExist:
        raise ServiceError("this read no longer exists") from None
    study_status = fresh.pop("study__status")
    for name, value in fresh.items():
        setattr(read, name, value)
    if read.reader_id != user.pk:
        raise NotAllowed("this read belongs to another reader")
    if study_status != StudyStatus.OPEN:
        raise ServiceError(f"the study is {study_status}; no more reading")
    if read.status == ReadStatus.SUBMITTED:
        raise ServiceError("this read has been submitted and is locked")
    if read.available_from is None or read.available_from > timezone.now():
        raise ServiceError("this read is not available yet")
    return read


@transaction.atomic
def open_read(read: Read, user, now: datetime | None = None) -> Read:
    """Mark a read as started (first opening only)."""
    read = _writable(read, user)
    if read.opened_at is None:
        read.opened_at = now or timezone.now()
        read.status = ReadStatus.OPEN
        read.save(update_fields=["opened_at", "status"])
    return read


@transaction.atomic
def add_active_time(read: Read, user, seconds: float) -> Read:
    """Add active reading seconds reported by the page (0 to 600 per report)."""
    if not 0 <= seconds <= 600:
        raise ServiceError(f"active seconds per report must be between 0 and 600, got {seconds}")
    read = _writable(read, user)
    read.active_seconds += seconds
    read.save(update_fields=["active_seconds"])
    return read


def missing_landmarks(read: Read) -> list[str]:
    """Codes of the read's landmarks neither placed nor marked not visible."""
    done = set(
        read.placements.filter(
            state__in=[PlacementState.PLACED, PlacementState.ABSENT]
        ).values_list("landmark__code", flat=True)
    )
    protocol = read.study.landmarks.filter(protocol_version=read.protocol_version)
    return [code for code in protocol.values_list("code", flat=True) if code not in done]


@transaction.atomic
def submit_read(read: Read, user, now: datetime | None = None) -> Read:
    """Lock a complete read, and start the washout clock of its repeat read, if any."""
    read = _writable(read, user)
    missing = missing_landmarks(read)
    if missing:
        raise ServiceError(f"place or mark not visible first: {', '.join(missing)}")
    now = now or timezone.now()
    read.status = ReadStatus.SUBMITTED
    read.submitted_at = now
    read.opened_at = read.opened_at or now
    read.save(update_fields=["status", "submitted_at", "opened_at"])
    transaction.on_commit(lambda: _analyse_after_submit(read.study_id))
    if read.read_number == FIRST_READ:
        Read.objects.filter(
            Q(case=read.case, reader=read.reader) & ~Q(read_number=FIRST_READ)
        ).update(available_from=repeat_available_from(now, read.study.washout_days))
    return read


def _analyse_after_submit(study_pk: int) -> None:
    from .analysis_runs import request_analysis

    study = Study.objects.filter(pk=study_pk).first()
    if study is not None:
        request_analysis(study, delay_s=settings.CAIRN_ANALYSIS_DEBOUNCE_SECONDS)
