"""Creating Case rows from stored volumes."""

from __future__ import annotations

from django.db import transaction

from ..imaging.storage import StoredVolume
from ..models import Case, Study
from .errors import ServiceError
from .pseudonyms import new_pseudonym


@transaction.atomic
def create_case(
    study: Study,
    stored: StoredVolume,
    *,
    checksum: str,
    label: str,
    modality: str = "OT",
    provenance: dict | None = None,
) -> Case:
    """Record a stored volume as a case of `study` under a fresh random pseudonym.

    Adding a case to an open study extends the design (the new case gets its readers).
    """
    if study.cases.filter(checksum=checksum).exists():
        raise ServiceError(f"this scan is already in the study (checksum {checksum[:12]}...)")
    case = Case.objects.create(
        study=study,
        pseudonym=new_pseudonym("C"),
        label=label,
        data_dir=stored.rel_dir,
        shape=list(stored.shape),
        spacing_mm=list(stored.spacing_mm),
        affine=stored.affine,
        original_shape=list(stored.original_shape),
        original_affine=stored.original_affine,
        dtype=stored.dtype,
        modality=modality,
        window_center=stored.window_center,
        window_width=stored.window_width,
        value_min=stored.value_min,
        value_max=stored.value_max,
        viewer_bytes=stored.viewer_bytes,
        viewer_compressed_bytes=stored.viewer_compressed_bytes,
        coarse_shape=list(stored.coarse_shape),
        coarse_compressed_bytes=stored.coarse_compressed_bytes,
        checksum=checksum,
        provenance=provenance or {},
    )
    if study.status == "open":
        from .reads import sync_reads

        sync_reads(study)
    return case
