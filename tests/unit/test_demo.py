"""The demo study: built from a seed, idempotent, with the promised cast and reads."""

from __future__ import annotations

import numpy as np
import pytest
from django.core.management import call_command

from studies.constants import ReadStatus, Role, RunStatus
from studies.imaging.geometry import world_to_voxel
from studies.imaging.phantom import PHANTOM_LANDMARKS, make_phantom
from studies.models import Case, PlacementEvent, Read, Study
from studies.services.demo import (
    DEMO_SLUG,
    DETECTOR_FILE,
    DETECTOR_NAME,
    N_CASES,
    NEWCOMER,
    READERS,
)


@pytest.mark.slow
def test_it_builds_the_demo_once_and_twice_is_the_same(
    db, sent_tasks, django_capture_on_commit_callbacks, settings, tmp_path
) -> None:
    settings.VAR_DIR = tmp_path
    with django_capture_on_commit_callbacks(execute=True):
        call_command("demo", "--no-serve")
    counts = (
        Study.objects.count(),
        Case.objects.count(),
        Read.objects.count(),
        PlacementEvent.objects.count(),
    )
    call_command("demo", "--no-serve")
    assert counts == (
        Study.objects.count(),
        Case.objects.count(),
        Read.objects.count(),
        PlacementEvent.objects.count(),
    )
    study = Study.objects.get(slug=DEMO_SLUG)
    assert study.cases.count() == N_CASES
    assert study.current_landmarks().count() == len(PHANTOM_LANDMARKS) == 6
    readers = set(
        study.memberships.filter(role=Role.READER).values_list("user__username", flat=True)
    )
    assert readers == {r.username for r in READERS} | {NEWCOMER[0]}
    assert study.memberships.filter(role=Role.COORDINATOR).count() == 1
    for model in READERS:
        own = study.reads.filter(reader__username=model.username)
        assert own.filter(read_number=2, status=ReadStatus.SUBMITTED).exists()
        assert own.filter(read_number=1).exclude(status=ReadStatus.SUBMITTED).count() == 0
    newcomer = study.reads.filter(reader__username=NEWCOMER[0])
    assert newcomer.exists() and not newcomer.exclude(status=ReadStatus.WAITING).exists()
    spacings = {tuple(np.round(c.spacing_mm, 2)) for c in study.cases.all()}
    assert (0.9, 0.9, 2.5) in spacings
    call_command("rebuild_placements", "--check")
    # The analysis is sent when the build ends (a worker starting with the demo runs it at
    # once), not left waiting out the submit debounce.
    assert list(study.analysis_runs.values_list("status", "progress_message")) == [
        (RunStatus.PENDING, "queued")]
    assert len(sent_tasks) == 1
    # A simulated detector is scored against the readers, and its file is left to upload.
    run = study.detector_runs.get()
    assert (run.name, run.status, run.n_rows) == (DETECTOR_NAME, "completed", N_CASES * 6)
    raters = {row[1] for row in run.tables["detector"]["data"]}
    assert DETECTOR_NAME in raters and {"ada", "ben", "cleo"} <= raters
    lines = (tmp_path / "demo" / DETECTOR_FILE).read_text().splitlines()
    assert lines[0] == "case,landmark,x_mm,y_mm,z_mm,detector" and len(lines) == 1 + N_CASES * 6


def test_the_phantom_puts_each_landmark_inside_its_bright_or_grey_feature() -> None:
    """The voxel at each true landmark is nearer its feature's intensity than the core's (420)."""
    phantom = make_phantom(11, spacing_mm=(0.9, 0.9, 2.5), flips=(-1, 1, 1), oblique_deg=14.0)
    for landmark in PHANTOM_LANDMARKS:
        ijk = np.rint(world_to_voxel(phantom.volume.affine, phantom.truth_mm[landmark.code]))
        value = phantom.volume.data[tuple(ijk.astype(int))]
        assert abs(value - landmark.intensity) < abs(value - 420.0), (landmark.code, value)


def test_the_phantom_is_reproducible_from_its_seed() -> None:
    a, b = make_phantom(5), make_phantom(5)
    assert np.array_equal(a.volume.data, b.volume.data)
    assert not np.array_equal(
        a.volume.data[:50, :50, :50], make_phantom(6).volume.data[:50, :50, :50]
    )
