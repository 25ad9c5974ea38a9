"""A whole read from the keyboard alone: slices, crosshair, landmarks, confidence, not
visible, remove, undo / redo and submit, with no mouse event at all."""

from __future__ import annotations

import numpy as np
import pytest

from tests.browser.conftest import log_in, open_read, wait_js

pytestmark = pytest.mark.browser


def press(page, *keys: str) -> None:
    for key in keys:
        page.keyboard.press(key)


def test_it_completes_a_whole_read_from_the_keyboard(page, live_server, phantom_study, cast):
    """Every step of a read by keys only (WCAG 2.1.1 keyboard operation, from memory), with
    the shortcut list shown on the page.

    Reference for positions: the crosshair starts on the middle voxel, round((n - 1) / 2)
    per axis, and each key moves it by whole voxels; the server's own voxel index of each
    placement (computed from world mm with the case affine) must be exactly those integers.
    """
    from studies.models import PlacementEvent, Read

    log_in(page, live_server, cast["reader_a"])
    open_read(page, live_server, phantom_study)
    keys_text = page.inner_text("#rd-keys")
    for shown in (
        "next / previous landmark",
        "place the active landmark at the crosshair",
        "undo",
        "mark not visible",
        "submit the read",
    ):
        assert shown in keys_text
    start = np.floor((np.array(phantom_study.case.shape) - 1) / 2 + 0.5)
    expected = {}

    press(page, "l", "l", "l", "Enter", "3")  # ORB-L: 3 voxels towards the patient's left
    expected["ORB-L"] = start + np.array([-3, 0, 0])
    press(page, "n", "ArrowUp", "ArrowUp", "Enter", "2")  # ORB-R: 2 slices up
    expected["ORB-R"] = expected["ORB-L"] + np.array([0, 0, 2])
    press(page, "n", "o", "PageUp", "Enter")  # BEAD-M: coronal pane, 10 slices anterior
    expected["BEAD-M"] = expected["ORB-R"] + np.array([0, 10, 0])
    press(page, "n", "Shift+I", "Enter", "1")  # BEAD-P: 10 voxels up in the coronal pane
    expected["BEAD-P"] = expected["BEAD-M"] + np.array([0, 0, 10])
    press(page, "n", "o", "j", "Enter")  # KNOB-V: sagittal pane, one voxel to the screen's left
    expected["KNOB-V"] = expected["BEAD-P"] + np.array([0, 1, 0])
    press(page, "n", "v")  # BEAD-X: not visible
    press(page, "Control+z", "Control+y")  # undo and redo the mark
    press(page, "p", "Delete", "Control+z")  # remove KNOB-V, then take the removal back
    wait_js(page, "cairnRead.queue.pending.length === 0")
    assert page.inner_text("#rd-count") == "6 of 6 done"
    page.wait_for_timeout(1200)  # a little reading time to count

    press(page, "Control+Enter")
    page.wait_for_selector("#rd-confirm[open]")
    press(page, "Enter")  # the confirm button has the focus
    wait_js(page, "document.getElementById('reader-app').dataset.state === 'submitted'")

    read = Read.objects.get(pk=phantom_study.pk)
    assert read.status == "submitted"
    assert read.active_seconds > 0
    placements = {p.landmark.code: p for p in read.placements.select_related("landmark")}
    for code, ijk in expected.items():
        p = placements[code]
        assert p.state == "placed"
        assert np.allclose([p.i_vox, p.j_vox, p.k_vox], ijk, atol=1e-6), code
    assert placements["BEAD-X"].state == "absent"
    assert [placements[c].confidence for c in ("ORB-L", "ORB-R", "BEAD-P")] == [3, 2, 1]
    kinds = [
        (e.landmark.code, e.kind)
        for e in PlacementEvent.objects.filter(read=read).order_by("read_version")
    ]
    assert kinds == [
        ("ORB-L", "placed"),
        ("ORB-L", "moved"),
        ("ORB-R", "placed"),
        ("ORB-R", "moved"),
        ("BEAD-M", "placed"),
        ("BEAD-P", "placed"),
        ("BEAD-P", "moved"),
        ("KNOB-V", "placed"),
        ("BEAD-X", "marked_absent"),
        ("BEAD-X", "removed"),
        ("BEAD-X", "marked_absent"),
        ("KNOB-V", "removed"),
        ("KNOB-V", "placed"),
    ]


def test_it_stops_counting_reading_time_after_a_minute_without_input(
    page, live_server, phantom_study, cast
):
    """Active time pauses when the reader is idle for over a minute (the issue's rule): with
    the last input set 61 s back, a clock tick adds nothing; a key press resumes counting."""
    log_in(page, live_server, cast["reader_a"])
    open_read(page, live_server, phantom_study)
    idle = page.evaluate(
        """() => {
          const clock = cairnRead.clock;
          clock.lastInput = performance.now() - 61000;
          const before = clock.total();
          clock.lastTick = performance.now() - 1000;
          clock.tick();
          return {active: clock.isActive(), added: clock.total() - before,
                  text: document.getElementById('rd-clock').textContent};
        }"""
    )
    assert idle["active"] is False
    assert idle["added"] == 0
    assert idle["text"].endswith("(paused)")
    page.keyboard.press("ArrowUp")
    resumed = page.evaluate(
        """() => {
          const clock = cairnRead.clock;
          const before = clock.total();
          clock.lastTick = performance.now() - 1000;
          clock.tick();
          return {active: clock.isActive(), added: clock.total() - before};
        }"""
    )
    assert resumed["active"] is True
    assert resumed["added"] == pytest.approx(1.0, abs=0.1)
