"""Creating studies, their landmark protocol and members; opening and closing them."""

from __future__ import annotations

from collections.abc import Sequence

from django.db import transaction
from django.utils import timezone

from audit import log as audit
from audit.models import AuditKind

from ..constants import Role, StudyStatus
from ..models import Landmark, Membership, Study
from .errors import ServiceError

DESIGN_FIELDS = (
    "readers_per_case",
    "repeat_fraction",
    "washout_days",
    "seed",
    "tolerance_mm",
    "adaptive_reads",
    "max_readers_per_case",
    "consensus_method",
)


def _check_design(values: dict) -> None:
    k = values.get("readers_per_case")
    if k is not None and int(k) < 1:
        raise ServiceError(f"readers per case must be at least 1, got {k}")
    fraction = values.get("repeat_fraction")
    if fraction is not None and not 0.0 <= float(fraction) <= 1.0:
        raise ServiceError(f"repeat fraction must be between 0 and 1, got {fraction}")
    washout = values.get("washout_days")
    if washout is not None and float(washout) < 0:
        raise ServiceError(f"washout days cannot be negative, got {washout}")
    tolerance = values.get("tolerance_mm")
    if tolerance is not None and float(tolerance) <= 0:
        raise ServiceError(f"tolerance must be positive, got {tolerance} mm")


@transaction.atomic
def create_study(*, name: str, slug: str, coordinator, description: str = "", **design) -> Study:
    """Create a draft study with `coordinator` as its first coordinator."""
    unknown = set(design) - set(DESIGN_FIELDS)
    if unknown:
        raise ServiceError(f"unknown design parameters: {sorted(unknown)}")
    _check_design(design)
    if Study.objects.filter(slug=slug).exists():
        raise ServiceError(f"a study with the short name {slug!r} already exists")
    study = Study.objects.create(name=name, slug=slug, description=description, **design)
    Membership.objects.create(user=coordinator, study=study, role=Role.COORDINATOR)
    audit.record(
        AuditKind.ROLE_ADDED, actor=coordinator, study=study, subject=coordinator,
        role=Role.COORDINATOR,
    )
    return study


@transaction.atomic
def update_design(study: Study, **design) -> Study:
    """Change design parameters; only while the study is a draft."""
    if study.status != StudyStatus.DRAFT:
        raise ServiceError("the design of an open or closed study cannot change")
    unknown = set(design) - set(DESIGN_FIELDS)
    if unknown:
        raise ServiceError(f"unknown design parameters: {sorted(unknown)}")
    _check_design(design)
    for field, value in design.items():
        setattr(study, field, value)
    study.save()
    return study


@transaction.atomic
def update_details(study: Study, *, name: str, description: str = "") -> Study:
    """Change a study's name and description (allowed in any status)."""
    name = name.strip()
    if not name:
        raise ServiceError("a study needs a name")
    study.name = name
    study.description = description
    study.save(update_fields=["name", "description"])
    return study


@transaction.atomic
def set_protocol(study: Study, landmarks: Sequence[dict]) -> list[Landmark]:
    """Replace the landmark protocol.

    In a draft study the current version is replaced. In an open study a new protocol
    version is created: reads not yet opened move to it, reads already opened keep theirs.
    Each item has code, name, and optionally description, may_be_absent, order.
    """
    if study.status == StudyStatus.CLOSED:
        raise ServiceError("a closed study's protocol cannot change")
    if not landmarks:
        raise ServiceError("a protocol needs at least one landmark")
    codes = [str(item.get("code", "")).strip() for item in landmarks]
    if any(not code for code in codes):
        raise ServiceError("every landmark needs a code")
    duplicates = sorted({code for code in codes if codes.count(code) > 1})
    if duplicates:
        raise ServiceError(f"duplicate landmark codes: {', '.join(duplicates)}")
    study = Study.objects.select_for_update().get(pk=study.pk)
    if study.status == StudyStatus.OPEN:
        study.protocol_version += 1
        study.save(update_fields=["protocol_version"])
        study.reads.filter(opened_at__isnull=True).update(protocol_version=study.protocol_version)
    else:
        study.landmarks.filter(protocol_version=study.protocol_version).delete()
    created = [
        Landmark.objects.create(
            study=study,
            protocol_version=study.protocol_version,
            code=code,
            name=str(item.get("name") or code),
            description=str(item.get("description", "")),
            may_be_absent=bool(item.get("may_be_absent", False)),
            order=int(item.get("order", position)),
        )
        for position, (code, item) in enumerate(zip(codes, landmarks, strict=True))
    ]
    return created


@transaction.atomic
def add_member(study: Study, user, role: str, by=None) -> Membership:
    """Give a user a role; adding a reader to an open study extends its design.

    `by` is the user making the change, for the audit log (None: a command or the demo).
    """
    if role not in Role.values:
        raise ServiceError(f"unknown role {role!r}; use one of {', '.join(Role.values)}")
    held = set(study.memberships.filter(user=user).values_list("role", flat=True))
    other = (held - {Role.READER}) if role == Role.READER else (held & {Role.READER})
    if other:
        # A reader who also coordinates or adjudicates would see other readers' points.
        raise ServiceError(
            f"{user.get_username()!r} is already {sorted(other)[0]} in this study and cannot "
            f"also be {role}: readers must stay blinded"
        )
    membership, created = Membership.objects.get_or_create(user=user, study=study, role=role)
    if created:
        audit.record(AuditKind.ROLE_ADDED, actor=by, study=study, subject=user, role=role)
    if role == Role.READER and study.status == StudyStatus.OPEN:
        from .reads import sync_reads

        sync_reads(study)
    return membership


@transaction.atomic
def remove_member(study: Study, user, role: str, by=None) -> int:
    """Take a role away; return how many unopened reads went with it.

    A study keeps at least one coordinator. A reader can leave a draft study, or an open
    one while none of their reads has been opened: their reads are dropped and the cases
    go to the other readers (as when a reader is added), or nothing changes when too few
    readers would remain for the design. Opened reads are part of the record, and a
    closed study's reads stay as they are, so those readers keep their role.
    """
    study = Study.objects.select_for_update().get(pk=study.pk)
    name = user.get_username()
    membership = study.memberships.filter(user=user, role=role).first()
    if membership is None:
        raise ServiceError(f"{name!r} is not {role} in this study")
    if role == Role.COORDINATOR and study.memberships.filter(role=role).count() == 1:
        raise ServiceError("a study needs at least one coordinator; add another one first")
    dropped = 0
    if role == Role.READER:
        own = study.reads.filter(reader=user)
        opened = own.filter(opened_at__isnull=False).count()
        if opened:
            raise ServiceError(
                f"{name!r} has opened {opened} read{'s' if opened != 1 else ''}; what they "
                "recorded is part of the study, so they stay a reader"
            )
        if study.status == StudyStatus.CLOSED and own.exists():
            raise ServiceError("the study is closed; its readers and reads stay as they are")
        dropped = own.count()
        own.delete()
    membership.delete()
    if role == Role.READER and study.status == StudyStatus.OPEN:
        from .reads import sync_reads

        try:
            sync_reads(study)
        except ServiceError as error:
            raise ServiceError(f"without {name!r} the design cannot be met: {error}") from None
    audit.record(AuditKind.ROLE_REMOVED, actor=by, study=study, subject=user, role=role,
                 reads_dropped=dropped)
    return dropped


@transaction.atomic
def open_study(study: Study, now=None) -> Study:
    """Freeze the protocol and design, and create every reader's reads."""
    from .reads import sync_reads

    study = Study.objects.select_for_update().get(pk=study.pk)
    if study.status != StudyStatus.DRAFT:
        raise ServiceError(f"only a draft study can be opened; this one is {study.status}")
    if not study.current_landmarks().exists():
        raise ServiceError("define the landmark protocol before opening the study")
    if not study.cases.exists():
        raise ServiceError("import at least one case before opening the study")
    study.status = StudyStatus.OPEN
    study.opened_at = now or timezone.now()
    study.save(update_fields=["status", "opened_at"])
    sync_reads(study, now=now)
    return study


@transaction.atomic
def close_study(study: Study, now=None) -> Study:
    """Stop new reads; submitted work and analyses stay."""
    if study.status != StudyStatus.OPEN:
        raise ServiceError(f"only an open study can be closed; this one is {study.status}")
    study.status = StudyStatus.CLOSED
    study.closed_at = now or timezone.now()
    study.save(update_fields=["status", "closed_at"])
    return study
