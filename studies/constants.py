"""Fixed values of the study domain."""

from __future__ import annotations

from django.db import models


class StudyStatus(models.TextChoices):
    DRAFT = "draft", "Draft"
    OPEN = "open", "Open"
    CLOSED = "closed", "Closed"


class Role(models.TextChoices):
    COORDINATOR = "coordinator", "Coordinator"
    READER = "reader", "Reader"
    ADJUDICATOR = "adjudicator", "Adjudicator"


class ReadStatus(models.TextChoices):
    WAITING = "waiting", "Not started"
    OPEN = "open", "In progress"
    SUBMITTED = "submitted", "Submitted"


class EventKind(models.TextChoices):
    PLACED = "placed", "Placed"
    MOVED = "moved", "Moved"
    REMOVED = "removed", "Removed"
    MARKED_ABSENT = "marked_absent", "Marked not visible"


class PlacementState(models.TextChoices):
    PLACED = "placed", "Placed"
    ABSENT = "absent", "Not visible"


class RunStatus(models.TextChoices):
    PENDING = "pending", "Pending"
    RUNNING = "running", "Running"
    COMPLETED = "completed", "Completed"
    FAILED = "failed", "Failed"


class ConsensusMethod(models.TextChoices):
    MEAN = "mean", "Mean"
    MEDIAN = "median", "Coordinate-wise median"
    GEOMEDIAN = "geomedian", "Geometric median (Weiszfeld)"
    WEIGHTED = "weighted", "Precision-weighted (EM)"


FIRST_READ = 1
REPEAT_READ = 2
CONFIDENCE_RANGE = (1, 3)
# A click may land this far outside the outermost voxel centres (in voxels) and still count.
VOLUME_MARGIN_VOXELS = 0.5


class AdjudicationDecision(models.TextChoices):
    ACCEPT_CONSENSUS = "accept_consensus", "Accept the consensus point"
    TAKE_READER = "take_reader", "Take one reader's point"
    NEW_POINT = "new_point", "Place a new point"


class DetectorStatus(models.TextChoices):
    COMPLETED = "completed", "Scored"
    FAILED = "failed", "Could not be scored"


#: Longest reason an adjudicator may give for a decision (characters).
ADJUDICATION_REASON_MAX = 200
#: Method written in the reference set for an adjudicated point.
ADJUDICATED_METHOD = "adjudicated"
