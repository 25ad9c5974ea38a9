"""What the panes draw: the rendered slices against numpy's slicing of the same volume under
the same window, at the true physical aspect ratio, with orientation letters from the affine."""

from __future__ import annotations

import io

import numpy as np
import pytest
from PIL import Image

from tests.browser.conftest import fitted_rect, log_in, open_read, wait_js

pytestmark = pytest.mark.browser

# plane -> (in-plane voxel axes u, v; normal axis)
PLANES = {"axial": (0, 1, 2), "coronal": (0, 2, 1), "sagittal": (1, 2, 0)}


def expected_slice(data: np.ndarray, plane: str, depth: int) -> np.ndarray:
    """The slice as the page should show it, rows top to bottom, columns left to right.

    Radiological display of a canonical (RAS+) volume: the patient's right on the screen's
    left, anterior (axial) or superior (coronal, sagittal) at the top, anterior on the
    left in sagittal: every in-plane voxel axis runs against the screen axis.
    """
    u_axis, v_axis, normal = PLANES[plane]
    section = np.take(data, depth, axis=normal)  # remaining axes keep their order
    if u_axis > v_axis:
        section = section.T
    # section[a, b] is voxel (u_axis=a, v_axis=b); the screen shows u reversed, v reversed.
    return section[::-1, ::-1].T


def window_grey(values: np.ndarray, center: float, width: float) -> np.ndarray:
    """Linear window to 0..255 (common practice): round((v - (c - w/2)) / w * 255), clipped."""
    grey = np.rint((values.astype(np.float64) - (center - width / 2.0)) / width * 255.0)
    return np.clip(grey, 0, 255).astype(np.int64)


def test_it_draws_each_plane_like_numpy_slicing_with_the_same_window(
    page, live_server, phantom_study, canonical, cast
):
    """Screenshot the panes' image canvases (overlays hidden) and read the grey value at the
    centre of every drawn voxel; compare with numpy's slice of the canonical NIfTI (read
    with nibabel) under the same window.

    Reference: numpy indexing of the nibabel array; the voxel rectangles come from fitting
    the slice's physical size (voxel count x voxel size from the affine) into the pane, so
    the anisotropic 2.5 mm axis is also checked. Tolerance: 1 grey level (JavaScript's
    Math.round and numpy's rint differ only at exact halves); at least 99 % exact.
    """
    data, affine = canonical
    zooms = np.sqrt((affine[:3, :3] ** 2).sum(axis=0))
    log_in(page, live_server, cast["reader_a"])
    open_read(page, live_server, phantom_study)
    page.evaluate(
        "document.querySelectorAll('canvas.pane-overlay, .pane-caption')"
        ".forEach(c => c.style.visibility = 'hidden')"
    )
    window = page.evaluate("cairnRead.viewer.window")
    case = phantom_study.case
    assert window == {"center": case.window_center, "width": case.window_width}

    viewport = np.asarray(Image.open(io.BytesIO(page.screenshot())).convert("RGB")).astype(int)
    for plane, (u_axis, v_axis, _normal) in PLANES.items():
        pane = page.locator(f".pane[data-plane='{plane}']")
        depth = int(pane.get_attribute("data-slice"))
        box = pane.locator("canvas.pane-image").bounding_box()
        # Crop a viewport screenshot: Chromium snaps the canvas to whole pixels, while an
        # element screenshot at a fractional position would be resampled.
        x0, y0 = round(box["x"]), round(box["y"])
        width, height = round(box["width"]), round(box["height"])
        shot = viewport[y0 : y0 + height, x0 : x0 + width]
        n_u, n_v = data.shape[u_axis], data.shape[v_axis]
        rect = fitted_rect(width, height, n_u, n_v, zooms[u_axis], zooms[v_axis])
        xs = np.floor(rect["x"] + (np.arange(n_u) + 0.5) * rect["width"] / n_u).astype(int)
        ys = np.floor(rect["y"] + (np.arange(n_v) + 0.5) * rect["height"] / n_v).astype(int)
        drawn = shot[np.ix_(ys, xs)]
        assert np.array_equal(drawn[..., 0], drawn[..., 1]), plane  # grey, no tint
        expected = window_grey(
            expected_slice(data, plane, depth), window["center"], window["width"]
        )
        difference = np.abs(drawn[..., 0] - expected)
        assert difference.max() <= 1, plane
        assert (difference == 0).mean() >= 0.99, plane
        # Physical aspect: a voxel's drawn height / width equals its mm height / width.
        aspect = (rect["height"] / n_v) / (rect["width"] / n_u)
        assert aspect == pytest.approx(zooms[v_axis] / zooms[u_axis])


def test_it_labels_pane_edges_from_the_affine_and_shows_the_scale(
    page, live_server, phantom_study, cast
):
    """Orientation letters follow the radiological convention for an RAS+ volume (nibabel
    coordinate-systems docs; standard display orientation: axial A up and patient left on
    the screen's right, sagittal A on the left); slice index and world position are shown."""
    log_in(page, live_server, cast["reader_a"])
    open_read(page, live_server, phantom_study)
    letters = page.evaluate(
        "import('/static/viewer/js/coords.js').then(m => Object.fromEntries("
        "['axial', 'coronal', 'sagittal']"
        ".map(p => [p, m.planeLetters(p, cairnRead.viewer.affine)])))"
    )
    assert letters["axial"] == {"left": "R", "right": "L", "top": "A", "bottom": "P"}
    assert letters["coronal"] == {"left": "R", "right": "L", "top": "S", "bottom": "I"}
    assert letters["sagittal"] == {"left": "A", "right": "P", "top": "S", "bottom": "I"}
    caption = page.inner_text(".pane[data-plane='axial'] .pane-caption")
    n_k = phantom_study.case.shape[2]
    assert caption.startswith("Axial · slice ") and f"/{n_k} · z " in caption
    box = page.locator(".pane[data-plane='axial']").bounding_box()
    page.mouse.move(box["x"] + box["width"] / 2, box["y"] + box["height"] / 2)
    assert page.inner_text("#ro-source") == "under the pointer"
    assert page.inner_text("#ro-value").lstrip("-").isdigit()
    start = int(np.floor((n_k - 1) / 2 + 0.5))  # the crosshair starts at the middle voxel
    page.mouse.wheel(0, 300)  # three notches of 100 px: three slices
    wait_js(
        page,
        f"document.querySelector(\".pane[data-plane='axial']\").dataset.slice === '{start + 3}'",
    )
