"""Adjudication: the queue of flagged points, the decisions, and the final reference points.

The queue comes from the consensus table of the study's latest completed analysis run:
every flagged case x landmark, worst first by the readers' spread. A decision is an
append-only AdjudicationEvent; a revision is a new event, and the latest one counts. The
study's final reference point is the latest decision's point where there is one, else
the consensus point.
"""

from __future__ import annotations

import math
import uuid
from dataclasses import dataclass

import numpy as np
import pandas as pd
from django.db import IntegrityError, transaction
from django.utils import timezone

from ..constants import (
    ADJUDICATED_METHOD,
    ADJUDICATION_REASON_MAX,
    AdjudicationDecision,
    PlacementState,
    ReadStatus,
    RunStatus,
)
from ..models import AdjudicationEvent, AnalysisRun, Case, Landmark, Placement, Read, Study
from .analysis_runs import frame_of
from .errors import ConflictError, ServiceError
from .placing import point_in_case

COV_COLUMNS = ("cov_xx", "cov_xy", "cov_xz", "cov_yy", "cov_yz", "cov_zz")


@dataclass(frozen=True)
class QueueItem:
    """One flagged case x landmark, with the latest decision on it (if any)."""

    case: str
    case_code: str
    landmark: str
    spread_mm: float | None
    max_pairwise_mm: float | None
    reasons: str
    n_readers: int
    n_absent: int
    decision: AdjudicationEvent | None


@dataclass(frozen=True)
class DecisionInput:
    """An adjudicator's decision as the page sends it (coordinates world mm, RAS+)."""

    decision: str
    reason: str
    client_event_id: uuid.UUID
    source_read: str | None = None
    x_mm: float | None = None
    y_mm: float | None = None
    z_mm: float | None = None
    run: str | None = None


def latest_completed_run(study: Study) -> AnalysisRun | None:
    """The study's newest completed analysis run (the one adjudication works from)."""
    return (
        study.analysis_runs.filter(status=RunStatus.COMPLETED)
        .order_by("-finished_at", "-requested_at")
        .first()
    )


def _float(value: object) -> float | None:
    if value is None:
        return None
    value = float(value)
    return None if math.isnan(value) else value


def flagged_table(run: AnalysisRun) -> pd.DataFrame:
    """The run's flagged consensus rows with their spread, worst (largest spread) first."""
    consensus = frame_of(run.tables["consensus"])
    flagged = consensus[consensus["flagged"].astype(bool)]
    by_case = frame_of(run.tables["agreement_by_case"])[
        ["case", "landmark", "mean_pairwise_mm", "max_pairwise_mm"]
    ]
    merged = flagged.merge(by_case, on=["case", "landmark"], how="left")
    merged["_order"] = range(len(merged))
    return merged.sort_values(
        ["mean_pairwise_mm", "_order"], ascending=[False, True], na_position="last"
    ).drop(columns="_order")


def latest_decisions(study: Study) -> dict[tuple[str, str], AdjudicationEvent]:
    """The latest decision per (case pseudonym, landmark code)."""
    events = (
        AdjudicationEvent.objects.filter(study=study)
        .select_related("case", "landmark", "adjudicator", "source_read__reader")
        .order_by("created_at", "pk")
    )
    return {(e.case.pseudonym, e.landmark.code): e for e in events}


def adjudication_queue(study: Study, run: AnalysisRun | None = None) -> list[QueueItem]:
    """Every flagged case x landmark of the latest completed run, worst first."""
    run = run or latest_completed_run(study)
    if run is None:
        return []
    decided = latest_decisions(study)
    codes = dict(study.cases.values_list("pseudonym", "code"))
    items = []
    for row in flagged_table(run).itertuples(index=False):
        items.append(
            QueueItem(
                case=str(row.case),
                case_code=str(codes.get(row.case, "")),
                landmark=str(row.landmark),
                spread_mm=_float(row.mean_pairwise_mm),
                max_pairwise_mm=_float(row.max_pairwise_mm),
                reasons=str(row.reasons),
                n_readers=int(row.n_readers),
                n_absent=int(row.n_absent),
                decision=decided.get((str(row.case), str(row.landmark))),
            )
        )
    return items


def queued_cases(study: Study) -> set[str]:
    """Pseudonyms of the cases with at least one flagged landmark in the latest run."""
    run = latest_completed_run(study)
    if run is None:
        return set()
    return {str(c) for c in flagged_table(run)["case"]}


def consensus_row(run: AnalysisRun, case: Case, landmark: Landmark) -> dict:
    """The run's consensus row for one case x landmark as a dict (NaN as None)."""
    consensus = frame_of(run.tables["consensus"])
    hit = consensus[
        (consensus["case"] == case.pseudonym) & (consensus["landmark"] == landmark.code)
    ]
    if hit.empty:
        raise ServiceError(
            f"case {case.pseudonym} landmark {landmark.code!r} is not in the latest analysis"
        )
    row = {k: v.item() if isinstance(v, np.generic) else v for k, v in hit.iloc[0].items()}
    return {k: (None if isinstance(v, float) and math.isnan(v) else v) for k, v in row.items()}


def reader_placements(case: Case, landmark: Landmark) -> list[Placement]:
    """Every submitted read's placement of this landmark on this case (all readers)."""
    return list(
        Placement.objects.filter(
            read__case=case, landmark=landmark, read__status=ReadStatus.SUBMITTED
        )
        .select_related("read__reader", "landmark")
        .order_by("read__reader__username", "read__read_number")
    )


def review_landmark(case: Case, code: str) -> Landmark:
    """The landmark `code` of the study's current protocol."""
    landmark = case.study.current_landmarks().filter(code=code).first()
    if landmark is None:
        raise ServiceError(f"landmark {code!r} is not in this study's protocol")
    return landmark


def _decided_point(
    case: Case, landmark: Landmark, run: AnalysisRun, data: DecisionInput
) -> tuple[tuple[float, float, float], Read | None]:
    if data.decision == AdjudicationDecision.ACCEPT_CONSENSUS:
        row = consensus_row(run, case, landmark)
        if row["x_mm"] is None:
            raise ServiceError(f"there is no consensus point to accept ({row['note'] or 'none'})")
        return (float(row["x_mm"]), float(row["y_mm"]), float(row["z_mm"])), None
    if data.decision == AdjudicationDecision.TAKE_READER:
        read = None
        try:
            code = uuid.UUID(str(data.source_read))
        except ValueError:
            code = None
        if code is not None:
            read = Read.objects.filter(code=code, case=case, status=ReadStatus.SUBMITTED).first()
        if read is None:
            raise ServiceError(
                f"source_read {data.source_read!r} is not a submitted read of this case"
            )
        placement = read.placements.filter(landmark=landmark).first()
        if placement is None or placement.state != PlacementState.PLACED:
            raise ServiceError(f"read {data.source_read} has no point for {landmark.code}")
        return (placement.x_mm, placement.y_mm, placement.z_mm), read
    return point_in_case(case, (data.x_mm, data.y_mm, data.z_mm), "a new point")[0], None


def _check_input(
    study: Study, case: Case, landmark: Landmark, data: DecisionInput
) -> tuple[AnalysisRun, str]:
    if data.decision not in AdjudicationDecision.values:
        raise ServiceError(
            f"unknown decision {data.decision!r}; use one of "
            f"{', '.join(AdjudicationDecision.values)}"
        )
    reason = (data.reason or "").strip()
    if not reason:
        raise ServiceError("give a short reason for the decision")
    if len(reason) > ADJUDICATION_REASON_MAX:
        raise ServiceError(
            f"the reason is {len(reason)} characters; keep it to {ADJUDICATION_REASON_MAX}"
        )
    run = latest_completed_run(study)
    if run is None:
        raise ServiceError("there is no completed analysis to adjudicate")
    if data.run and str(run.code) != str(data.run):
        raise ConflictError(
            f"the analysis was updated (run {run.code}, this page showed "
            f"{data.run}); reload to see the current consensus"
        )
    flagged = flagged_table(run)
    hit = (flagged["case"] == case.pseudonym) & (flagged["landmark"] == landmark.code)
    if not hit.any():
        raise ServiceError(
            f"case {case.pseudonym} landmark {landmark.code!r} is not flagged "
            "for adjudication in the latest analysis"
        )
    return run, reason


def record_decision(
    case: Case, landmark_code: str, user, data: DecisionInput
) -> tuple[AdjudicationEvent, bool]:
    """Append one decision for a flagged case x landmark; return (event, created).

    The caller has checked the user's role (studies.access.get_review_case). A retried
    request (same client_event_id) returns the stored event and changes nothing.
    """
    try:
        with transaction.atomic():
            return _record(case, landmark_code, user, data)
    except IntegrityError:
        stored = AdjudicationEvent.objects.filter(client_event_id=data.client_event_id).first()
        if stored is None:
            raise
        return _retried(case, stored), False


def _retried(case: Case, stored: AdjudicationEvent) -> AdjudicationEvent:
    if stored.case_id != case.pk:
        raise ServiceError("this event id was already used for another case")
    return stored


def _record(
    case: Case, landmark_code: str, user, data: DecisionInput
) -> tuple[AdjudicationEvent, bool]:
    stored = AdjudicationEvent.objects.filter(client_event_id=data.client_event_id).first()
    if stored is not None:
        return _retried(case, stored), False
    study = case.study
    landmark = review_landmark(case, landmark_code)
    run, reason = _check_input(study, case, landmark, data)
    xyz, source = _decided_point(case, landmark, run, data)
    event = AdjudicationEvent.objects.create(
        study=study,
        case=case,
        landmark=landmark,
        adjudicator=user,
        decision=data.decision,
        source_read=source,
        x_mm=xyz[0],
        y_mm=xyz[1],
        z_mm=xyz[2],
        reason=reason,
        analysis_run=run,
        client_event_id=data.client_event_id,
        created_at=timezone.now(),
    )
    return event, True


def decision_history(case: Case, landmark: Landmark) -> list[AdjudicationEvent]:
    """Every decision on this case x landmark, oldest first."""
    return list(
        AdjudicationEvent.objects.filter(case=case, landmark=landmark)
        .select_related("adjudicator", "source_read__reader", "analysis_run")
        .order_by("created_at", "pk")
    )


def reference_table(study: Study, run: AnalysisRun) -> pd.DataFrame:
    """The study's final reference points: the run's consensus table with decisions applied.

    Returns the consensus table's columns (world mm RAS+) plus decision, adjudicator,
    adjudication_reason and adjudicated_at. Where a decision exists, x/y/z are its point
    and method is "adjudicated". The standard error and covariance of the consensus are
    kept for an accepted consensus and left empty for a reader's point or a new point,
    which have no estimate of their own.
    """
    table = frame_of(run.tables["consensus"]).copy()
    for column in ("decision", "adjudicator", "adjudication_reason", "adjudicated_at"):
        table[column] = ""
    table["method"] = table["method"].astype(object)
    decided = latest_decisions(study)
    for index, row in table.iterrows():
        event = decided.get((str(row["case"]), str(row["landmark"])))
        if event is None:
            continue
        table.loc[index, ["x_mm", "y_mm", "z_mm"]] = [event.x_mm, event.y_mm, event.z_mm]
        table.loc[index, "method"] = ADJUDICATED_METHOD
        if event.decision != AdjudicationDecision.ACCEPT_CONSENSUS:
            table.loc[index, ["se_mm", *COV_COLUMNS]] = np.nan
        table.loc[index, "decision"] = event.decision
        table.loc[index, "adjudicator"] = event.adjudicator.username
        table.loc[index, "adjudication_reason"] = event.reason
        table.loc[index, "adjudicated_at"] = event.created_at.isoformat()
    return table
