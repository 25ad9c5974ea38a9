"""The study domain. Only code in studies/services/ creates or changes these rows."""

from __future__ import annotations

import uuid

from django.conf import settings
from django.core.validators import MaxValueValidator, MinValueValidator
from django.db import models

from .constants import (
    ADJUDICATION_REASON_MAX,
    AdjudicationDecision,
    ConsensusMethod,
    DetectorStatus,
    EventKind,
    PlacementState,
    ReadStatus,
    Role,
    RunStatus,
    StudyStatus,
)


class Study(models.Model):
    """A multi-reader landmark study with its design parameters."""

    code = models.UUIDField(default=uuid.uuid4, unique=True, editable=False)
    slug = models.SlugField(max_length=64, unique=True)
    name = models.CharField(max_length=200)
    description = models.TextField(blank=True)
    status = models.CharField(max_length=16, choices=StudyStatus, default=StudyStatus.DRAFT)
    readers_per_case = models.PositiveSmallIntegerField(
        default=3, validators=[MinValueValidator(1)]
    )
    repeat_fraction = models.FloatField(
        default=0.2, validators=[MinValueValidator(0.0), MaxValueValidator(1.0)]
    )
    washout_days = models.FloatField(default=14.0, validators=[MinValueValidator(0.0)])
    seed = models.BigIntegerField(default=0)
    tolerance_mm = models.FloatField(default=3.0, validators=[MinValueValidator(0.0)])
    adaptive_reads = models.BooleanField(default=False)
    max_readers_per_case = models.PositiveSmallIntegerField(default=5)
    consensus_method = models.CharField(
        max_length=16, choices=ConsensusMethod, default=ConsensusMethod.GEOMEDIAN
    )
    protocol_version = models.PositiveIntegerField(default=1)
    created_at = models.DateTimeField(auto_now_add=True)
    opened_at = models.DateTimeField(null=True, blank=True)
    closed_at = models.DateTimeField(null=True, blank=True)

    class Meta:
        verbose_name_plural = "studies"
        ordering = ["name"]

    def __str__(self) -> str:
        return self.name

    def current_landmarks(self) -> models.QuerySet[Landmark]:
        return self.landmarks.filter(protocol_version=self.protocol_version).order_by("order")


class Landmark(models.Model):
    """One point of a study's landmark protocol, in one protocol version."""

    study = models.ForeignKey(Study, on_delete=models.CASCADE, related_name="landmarks")
    protocol_version = models.PositiveIntegerField(default=1)
    code = models.CharField(max_length=32)
    name = models.CharField(max_length=200)
    description = models.TextField(blank=True)
    may_be_absent = models.BooleanField(default=False)
    order = models.PositiveIntegerField(default=0)

    class Meta:
        ordering = ["study", "protocol_version", "order"]
        constraints = [
            models.UniqueConstraint(
                fields=["study", "protocol_version", "code"], name="studies_landmark_unique_code"
            )
        ]

    def __str__(self) -> str:
        return f"{self.code} ({self.name})"


class Case(models.Model):
    """One scan of a study, stored in canonical (closest RAS+) voxel order.

    `affine` maps the canonical voxel index to world mm RAS+; `original_affine` maps the
    imported file's own voxel index, so exports can give both.
    """

    code = models.UUIDField(default=uuid.uuid4, unique=True, editable=False)
    study = models.ForeignKey(Study, on_delete=models.CASCADE, related_name="cases")
    pseudonym = models.CharField(max_length=32, unique=True)
    label = models.CharField(
        max_length=200, help_text="Coordinator-side label; never shown to readers."
    )
    data_dir = models.CharField(max_length=300, help_text="Folder under CAIRN_DATA_DIR.")
    shape = models.JSONField()
    spacing_mm = models.JSONField()
    affine = models.JSONField()
    original_shape = models.JSONField()
    original_affine = models.JSONField()
    dtype = models.CharField(max_length=16)
    modality = models.CharField(max_length=16, default="OT")
    window_center = models.FloatField()
    window_width = models.FloatField()
    value_min = models.FloatField()
    value_max = models.FloatField()
    viewer_bytes = models.BigIntegerField()
    viewer_compressed_bytes = models.BigIntegerField()
    coarse_shape = models.JSONField()
    coarse_compressed_bytes = models.BigIntegerField()
    checksum = models.CharField(max_length=64)
    provenance = models.JSONField(default=dict, blank=True)
    created_at = models.DateTimeField(auto_now_add=True)

    class Meta:
        ordering = ["study", "label"]
        constraints = [
            models.UniqueConstraint(
                fields=["study", "checksum"], name="studies_case_unique_checksum"
            )
        ]

    def __str__(self) -> str:
        return self.label


class Membership(models.Model):
    """A user's role in a study."""

    user = models.ForeignKey(
        settings.AUTH_USER_MODEL, on_delete=models.CASCADE, related_name="memberships"
    )
    study = models.ForeignKey(Study, on_delete=models.CASCADE, related_name="memberships")
    role = models.CharField(max_length=16, choices=Role)
    created_at = models.DateTimeField(auto_now_add=True)

    class Meta:
        constraints = [
            models.UniqueConstraint(
                fields=["user", "study", "role"], name="studies_membership_unique"
            )
        ]

    def __str__(self) -> str:
        return f"{self.user} as {self.role} in {self.study}"


class Read(models.Model):
    """One reader's pass over one case (read 1 first, read 2 a repeat after the washout).

    Readers only ever see `pseudonym`, never the case's pseudonym or label. `version`
    counts accepted events, so a second tab working on the same read is detected.
    """

    code = models.UUIDField(default=uuid.uuid4, unique=True, editable=False)
    study = models.ForeignKey(Study, on_delete=models.CASCADE, related_name="reads")
    case = models.ForeignKey(Case, on_delete=models.CASCADE, related_name="reads")
    reader = models.ForeignKey(
        settings.AUTH_USER_MODEL, on_delete=models.CASCADE, related_name="reads"
    )
    read_number = models.PositiveSmallIntegerField(default=1)
    pseudonym = models.CharField(max_length=32, unique=True)
    worklist_position = models.PositiveIntegerField()
    protocol_version = models.PositiveIntegerField(default=1)
    available_from = models.DateTimeField(null=True, blank=True)
    status = models.CharField(max_length=16, choices=ReadStatus, default=ReadStatus.WAITING)
    opened_at = models.DateTimeField(null=True, blank=True)
    submitted_at = models.DateTimeField(null=True, blank=True)
    active_seconds = models.FloatField(default=0.0)
    version = models.PositiveIntegerField(default=0)

    class Meta:
        ordering = ["reader", "worklist_position"]
        constraints = [
            models.UniqueConstraint(
                fields=["case", "reader", "read_number"], name="studies_read_unique_pass"
            ),
            models.UniqueConstraint(
                fields=["study", "reader", "worklist_position"], name="studies_read_unique_position"
            ),
        ]

    def __str__(self) -> str:
        return self.pseudonym


class EventQuerySet(models.QuerySet):
    """Events are append-only: bulk updates and deletes are refused."""

    def update(self, **kwargs):
        raise PermissionError("placement events are append-only and cannot be updated")

    def delete(self):
        raise PermissionError("placement events are append-only and cannot be deleted")


class PlacementEvent(models.Model):
    """One reader action on one landmark: the truth from which placements are derived.

    Coordinates are world mm RAS+ (float64) and continuous canonical voxel indices.
    `client_event_id` is generated by the browser; a retried request carries the same id
    and is stored once.
    """

    read = models.ForeignKey(Read, on_delete=models.PROTECT, related_name="events")
    landmark = models.ForeignKey(Landmark, on_delete=models.PROTECT, related_name="events")
    kind = models.CharField(max_length=16, choices=EventKind)
    x_mm = models.FloatField(null=True, blank=True)
    y_mm = models.FloatField(null=True, blank=True)
    z_mm = models.FloatField(null=True, blank=True)
    i_vox = models.FloatField(null=True, blank=True)
    j_vox = models.FloatField(null=True, blank=True)
    k_vox = models.FloatField(null=True, blank=True)
    confidence = models.PositiveSmallIntegerField(null=True, blank=True)
    client_time = models.DateTimeField()
    server_time = models.DateTimeField()
    client_event_id = models.UUIDField(unique=True)
    read_version = models.PositiveIntegerField(help_text="The read's version after this event.")

    objects = EventQuerySet.as_manager()

    class Meta:
        ordering = ["read", "read_version"]

    def __str__(self) -> str:
        return f"{self.kind} {self.landmark.code} on {self.read}"

    def save(self, *args, **kwargs) -> None:
        if self.pk is not None:
            raise PermissionError("placement events are append-only and cannot be changed")
        super().save(*args, **kwargs)

    def delete(self, *args, **kwargs):
        raise PermissionError("placement events are append-only and cannot be deleted")


class Placement(models.Model):
    """The current state of one landmark in one read, derived from its events."""

    read = models.ForeignKey(Read, on_delete=models.CASCADE, related_name="placements")
    landmark = models.ForeignKey(Landmark, on_delete=models.PROTECT, related_name="placements")
    state = models.CharField(max_length=16, choices=PlacementState)
    x_mm = models.FloatField(null=True, blank=True)
    y_mm = models.FloatField(null=True, blank=True)
    z_mm = models.FloatField(null=True, blank=True)
    i_vox = models.FloatField(null=True, blank=True)
    j_vox = models.FloatField(null=True, blank=True)
    k_vox = models.FloatField(null=True, blank=True)
    confidence = models.PositiveSmallIntegerField(null=True, blank=True)
    placed_at = models.DateTimeField(help_text="Client time of the event that set this state.")
    last_event = models.OneToOneField(PlacementEvent, on_delete=models.PROTECT, related_name="+")

    class Meta:
        constraints = [
            models.UniqueConstraint(fields=["read", "landmark"], name="studies_placement_unique")
        ]

    def __str__(self) -> str:
        return f"{self.landmark.code} on {self.read}: {self.state}"


class AnalysisRun(models.Model):
    """One run of the statistics core over a study's placements, with its result tables."""

    code = models.UUIDField(default=uuid.uuid4, unique=True, editable=False)
    study = models.ForeignKey(Study, on_delete=models.CASCADE, related_name="analysis_runs")
    status = models.CharField(max_length=16, choices=RunStatus, default=RunStatus.PENDING)
    progress = models.FloatField(default=0.0)
    progress_message = models.CharField(max_length=200, blank=True)
    parameters = models.JSONField(default=dict)
    input_digest = models.CharField(max_length=64, blank=True)
    code_version = models.CharField(max_length=64, blank=True)
    n_reads = models.PositiveIntegerField(default=0)
    n_placements = models.PositiveIntegerField(default=0)
    tables = models.JSONField(default=dict, blank=True)
    summary = models.JSONField(default=dict, blank=True)
    reason = models.TextField(blank=True, help_text="Why a failed run failed.")
    requested_at = models.DateTimeField(auto_now_add=True)
    started_at = models.DateTimeField(null=True, blank=True)
    heartbeat_at = models.DateTimeField(null=True, blank=True)
    attempts = models.PositiveSmallIntegerField(default=1)
    finished_at = models.DateTimeField(null=True, blank=True)

    class Meta:
        ordering = ["-requested_at"]
        get_latest_by = "requested_at"

    def __str__(self) -> str:
        return f"analysis of {self.study} ({self.status})"


class AdjudicationEventQuerySet(models.QuerySet):
    """Adjudication decisions are append-only: a revision is a new event."""

    def update(self, **kwargs):
        raise PermissionError("adjudication events are append-only and cannot be updated")

    def delete(self):
        raise PermissionError("adjudication events are append-only and cannot be deleted")


class AdjudicationEvent(models.Model):
    """One adjudicator's decision on one flagged case x landmark; the latest one counts.

    `x_mm`, `y_mm`, `z_mm` are the decided point, world mm RAS+ (float64), copied from the
    consensus or the reader's placement, or placed anew. `analysis_run` is the run whose
    consensus table the adjudicator saw.
    """

    study = models.ForeignKey(Study, on_delete=models.PROTECT, related_name="adjudications")
    case = models.ForeignKey(Case, on_delete=models.PROTECT, related_name="adjudications")
    landmark = models.ForeignKey(Landmark, on_delete=models.PROTECT, related_name="adjudications")
    adjudicator = models.ForeignKey(
        settings.AUTH_USER_MODEL, on_delete=models.PROTECT, related_name="adjudications"
    )
    decision = models.CharField(max_length=24, choices=AdjudicationDecision)
    source_read = models.ForeignKey(
        Read, on_delete=models.PROTECT, null=True, blank=True, related_name="+",
        help_text="The read whose point was taken (take_reader only).",
    )
    x_mm = models.FloatField()
    y_mm = models.FloatField()
    z_mm = models.FloatField()
    reason = models.CharField(max_length=ADJUDICATION_REASON_MAX)
    analysis_run = models.ForeignKey(
        AnalysisRun, on_delete=models.PROTECT, related_name="adjudications"
    )
    client_event_id = models.UUIDField(unique=True)
    created_at = models.DateTimeField()

    objects = AdjudicationEventQuerySet.as_manager()

    class Meta:
        ordering = ["study", "case", "landmark", "created_at", "pk"]

    def __str__(self) -> str:
        return f"{self.decision} for {self.landmark.code} on {self.case.pseudonym}"

    def save(self, *args, **kwargs) -> None:
        if self.pk is not None:
            raise PermissionError("adjudication events are append-only and cannot be changed")
        super().save(*args, **kwargs)

    def delete(self, *args, **kwargs):
        raise PermissionError("adjudication events are append-only and cannot be deleted")


class DetectorRun(models.Model):
    """An automatic detector's uploaded points and their scores against the readers.

    `predictions` holds the validated rows (case pseudonym, landmark, x/y/z world mm RAS+);
    `tables` the detector and williams tables of the analysis core, stored like
    AnalysisRun.tables.
    """

    code = models.UUIDField(default=uuid.uuid4, unique=True, editable=False)
    study = models.ForeignKey(Study, on_delete=models.CASCADE, related_name="detector_runs")
    name = models.CharField(max_length=100)
    uploaded_by = models.ForeignKey(
        settings.AUTH_USER_MODEL, on_delete=models.PROTECT, related_name="detector_runs"
    )
    uploaded_at = models.DateTimeField(auto_now_add=True)
    file_name = models.CharField(max_length=200, blank=True)
    n_rows = models.PositiveIntegerField(default=0)
    predictions = models.JSONField(default=list)
    status = models.CharField(max_length=16, choices=DetectorStatus)
    reason = models.TextField(blank=True, help_text="Why scoring failed.")
    analysis_input_digest = models.CharField(max_length=64, blank=True)
    code_version = models.CharField(max_length=64, blank=True)
    tables = models.JSONField(default=dict, blank=True)
    summary = models.JSONField(default=dict, blank=True)

    class Meta:
        ordering = ["-uploaded_at", "-pk"]

    def __str__(self) -> str:
        return f"detector {self.name} on {self.study} ({self.status})"
