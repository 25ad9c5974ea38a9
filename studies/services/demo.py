"""The demo study: twelve synthetic phantom cases, four invented readers, simulated reads.

Everything is generated from one seed, so the same seed gives the same study. Three
readers have submitted reads simulated from a model with known per-reader bias and noise
(one of them drifts slowly over eight weeks), including repeat reads after the washout;
the fourth reader has a fresh worklist for a newcomer to try. A simulated detector (the
true points plus noise) is scored against the readers, and its predictions file is left in
var/demo/ to upload again.
"""

from __future__ import annotations

import uuid
from dataclasses import dataclass
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
from django.conf import settings
from django.contrib.auth import get_user_model
from django.db import transaction
from django.utils import timezone

from ..constants import EventKind, Role
from ..imaging.phantom import PHANTOM_LANDMARKS, make_phantom
from ..imaging.storage import remove_case_files, write_case_files
from ..models import Read, Study
from . import analysis_runs, cases, placing, predictions, reads, studies

DEMO_SLUG = "phantom-demo"
DEMO_PASSWORD = "cairn-demo"
DEMO_SEED = 20261201
N_CASES = 12
WEEKS = 8.0
DETECTOR_NAME = "simulated-detector"
DETECTOR_FILE = "phantom-detector.csv"
DETECTOR_SD_MM = 1.0


@dataclass(frozen=True)
class SimulatedReader:
    """A demo reader's error model: per-axis SD, fixed bias, and bias growth per week (mm)."""

    username: str
    full_name: str
    sd_mm: float
    bias_mm: tuple[float, float, float]
    drift_mm_per_week: tuple[float, float, float]


COORDINATOR = ("hale", "Imogen Hale")
READERS = (
    SimulatedReader("ada", "Ada Brandt", 0.8, (0.0, 0.0, 0.0), (0.0, 0.0, 0.0)),
    SimulatedReader("ben", "Ben Okafor", 1.3, (1.2, 0.0, -0.6), (0.0, 0.0, 0.0)),
    SimulatedReader("cleo", "Cleo Marsh", 0.9, (0.0, 0.0, 0.0), (0.0, 0.8, 0.2)),
)
NEWCOMER = ("dev", "Dev Nair")


def _case_grid(index: int) -> dict:
    """Voxel grid per case: mostly isotropic, some anisotropic, varied storage, one oblique."""
    grids = [
        {"spacing_mm": (1.5, 1.5, 1.5)},
        {"spacing_mm": (0.9, 0.9, 2.5)},
        {"spacing_mm": (1.2, 1.2, 1.2), "flips": (-1, 1, 1)},
        {"spacing_mm": (1.5, 1.5, 1.5), "flips": (1, -1, 1)},
    ]
    grid = dict(grids[index % len(grids)])
    if index == 5:
        grid = {"spacing_mm": (1.4, 1.4, 1.4), "oblique_deg": 14.0}
    grid["accessory_present"] = index % 3 != 2
    return grid


def _user(username: str, full_name: str):
    first, last = full_name.split(" ", 1)
    user, created = get_user_model().objects.get_or_create(
        username=username, defaults={"first_name": first, "last_name": last}
    )
    if created:
        user.set_password(DEMO_PASSWORD)
        user.save()
    return user


def build_demo(stdout=None) -> Study:
    """Create the demo study unless it exists; return it. Idempotent."""
    existing = Study.objects.filter(slug=DEMO_SLUG).first()
    if existing is not None:
        return existing
    written: list[str] = []
    try:
        with transaction.atomic():
            return _build(written, stdout)
    except BaseException:
        for rel_dir in written:
            remove_case_files(Path(settings.CAIRN_DATA_DIR), rel_dir)
        raise


def _build(written: list[str], stdout) -> Study:
    coordinator = _user(*COORDINATOR)
    study = studies.create_study(
        name="Phantom head landmarks (demo)",
        slug=DEMO_SLUG,
        coordinator=coordinator,
        description="An invented study on synthetic head phantoms: six landmarks, four readers.",
        readers_per_case=3,
        repeat_fraction=0.25,
        washout_days=14,
        seed=DEMO_SEED,
        tolerance_mm=3.0,
    )
    studies.add_member(study, coordinator, Role.ADJUDICATOR)
    studies.set_protocol(
        study,
        [
            {
                "code": lm.code,
                "name": lm.name,
                "description": lm.description,
                "may_be_absent": lm.may_be_absent,
            }
            for lm in PHANTOM_LANDMARKS
        ],
    )
    truth = {}
    for index in range(N_CASES):
        phantom = make_phantom(DEMO_SEED + index, **_case_grid(index))
        rel_dir = f"{DEMO_SLUG}/{uuid.uuid4().hex}"
        stored = write_case_files(Path(settings.CAIRN_DATA_DIR), rel_dir, phantom.volume)
        written.append(rel_dir)
        case = cases.create_case(
            study,
            stored,
            checksum=f"demo-{DEMO_SEED}-{index}",
            label=f"phantom-{index + 1:02d}",
            modality=phantom.volume.modality,
            provenance=phantom.volume.provenance,
        )
        truth[case.pk] = phantom.truth_mm
        if stdout:
            stdout.write(f"  case {index + 1}/{N_CASES}: {case.label} {tuple(stored.shape)}\n")
    users = {r.username: _user(r.username, r.full_name) for r in READERS}
    for user in [*users.values(), _user(*NEWCOMER)]:
        studies.add_member(study, user, Role.READER)
    start = timezone.now() - timedelta(weeks=WEEKS)
    studies.open_study(study, now=start)
    rng = np.random.default_rng(DEMO_SEED)
    for model in READERS:
        _simulate_reader(study, users[model.username], model, truth, start, rng)
    # The simulated submits asked for a debounced run; the batch is complete, so send it now.
    analysis_runs.request_analysis(study)
    data = detector_csv(study, truth, np.random.default_rng(DEMO_SEED + 1))
    predictions.upload_predictions(study, coordinator, data, file_name=DETECTOR_FILE)
    path = Path(settings.VAR_DIR) / "demo" / DETECTOR_FILE
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(data)
    return study


def detector_csv(study: Study, truth: dict, rng: np.random.Generator) -> bytes:
    """A simulated detector's predictions in the upload format: the true point plus
    Gaussian noise of DETECTOR_SD_MM per axis, no bias; no prediction where a landmark is
    absent. Ordered by case label and protocol order."""
    rows = ["case,landmark,x_mm,y_mm,z_mm,detector"]
    for case in study.cases.order_by("label"):
        for landmark in PHANTOM_LANDMARKS:
            point = truth[case.pk][landmark.code]
            if np.isnan(point).any():
                xyz = ["", "", ""]
            else:
                xyz = [f"{v:.3f}" for v in point + rng.normal(0.0, DETECTOR_SD_MM, size=3)]
            rows.append(",".join([case.label, landmark.code, *xyz, DETECTOR_NAME]))
    return ("\n".join(rows) + "\n").encode()


def _simulate_reader(
    study: Study,
    user,
    model: SimulatedReader,
    truth: dict,
    start: datetime,
    rng: np.random.Generator,
) -> None:
    """Place and submit every read of one simulated reader, first reads then repeats."""
    first = list(study.reads.filter(reader=user, read_number=1).order_by("worklist_position"))
    span = timedelta(weeks=WEEKS * 0.7)
    for n, read in enumerate(first):
        when = start + timedelta(days=1) + span * (n / max(len(first) - 1, 1))
        _read_once(read, user, model, truth[read.case_id], when, start, rng)
    now = timezone.now()
    for read in study.reads.filter(reader=user, read_number=2).order_by("worklist_position"):
        read.refresh_from_db()
        when = read.available_from + timedelta(days=float(rng.uniform(0.5, 4.0)))
        if when < now:
            _read_once(read, user, model, truth[read.case_id], when, start, rng)


def _read_once(
    read: Read,
    user,
    model: SimulatedReader,
    truth: dict,
    when: datetime,
    start: datetime,
    rng: np.random.Generator,
) -> None:
    weeks = (when - start).total_seconds() / (7 * 86400)
    bias = np.asarray(model.bias_mm) + weeks * np.asarray(model.drift_mm_per_week)
    for n, landmark in enumerate(PHANTOM_LANDMARKS):
        point = truth[landmark.code]
        at = when + timedelta(seconds=40 * (n + 1))
        if np.isnan(point).any():
            data = placing.EventInput(landmark.code, EventKind.MARKED_ABSENT, uuid.uuid4(), at)
        else:
            xyz = point + bias + rng.normal(0.0, model.sd_mm, size=3)
            data = placing.EventInput(
                landmark.code,
                EventKind.PLACED,
                uuid.uuid4(),
                at,
                x_mm=float(xyz[0]),
                y_mm=float(xyz[1]),
                z_mm=float(xyz[2]),
                confidence=int(rng.choice([2, 3, 3])),
            )
        placing.record_event(read, user, data)
    reads.add_active_time(read, user, float(rng.uniform(150, 420)))
    reads.submit_read(read, user, now=when + timedelta(minutes=6))
