"""Shared fixtures: the fixed cast (pi, reader_a, reader_b, outsider) and a small open study."""

from __future__ import annotations

import os
import uuid
from datetime import timedelta
from pathlib import Path

import numpy as np
import pytest

os.environ.setdefault("DJANGO_ALLOW_ASYNC_UNSAFE", "true")

IN_CI = os.environ.get("CI", "").lower() == "true"


def require_service(available: bool, what: str) -> None:
    """Skip when a real service is missing on a developer machine; fail under CI=true."""
    if available:
        return
    if IN_CI:
        pytest.fail(f"{what} is required under CI=true but is not available")
    pytest.skip(f"{what} not available (these tests fail instead of skipping under CI=true)")


def tiny_volume(shape=(12, 14, 10), spacing=(1.0, 1.2, 2.0), seed: int = 0):
    """A small asymmetric int16 volume with an axis-aligned affine (for fast DB tests)."""
    from studies.imaging.volume import Volume

    rng = np.random.default_rng(seed)
    data = rng.integers(0, 1000, size=shape, dtype=np.int16)
    affine = np.diag([*spacing, 1.0])
    affine[:3, 3] = [-10.0, 20.0, -5.0]
    return Volume(data=data, affine=affine, modality="MR", checksum=uuid.uuid4().hex)


@pytest.fixture
def cast(db, django_user_model):
    """pi coordinates; reader_a and reader_b read; outsider has no role anywhere."""
    make = django_user_model.objects.create_user
    return {
        name: make(username=name, password="pw-" + name)
        for name in ("pi", "reader_a", "reader_b", "outsider")
    }


@pytest.fixture
def open_study(cast, settings):
    """An open study: 2 landmarks (one may be absent), 3 tiny cases, k=2 with two readers."""
    from django.utils import timezone

    from studies.constants import Role
    from studies.imaging.storage import write_case_files
    from studies.services import cases, studies

    study = studies.create_study(
        name="Test study",
        slug="test-study",
        coordinator=cast["pi"],
        readers_per_case=2,
        repeat_fraction=0.0,
        washout_days=7,
        seed=3,
    )
    studies.set_protocol(
        study,
        [
            {"code": "A", "name": "Point A"},
            {"code": "B", "name": "Point B", "may_be_absent": True},
        ],
    )
    for index in range(3):
        volume = tiny_volume(seed=index)
        rel_dir = f"t/{uuid.uuid4().hex}"
        stored = write_case_files(Path(settings.CAIRN_DATA_DIR), rel_dir, volume)
        cases.create_case(study, stored, checksum=volume.checksum, label=f"case-{index}")
    for name in ("reader_a", "reader_b"):
        studies.add_member(study, cast[name], Role.READER)
    return studies.open_study(study, now=timezone.now() - timedelta(days=1))
