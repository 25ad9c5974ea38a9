"""Build the load-test study: `python -m tests.load.setup_study N_READERS N_CASES`.

An open study with six landmarks (one may be marked not visible), N_CASES small synthetic
volumes (seeded noise, 1 x 1.2 x 2 mm voxels) and N_READERS invented readers, each of
whom reads every case once; plus one coordinator. Prints one JSON line: slug, user
names, the shared password.
"""

from __future__ import annotations

import json
import sys
import uuid
from datetime import timedelta
from pathlib import Path

import numpy as np

PASSWORD = "load-test-password-1"
LANDMARKS = [
    {"code": f"L{n}", "name": f"Landmark {n}", "may_be_absent": n == 6} for n in range(1, 7)
]


def main(n_readers: int, n_cases: int) -> dict:
    import django

    django.setup()
    from django.conf import settings
    from django.contrib.auth import get_user_model
    from django.utils import timezone

    from studies.constants import Role
    from studies.imaging.storage import write_case_files
    from studies.imaging.volume import Volume
    from studies.services import cases, studies

    users = get_user_model().objects
    coordinator = users.create_user("coord", password=PASSWORD)
    study = studies.create_study(
        name="Load test", slug="load-test", coordinator=coordinator,
        readers_per_case=n_readers, repeat_fraction=0.0, washout_days=0, seed=7,
    )
    studies.set_protocol(study, LANDMARKS)
    rng = np.random.default_rng(20261202)
    for index in range(n_cases):
        data = rng.integers(0, 1000, size=(24, 20, 16), dtype=np.int16)
        affine = np.diag([1.0, 1.2, 2.0, 1.0])
        affine[:3, 3] = [-12.0, -12.0, -16.0]
        volume = Volume(data=data, affine=affine, modality="MR", checksum=uuid.uuid4().hex)
        stored = write_case_files(Path(settings.CAIRN_DATA_DIR), f"load/{index}", volume)
        cases.create_case(study, stored, checksum=volume.checksum, label=f"load-{index}")
    names = [f"reader{n:03d}" for n in range(1, n_readers + 1)]
    for name in names:
        studies.add_member(study, users.create_user(name, password=PASSWORD), Role.READER)
    studies.open_study(study, now=timezone.now() - timedelta(hours=1))
    return {"slug": study.slug, "coordinator": "coord", "readers": names, "password": PASSWORD,
            "reads": study.reads.count()}


if __name__ == "__main__":
    print(json.dumps(main(int(sys.argv[1]), int(sys.argv[2]))))
