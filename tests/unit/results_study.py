"""A small analysed study on oblique, axis-permuted NIfTI files, for the results tests.

Each case is written with nibabel to a real .nii file whose affine permutes and flips the
axes (array axes point roughly Superior, Left, Posterior) and tilts them by a few degrees,
then imported through studies.imaging.nifti.read_nifti and write_case_files, which stores it
in canonical (closest RAS+) order. Readers click chosen canonical voxels.
"""

from __future__ import annotations

import uuid
from dataclasses import dataclass, field
from datetime import timedelta
from pathlib import Path

import nibabel as nib
import numpy as np

ORIGINAL_SHAPE = (10, 12, 8)
SPACING_MM = (1.1, 0.9, 1.7)
#: Canonical voxel both readers click for landmark A on every case (agreement).
CLICK_A = np.array([4.0, 5.0, 3.0])
#: Canonical voxel reader_a clicks for landmark B; reader_b is off by OFFSET_B[case] voxels.
CLICK_B = np.array([2.0, 3.0, 2.0])
OFFSET_B = {0: np.array([4.0, 0.0, 0.0]), 1: np.array([0.0, 4.0, 0.0]), 2: np.zeros(3)}


def _rotation(degrees_x: float, degrees_z: float) -> np.ndarray:
    ax, az = np.radians(degrees_x), np.radians(degrees_z)
    rx = np.array([[1, 0, 0], [0, np.cos(ax), -np.sin(ax)], [0, np.sin(ax), np.cos(ax)]])
    rz = np.array([[np.cos(az), -np.sin(az), 0], [np.sin(az), np.cos(az), 0], [0, 0, 1]])
    return rz @ rx


def oblique_affine(seed: int) -> np.ndarray:
    """Array axes i -> Superior, j -> Left, k -> Posterior, tilted by 7 and 11 degrees."""
    directions = np.array([[0.0, -1.0, 0.0], [0.0, 0.0, -1.0], [1.0, 0.0, 0.0]])  # columns
    affine = np.eye(4)
    affine[:3, :3] = _rotation(7.0, 11.0) @ directions @ np.diag(SPACING_MM)
    affine[:3, 3] = [30.0 + seed, -40.5, 12.25]
    return affine


def write_nifti(folder: Path, seed: int) -> Path:
    rng = np.random.default_rng(seed)
    data = rng.integers(0, 1000, size=ORIGINAL_SHAPE, dtype=np.int16)
    image = nib.Nifti1Image(data, oblique_affine(seed))
    image.set_sform(oblique_affine(seed), code=1)
    image.set_qform(oblique_affine(seed), code=1)
    path = folder / f"scan-{seed}.nii"
    nib.save(image, path)
    return path


@dataclass
class ResultsStudy:
    study: object
    files: dict = field(default_factory=dict)  # case pseudonym -> original .nii path
    run: object = None


def click(read, user, code: str, ijk: np.ndarray) -> None:
    from django.utils import timezone

    from studies.constants import EventKind
    from studies.imaging.geometry import voxel_to_world
    from studies.services import placing

    xyz = voxel_to_world(np.array(read.case.affine), ijk)
    placing.record_event(
        read,
        user,
        placing.EventInput(
            code,
            EventKind.PLACED,
            uuid.uuid4(),
            timezone.now(),
            x_mm=float(xyz[0]),
            y_mm=float(xyz[1]),
            z_mm=float(xyz[2]),
        ),
    )


def build(cast, folder: Path, data_dir: Path, *, analyse: bool = True) -> ResultsStudy:
    """Three oblique cases, two readers each (mean consensus), every read submitted."""
    from django.utils import timezone

    from studies.constants import Role
    from studies.imaging.nifti import read_nifti
    from studies.imaging.storage import write_case_files
    from studies.services import analysis_runs, cases, reads, studies

    study = studies.create_study(
        name="Results study",
        slug="results-study",
        coordinator=cast["pi"],
        readers_per_case=2,
        repeat_fraction=0.0,
        washout_days=7,
        seed=11,
        consensus_method="mean",
        tolerance_mm=3.0,
    )
    studies.set_protocol(
        study, [{"code": "A", "name": "Point A"}, {"code": "B", "name": "Point B"}]
    )
    result = ResultsStudy(study)
    for seed in range(3):
        path = write_nifti(folder, seed)
        volume = read_nifti(path)
        stored = write_case_files(data_dir, f"r/{uuid.uuid4().hex}", volume)
        case = cases.create_case(study, stored, checksum=uuid.uuid4().hex, label=f"scan-{seed}")
        result.files[case.pseudonym] = path
    for name in ("reader_a", "reader_b"):
        studies.add_member(study, cast[name], Role.READER)
    studies.add_member(study, cast["adjudicator"], Role.ADJUDICATOR)
    studies.open_study(study, now=timezone.now() - timedelta(days=1))
    labels = {pseudonym: int(path.stem.split("-")[1]) for pseudonym, path in result.files.items()}
    for name in ("reader_a", "reader_b"):
        for read in study.reads.filter(reader=cast[name]).select_related("case"):
            click(read, cast[name], "A", CLICK_A)
            offset = OFFSET_B[labels[read.case.pseudonym]] if name == "reader_b" else 0.0
            click(read, cast[name], "B", CLICK_B + offset)
            reads.submit_read(read, cast[name])
    if analyse:
        result.run = analysis_runs.execute(analysis_runs.request_analysis(study).pk)
    return result


def add_adjudicator(cast, django_user_model):
    """Add "adj", who will adjudicate, to the cast."""
    cast["adjudicator"] = django_user_model.objects.create_user("adj", password="pw-adj")
    return cast["adjudicator"]


def analysed(
    cast, django_user_model, data_dir: Path, tmp_path: Path, *, analyse: bool = True
) -> ResultsStudy:
    """The cast plus an adjudicator, and the results study (see `build`)."""
    add_adjudicator(cast, django_user_model)
    folder = tmp_path / "originals"
    folder.mkdir()
    return build(cast, folder, data_dir, analyse=analyse)
