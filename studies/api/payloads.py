"""The JSON shape of each resource, defined once: views, tests and the pages read these."""

from __future__ import annotations

from collections.abc import Callable
from typing import TypedDict

from django.urls import reverse

from ..models import Landmark, Placement, Read, Study


class LandmarkDict(TypedDict):
    code: str
    name: str
    description: str
    may_be_absent: bool
    order: int


class PlacementDict(TypedDict):
    landmark: str
    state: str
    x_mm: float | None
    y_mm: float | None
    z_mm: float | None
    i_vox: float | None
    j_vox: float | None
    k_vox: float | None
    confidence: int | None
    placed_at: str


class VolumeDict(TypedDict):
    shape: list[int]
    spacing_mm: list[float]
    affine: list[list[float]]
    dtype: str
    layout: str
    byte_order: str
    bytes: int
    window_center: float
    window_width: float
    value_min: float
    value_max: float
    modality: str
    url: str
    coarse_shape: list[int]
    coarse_url: str


class ReadDict(TypedDict):
    code: str
    pseudonym: str
    study: str
    status: str
    version: int
    position: int
    active_seconds: float


class ReadDetailDict(ReadDict):
    landmarks: list[LandmarkDict]
    placements: list[PlacementDict]
    volume: VolumeDict


class StudyDict(TypedDict):
    slug: str
    name: str
    status: str
    roles: list[str]


def landmark_dict(landmark: Landmark) -> LandmarkDict:
    return {
        "code": landmark.code,
        "name": landmark.name,
        "description": landmark.description,
        "may_be_absent": landmark.may_be_absent,
        "order": landmark.order,
    }


def placement_dict(placement: Placement) -> PlacementDict:
    return {
        "landmark": placement.landmark.code,
        "state": placement.state,
        "x_mm": placement.x_mm,
        "y_mm": placement.y_mm,
        "z_mm": placement.z_mm,
        "i_vox": placement.i_vox,
        "j_vox": placement.j_vox,
        "k_vox": placement.k_vox,
        "confidence": placement.confidence,
        "placed_at": placement.placed_at.isoformat(),
    }


def read_dict(read: Read) -> ReadDict:
    """A read as its reader sees it: its own pseudonym, nothing about the case or others."""
    return {
        "code": str(read.code),
        "pseudonym": read.pseudonym,
        "study": read.study.name,
        "status": read.status,
        "version": read.version,
        "position": read.worklist_position,
        "active_seconds": round(read.active_seconds, 1),
    }


def _volume_header(case, url: Callable[[str], str]) -> VolumeDict:
    """Geometry and display hints only, nothing identifying; `url(level)` locates the voxels."""
    return {
        "shape": case.shape,
        "spacing_mm": case.spacing_mm,
        "affine": case.affine,
        "dtype": case.dtype,
        "layout": "i-fastest",
        "byte_order": "little",
        "bytes": case.viewer_bytes,
        "window_center": case.window_center,
        "window_width": case.window_width,
        "value_min": case.value_min,
        "value_max": case.value_max,
        "modality": case.modality,
        "url": url("full"),
        "coarse_shape": case.coarse_shape,
        "coarse_url": url("coarse"),
    }


def volume_dict(read: Read) -> VolumeDict:
    """The volume header of a reader's read (voxels reached through the read's own URL)."""
    return _volume_header(
        read.case,
        lambda level: reverse("studies-read-volume", kwargs={"code": read.code, "level": level}),
    )


def read_detail_dict(read: Read) -> ReadDetailDict:
    landmarks = read.study.landmarks.filter(protocol_version=read.protocol_version).order_by(
        "order"
    )
    placements = read.placements.select_related("landmark").order_by("landmark__order")
    return {
        **read_dict(read),
        "landmarks": [landmark_dict(lm) for lm in landmarks],
        "placements": [placement_dict(p) for p in placements],
        "volume": volume_dict(read),
    }


def study_dict(study: Study, roles: set[str]) -> StudyDict:
    return {"slug": study.slug, "name": study.name, "status": study.status, "roles": sorted(roles)}


# ---- adjudication and review (studies.api.adjudication) ----------------------------------


class ReaderPointDict(TypedDict):
    read: str
    reader: str
    read_number: int
    state: str
    x_mm: float | None
    y_mm: float | None
    z_mm: float | None
    confidence: int | None


class DecisionDict(TypedDict):
    decision: str
    adjudicator: str
    source_read: str | None
    source_reader: str | None
    x_mm: float
    y_mm: float
    z_mm: float
    reason: str
    analysis_run: str
    created_at: str


class QueueItemDict(TypedDict):
    case: str
    case_code: str
    landmark: str
    spread_mm: float | None
    max_pairwise_mm: float | None
    reasons: str
    n_readers: int
    n_absent: int
    decision: DecisionDict | None
    review_url: str


def case_volume_dict(case, study_slug: str) -> VolumeDict:
    """The volume header of a case for the review page (same shape as `volume_dict`)."""
    return _volume_header(
        case,
        lambda level: reverse(
            "studies-review-volume", kwargs={"slug": study_slug, "case": case.code, "level": level}
        ),
    )


def decision_dict(event) -> DecisionDict:
    source = event.source_read
    return {
        "decision": event.decision,
        "adjudicator": event.adjudicator.username,
        "source_read": str(source.code) if source else None,
        "source_reader": source.reader.username if source else None,
        "x_mm": event.x_mm,
        "y_mm": event.y_mm,
        "z_mm": event.z_mm,
        "reason": event.reason,
        "analysis_run": str(event.analysis_run.code),
        "created_at": event.created_at.isoformat(),
    }


def reader_point_dict(placement: Placement) -> ReaderPointDict:
    return {
        "read": str(placement.read.code),
        "reader": placement.read.reader.username,
        "read_number": placement.read.read_number,
        "state": placement.state,
        "x_mm": placement.x_mm,
        "y_mm": placement.y_mm,
        "z_mm": placement.z_mm,
        "confidence": placement.confidence,
    }


def queue_item_dict(item, study_slug: str) -> QueueItemDict:
    return {
        "case": item.case,
        "case_code": item.case_code,
        "landmark": item.landmark,
        "spread_mm": item.spread_mm,
        "max_pairwise_mm": item.max_pairwise_mm,
        "reasons": item.reasons,
        "n_readers": item.n_readers,
        "n_absent": item.n_absent,
        "decision": decision_dict(item.decision) if item.decision else None,
        "review_url": reverse("viewer-review", kwargs={
            "slug": study_slug, "case": item.case_code, "landmark": item.landmark}),
    }
