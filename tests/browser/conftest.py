"""Browser-test fixtures: Debian's chromium under pytest-playwright, a study on a phantom case.

The phantom (studies.imaging.phantom) is generated once per session and written once under
the test data directory; each test gets fresh database rows pointing at those files.
"""

from __future__ import annotations

import time
import uuid
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

from tests.browser.chromium import CHROMIUM, CHROMIUM_ARGS, VIEWPORT
from tests.conftest import require_service

PHANTOM_SEED = 4711
PHANTOM_SPACING_MM = (1.5, 1.5, 2.5)  # anisotropic on purpose


@pytest.fixture(scope="session")
def browser_type_launch_args(browser_type_launch_args):
    """Launch the chromium on PATH (never a downloaded browser) with the flags of stack-notes."""
    return {**browser_type_launch_args, "executable_path": CHROMIUM, "args": CHROMIUM_ARGS}


@pytest.fixture(scope="session")
def browser_context_args(browser_context_args):
    return {**browser_context_args, "viewport": VIEWPORT, "device_scale_factor": 1}


@pytest.fixture(autouse=True)
def _needs_chromium():
    require_service(CHROMIUM is not None, "chromium")


@pytest.fixture(autouse=True)
def _quiet_pages_before_flush(transactional_db, live_server, page):
    """Close the test's pages before the database is flushed.

    A page going away reports its active time (a keepalive POST); against the in-memory test
    database that request would race the flush. So API calls are cut first, then the pages
    closed, while the database still exists.
    """
    yield
    context = page.context
    context.route("**/api/**", lambda route: route.abort())
    for open_page in list(context.pages):
        open_page.close(run_before_unload=False)
    time.sleep(0.3)  # let a request the server already accepted finish before the flush


@pytest.fixture(scope="session")
def phantom_files():
    """One phantom case written under the test data dir: (StoredVolume, Phantom, rel_dir)."""
    from django.conf import settings

    # Import the URLconf now (it pulls in the analysis stack, several seconds), so the first
    # page load of the session does not spend its timeout on imports.
    from django.urls import get_resolver

    from studies.imaging.phantom import make_phantom
    from studies.imaging.storage import write_case_files

    _ = get_resolver().url_patterns
    phantom = make_phantom(PHANTOM_SEED, spacing_mm=PHANTOM_SPACING_MM, accessory_present=True)
    rel_dir = f"browser/{uuid.uuid4().hex}"
    stored = write_case_files(Path(settings.CAIRN_DATA_DIR), rel_dir, phantom.volume)
    return stored, phantom


@pytest.fixture
def canonical(phantom_files):
    """The case as nibabel reads it back: (voxels int16 (I, J, K), affine (4, 4) RAS+ mm)."""
    from django.conf import settings

    stored, _ = phantom_files
    image = nib.load(Path(settings.CAIRN_DATA_DIR) / stored.rel_dir / "canonical.nii")
    return np.asanyarray(image.dataobj), image.affine


def build_phantom_study(cast, phantom_files, reader, modality: str | None = None):
    """An open study with the phantom protocol (6 landmarks, one may be absent) and one case
    (the session's phantom files, stored as `modality`, the phantom's own by default), read
    by `reader` alone; returns the Read."""
    from datetime import timedelta

    from django.utils import timezone

    from studies.constants import Role
    from studies.imaging.phantom import PHANTOM_LANDMARKS
    from studies.models import Read
    from studies.services import cases, studies

    stored, phantom = phantom_files
    study = studies.create_study(
        name="Browser study",
        slug=f"browser-{uuid.uuid4().hex[:8]}",
        coordinator=cast["pi"],
        readers_per_case=1,
        repeat_fraction=0.0,
        washout_days=7,
        seed=5,
    )
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
    cases.create_case(
        study,
        stored,
        checksum=uuid.uuid4().hex,
        label="phantom",
        modality=modality or phantom.volume.modality,
    )
    studies.add_member(study, reader, Role.READER)
    studies.open_study(study, now=timezone.now() - timedelta(days=1))
    return Read.objects.get(study=study, reader=reader)


@pytest.fixture
def phantom_study(transactional_db, cast, phantom_files):
    """The phantom study read by reader_a; returns the Read."""
    return build_phantom_study(cast, phantom_files, cast["reader_a"])


def log_in(page, live_server, user) -> None:
    """Give the page a logged-in session cookie for `user` (the form login has its own test)."""
    from django.test import Client

    client = Client()
    client.force_login(user)
    page.context.add_cookies(
        [{"name": "sessionid", "value": client.cookies["sessionid"].value, "url": live_server.url}]
    )


def wait_js(page, expression: str, timeout: float = 10000) -> None:
    """Poll a JavaScript expression until it is true.

    Playwright's wait_for_function evaluates its string with eval, which the pages' Content
    Security Policy (script-src 'self') forbids; page.evaluate goes through the DevTools
    protocol and is not subject to it, so the policy stays on during the tests.
    """
    deadline = time.monotonic() + timeout / 1000
    while not page.evaluate(f"Boolean({expression})"):
        if time.monotonic() > deadline:
            raise TimeoutError(f"still false after {timeout} ms: {expression}")
        page.wait_for_timeout(25)


def open_read(page, live_server, read) -> None:
    """Open the reading page and wait until the full-resolution volume is drawn."""
    page.goto(f"{live_server.url}/read/{read.code}/")
    wait_js(page, "performance.getEntriesByName('viewer:full-ready').length > 0", timeout=30000)


def place_two_while_unreachable(page) -> None:
    """From the keyboard: ORB-L at the crosshair, then ORB-R one axial slice up; wait until
    the page says it is offline (the caller has made the events endpoint fail)."""
    page.keyboard.press("Enter")
    page.keyboard.press("n")
    page.keyboard.press("ArrowUp")
    page.keyboard.press("Enter")
    wait_js(page, "document.getElementById('rd-save').dataset.state === 'offline'")


def pane_box(page, plane: str) -> dict:
    """The overlay canvas of a pane, in page CSS px (the area pointer positions map to)."""
    return page.locator(f".pane[data-plane='{plane}'] canvas.pane-overlay").bounding_box()


def fitted_rect(width: float, height: float, n_u: int, n_v: int, su: float, sv: float) -> dict:
    """Where a slice of n_u x n_v voxels of su x sv mm is drawn when fitted to a pane at its
    physical aspect ratio and centred (zoom 1): x, y, width, height in CSS px."""
    fit = min(width / (n_u * su), height / (n_v * sv))
    dw, dh = n_u * su * fit, n_v * sv * fit
    return {"x": (width - dw) / 2, "y": (height - dh) / 2, "width": dw, "height": dh}
