"""Finding one's way in the volume: scale bar, zoom and pan, window/level (drag, CT presets,
automatic percentile window), reset, layout, jumping to a point, how markers fade with
distance from the slice, the loading progress bar, active time while the tab is hidden, and
saving through server errors. All on the session's phantom case (conftest.py)."""

from __future__ import annotations

import io
import json
import re

import numpy as np
import pytest
from nibabel.affines import apply_affine
from PIL import Image

from tests.browser.conftest import (
    build_phantom_study,
    log_in,
    open_read,
    pane_box,
    place_two_while_unreachable,
    wait_js,
)
from tests.browser.test_rendering import PLANES, expected_slice, window_grey

pytestmark = pytest.mark.browser

ORANGE = (230, 159, 0)  # #E69F00, the first marker colour (Okabe & Ito palette)
NICE_STEPS = (1, 2, 5)  # scale-bar lengths 1, 2 or 5 x 10^n mm (common practice)


# ---- geometry computed here, independently of the page -------------------------------------



def open_as_reader_a(page, live_server, cast, read) -> None:
    """Sign in as reader_a and open the read's page (waits for its first image)."""
    log_in(page, live_server, cast["reader_a"])
    open_read(page, live_server, read)

def zooms_of(affine: np.ndarray) -> np.ndarray:
    """Voxel sizes (mm) from the affine's column norms (nibabel's rule for zooms)."""
    return np.sqrt((affine[:3, :3] ** 2).sum(axis=0))


def view(shape, zooms, plane: str, size: dict, zoom: float = 1.0, centre=None):
    """CSS px per voxel (kx, ky) and the slice coordinate at the pane centre.

    `size` is a pane box from `pane_box`; only its width and height are read.

    The slice (n_u x n_v voxels of su x sv mm) is fitted to the pane at its physical aspect
    ratio, then zoomed; slice coordinates run against the voxel axes (radiological display:
    u = n_u - 1 - index_u, v = n_v - 1 - index_v; voxel centres at integer indices, nibabel).
    """
    u_axis, v_axis, _ = PLANES[plane]
    n_u, n_v = shape[u_axis], shape[v_axis]
    su, sv = zooms[u_axis], zooms[v_axis]
    fit = min(size["width"] / (n_u * su), size["height"] / (n_v * sv))
    if centre is None:
        centre = ((n_u - 1) / 2, (n_v - 1) / 2)
    return su * fit * zoom, sv * fit * zoom, centre


def voxel_at(shape, zooms, plane, size, x, y, depth, zoom=1.0, centre=None) -> np.ndarray:
    """Continuous voxel index under pane point (x, y) (CSS px) on slice `depth`."""
    u_axis, v_axis, normal = PLANES[plane]
    kx, ky, (cu, cv) = view(shape, zooms, plane, size, zoom, centre)
    u = cu + (x - size["width"] / 2) / kx
    v = cv + (y - size["height"] / 2) / ky
    ijk = np.zeros(3)
    ijk[u_axis] = shape[u_axis] - 1 - u
    ijk[v_axis] = shape[v_axis] - 1 - v
    ijk[normal] = depth
    return ijk


def screen_at(shape, zooms, plane, size, ijk, zoom=1.0, centre=None) -> tuple[float, float]:
    """Pane point (CSS px) where continuous voxel `ijk` is drawn (inverse of voxel_at)."""
    u_axis, v_axis, _ = PLANES[plane]
    kx, ky, (cu, cv) = view(shape, zooms, plane, size, zoom, centre)
    u = shape[u_axis] - 1 - ijk[u_axis]
    v = shape[v_axis] - 1 - ijk[v_axis]
    return size["width"] / 2 + (u - cu) * kx, size["height"] / 2 + (v - cv) * ky


# ---- reading the page ----------------------------------------------------------------------


def numbers(text: str) -> np.ndarray:
    return np.array([float(x) for x in re.findall(r"-?\d+(?:\.\d+)?", text)])


def hover(page, plane: str, x: float, y: float) -> tuple[np.ndarray, np.ndarray]:
    """Move the pointer to pane point (x, y); the readout's voxel index and world mm."""
    box = pane_box(page, plane)
    page.mouse.move(box["x"] + x + 3, box["y"] + y)
    page.mouse.move(box["x"] + x, box["y"] + y)
    assert page.inner_text("#ro-source") == "under the pointer"
    return numbers(page.inner_text("#ro-voxel")), numbers(page.inner_text("#ro-world"))


def slice_of(page, plane: str) -> int:
    return int(page.get_attribute(f".pane[data-plane='{plane}']", "data-slice"))


def two_frames(page) -> None:
    page.evaluate("new Promise((r) => requestAnimationFrame(() => requestAnimationFrame(r)))")


def overlay_pixels(page, plane: str, x0: int, y0: int, width: int, height: int) -> np.ndarray:
    """RGBA of a block of a pane's overlay canvas (device px = CSS px here), (h, w, 4)."""
    flat = page.evaluate(
        """([plane, x0, y0, w, h]) => {
            const c = document.querySelector(`.pane[data-plane='${plane}'] canvas.pane-overlay`);
            return Array.from(c.getContext('2d').getImageData(x0, y0, w, h).data);
        }""",
        [plane, x0, y0, width, height],
    )
    return np.array(flat, dtype=int).reshape(height, width, 4)


def drawn_grey(page, plane: str, shape, zooms) -> np.ndarray:
    """Grey level drawn at the centre of every voxel of the pane's current slice (zoom 1),
    from a viewport screenshot with the overlays hidden; rows top to bottom."""
    page.evaluate(
        "document.querySelectorAll('canvas.pane-overlay, .pane-caption')"
        ".forEach(c => c.style.visibility = 'hidden')"
    )
    two_frames(page)
    shot = np.asarray(Image.open(io.BytesIO(page.screenshot())).convert("RGB")).astype(int)
    page.evaluate(
        "document.querySelectorAll('canvas.pane-overlay, .pane-caption')"
        ".forEach(c => c.style.visibility = '')"
    )
    box = page.locator(f".pane[data-plane='{plane}'] canvas.pane-image").bounding_box()
    x0, y0 = round(box["x"]), round(box["y"])
    size = {"width": round(box["width"]), "height": round(box["height"])}
    u_axis, v_axis, _ = PLANES[plane]
    n_u, n_v = shape[u_axis], shape[v_axis]
    kx, ky, _ = view(shape, zooms, plane, size)
    left = size["width"] / 2 - n_u * kx / 2
    top = size["height"] / 2 - n_v * ky / 2
    xs = np.floor(x0 + left + (np.arange(n_u) + 0.5) * kx).astype(int)
    ys = np.floor(y0 + top + (np.arange(n_v) + 0.5) * ky).astype(int)
    drawn = shot[np.ix_(ys, xs)]
    assert np.array_equal(drawn[..., 0], drawn[..., 2])  # grey, no tint
    return drawn[..., 0]


def assert_drawn_like_numpy(page, plane, data, zooms, center, width) -> None:
    """The pane's slice against numpy's slice of the nibabel volume under the same linear
    window (common practice); 1 grey level of tolerance for exact halves (JavaScript's
    Math.round vs numpy's rint), at least 99 % exact."""
    expected = window_grey(expected_slice(data, plane, slice_of(page, plane)), center, width)
    difference = np.abs(drawn_grey(page, plane, data.shape, zooms) - expected)
    assert difference.max() <= 1, plane
    assert (difference == 0).mean() >= 0.99, plane


def window_of(page) -> tuple[float, float]:
    w = page.evaluate("cairnRead.viewer.window")
    return w["center"], w["width"]


# ---- scale bar, zoom, pan --------------------------------------------------------------------


def test_it_draws_a_scale_bar_whose_length_matches_its_label_at_every_zoom(
    page, live_server, phantom_study, canonical, cast
):
    """The bar's label is a 1-2-5 length (common practice) near a fifth of the pane width,
    and its drawn length (the distance between its end ticks, read back from the overlay
    canvas) is that many mm at the pane's mm-per-pixel: the pane's fitted scale (slice mm
    from the nibabel affine's zooms into the pane) times the zoom, at zoom 1 and after two
    1.25x zoom steps. Tolerance: 0.01 px for the stated length, 0.6 px for the pixels
    (anti-aliased tick edges)."""
    data, affine = canonical
    zooms = zooms_of(affine)
    open_as_reader_a(page, live_server, cast, phantom_study)
    box = pane_box(page, "axial")
    size = box
    for zoom in (1.0, 1.25**2):
        if zoom != 1.0:
            page.keyboard.press("+")
            page.keyboard.press("+")
            wait_js(page, f"Math.abs(cairnRead.viewer.panes.axial.zoom - {zoom}) < 1e-9")
            two_frames(page)
        kx, _, _ = view(data.shape, zooms, "axial", size, zoom)
        px_per_mm = kx / zooms[0]
        label = page.get_attribute(".pane[data-plane='axial']", "data-scale")
        mm, px = numbers(label)
        assert mm / 10 ** np.floor(np.log10(mm)) in NICE_STEPS
        assert px == pytest.approx(mm * px_per_mm, abs=0.01)
        target_mm = 0.22 * size["width"] / px_per_mm  # the page aims at 22 % of the width
        assert mm <= target_mm < 2.5 * mm  # the largest 1-2-5 step not above the target
        # Tick rows: the bar sits 14 px above the bottom, its ticks rise 4 px above it.
        row = overlay_pixels(page, "axial", 0, int(size["height"]) - 17, int(size["width"]), 1)[0]
        light = (row[:, 0] > 150) * row[:, 3]
        columns = np.nonzero(light)[0]
        left = columns[columns < 14 + px / 2]
        right = columns[(columns > 14 + px / 2) & (columns < 18 + px)]  # not the crosshair
        centroid = [float((c + 0.5) @ light[c] / light[c].sum()) for c in (left, right)]
        assert centroid[1] - centroid[0] == pytest.approx(px, abs=0.6)


def test_it_zooms_about_the_pointer_and_pans_by_the_drag(
    page, live_server, phantom_study, canonical, cast
):
    """Ctrl+wheel zooms by 1.15 per notch (our step) keeping the voxel under the pointer in
    place; Shift+drag moves the picture with the pointer. Checked through the readout of the
    voxel and world position under fixed pixels, against the fitted-pane geometry computed
    here and nibabel's apply_affine for world mm. Tolerance: 0.02 voxel (the readout shows
    two decimals)."""
    from studies.models import PlacementEvent

    data, affine = canonical
    zooms = zooms_of(affine)
    open_as_reader_a(page, live_server, cast, phantom_study)
    box = pane_box(page, "axial")
    size = box
    depth = slice_of(page, "axial")
    p = (0.42 * size["width"], 0.57 * size["height"])
    q = (p[0] + 40, p[1] + 30)

    ijk_p, world_p = hover(page, "axial", *p)
    expected_p = voxel_at(data.shape, zooms, "axial", size, *p, depth)
    assert np.allclose(ijk_p, expected_p, atol=0.02)
    assert np.allclose(world_p, apply_affine(affine, expected_p), atol=0.02 * zooms.max())

    page.keyboard.down("Control")
    page.mouse.wheel(0, -100)  # one notch towards the screen: zoom in
    page.keyboard.up("Control")
    wait_js(page, "cairnRead.viewer.panes.axial.zoom > 1")
    assert page.evaluate("cairnRead.viewer.panes.axial.zoom") == pytest.approx(1.15)
    assert slice_of(page, "axial") == depth  # zooming does not step slices
    # The slice point under p stays under p: solve for the new view centre.
    kx, ky, _ = view(data.shape, zooms, "axial", size, 1.15)
    u_axis, v_axis, _ = PLANES["axial"]
    up = data.shape[u_axis] - 1 - expected_p[u_axis]
    vp = data.shape[v_axis] - 1 - expected_p[v_axis]
    centre = (up - (p[0] - size["width"] / 2) / kx, vp - (p[1] - size["height"] / 2) / ky)
    ijk_q, world_q = hover(page, "axial", *q)
    expected_q = voxel_at(data.shape, zooms, "axial", size, *q, depth, 1.15, centre)
    assert np.allclose(ijk_q, expected_q, atol=0.02)
    assert np.allclose(world_q, apply_affine(affine, expected_q), atol=0.02 * zooms.max())
    # 40 px at 1.15 x the fitted scale is 40 / kx voxels (the zoom shrinks what a pixel spans).
    assert abs(ijk_q[0] - ijk_p[0]) == pytest.approx(40 / kx, abs=0.02)
    assert np.allclose(hover(page, "axial", *p)[0], ijk_p, atol=0.02)

    box = pane_box(page, "axial")
    moved = (q[0] + 50, q[1] - 20)
    page.keyboard.down("Shift")
    page.mouse.move(box["x"] + q[0], box["y"] + q[1])
    page.mouse.down()
    page.mouse.move(box["x"] + moved[0], box["y"] + moved[1], steps=5)
    page.mouse.up()
    page.keyboard.up("Shift")
    ijk_moved, world_moved = hover(page, "axial", *moved)
    assert np.allclose(ijk_moved, expected_q, atol=0.02)  # what was under q is now under q + d
    assert np.allclose(world_moved, world_q, atol=0.02 * zooms.max())
    assert page.evaluate("cairnRead.book.get('ORB-L')") is None  # a pan places nothing
    assert PlacementEvent.objects.filter(read=phantom_study).count() == 0


# ---- window / level --------------------------------------------------------------------------


def test_it_changes_window_and_level_by_a_right_drag(
    page, live_server, phantom_study, canonical, cast
):
    """Right-drag: rightwards widens the window, upwards raises the level, both by the
    current width / 400 per pixel (width twice as fast) (common practice: horizontal =
    width, vertical = level, sensitivity proportional to the width). The drawn axial slice
    then matches numpy's slice under the new window (see assert_drawn_like_numpy)."""
    data, affine = canonical
    zooms = zooms_of(affine)
    open_as_reader_a(page, live_server, cast, phantom_study)
    c0, w0 = window_of(page)
    box = pane_box(page, "axial")
    x, y = box["x"] + box["width"] * 0.5, box["y"] + box["height"] * 0.4
    page.mouse.move(x, y)
    page.mouse.down(button="right")
    page.mouse.move(x + 60, y - 40, steps=4)
    page.mouse.up(button="right")
    center, width = window_of(page)
    assert width == pytest.approx(w0 + 2 * 60 * w0 / 400)
    assert center == pytest.approx(c0 + 40 * w0 / 400)
    assert page.inner_text("#rd-wl") == f"C {round(center)} · W {round(width)}"
    assert page.evaluate("cairnRead.book.get('ORB-L')") is None  # a window drag places nothing
    assert_drawn_like_numpy(page, "axial", data, zooms, center, width)


def test_it_applies_a_common_ct_window_preset(page, live_server, cast, phantom_files, canonical):
    """A CT case offers the usual CT windows as centre/width in HU (common practice, from
    memory: soft tissue 40/400, brain 40/80, lung -600/1500, bone 400/1800); choosing bone
    sets exactly that window and the coronal slice is drawn like numpy's under it."""
    data, affine = canonical
    zooms = zooms_of(affine)
    read = build_phantom_study(cast, phantom_files, cast["reader_a"], modality="CT")
    log_in(page, live_server, cast["reader_a"])
    open_read(page, live_server, read)
    labels = page.locator("#rd-window option").all_inner_texts()
    for label in ("Soft tissue 40/400", "Brain 40/80", "Lung \u2212600/1500", "Bone 400/1800"):
        assert label in labels
    page.select_option("#rd-window", label="Bone 400/1800")
    wait_js(page, "cairnRead.viewer.window.width === 1800")
    assert window_of(page) == (400, 1800)
    assert_drawn_like_numpy(page, "coronal", data, zooms, 400, 1800)


def test_it_sets_an_automatic_window_from_intensity_percentiles(
    page, live_server, phantom_study, canonical, cast
):
    """For MR (no absolute scale) the automatic window spans the 1st to 99th percentile of
    the voxel values (common practice). The page takes them from an evenly strided sample
    of about 200,000 voxels in storage order (i fastest); numpy's percentile with the
    'nearest' rule on the same sample must give the same window exactly, and it must lie
    within 2 grey values of numpy's percentiles over the whole volume. The drawn sagittal
    slice then matches numpy's under that window."""
    data, affine = canonical
    zooms = zooms_of(affine)
    flat = data.ravel(order="F").astype(np.float64)
    step = max(1, flat.size // 200000)
    sample = np.sort(flat[::step][: flat.size // step])
    n = sample.size
    low, high = (float(sample[int(np.floor(q * (n - 1) + 0.5))]) for q in (0.01, 0.99))
    whole = np.percentile(data, [1, 99])
    assert abs(low - whole[0]) <= 2 and abs(high - whole[1]) <= 2

    open_as_reader_a(page, live_server, cast, phantom_study)
    assert "Bone 400/1800" not in page.locator("#rd-window option").all_inner_texts()
    page.select_option("#rd-window", label="Auto 1\u201399 %")
    wait_js(page, f"cairnRead.viewer.window.width === {high - low!r}")
    center, width = window_of(page)
    assert (center, width) == (low + (high - low) / 2, high - low)
    assert_drawn_like_numpy(page, "sagittal", data, zooms, center, width)


# ---- reset and layout ------------------------------------------------------------------------


def test_it_resets_zoom_pan_and_window_by_key_and_by_button(
    page, live_server, phantom_study, canonical, cast
):
    """After zooming two panes, panning and changing the window, R (and then the Reset
    button) brings every pane back to the fitted view and the case's suggested window: the
    voxel under a fixed pixel is again the fitted-pane one computed here."""
    data, affine = canonical
    zooms = zooms_of(affine)
    case = phantom_study.case
    open_as_reader_a(page, live_server, cast, phantom_study)
    box = pane_box(page, "axial")
    size = box
    spot = (0.3 * size["width"], 0.35 * size["height"])
    fitted = voxel_at(data.shape, zooms, "axial", size, *spot, slice_of(page, "axial"))

    for reset in ("key", "button"):
        page.focus(".pane[data-plane='axial']")
        page.keyboard.press("+")
        page.keyboard.press("o")  # the coronal pane
        page.keyboard.press("+")
        page.keyboard.press("w")  # the next window preset
        page.keyboard.down("Shift")
        page.mouse.move(box["x"] + 200, box["y"] + 200)
        page.mouse.down()
        page.mouse.move(box["x"] + 260, box["y"] + 230, steps=3)
        page.mouse.up()
        page.keyboard.up("Shift")
        zoomed = page.evaluate("['axial', 'coronal'].map(p => cairnRead.viewer.panes[p].zoom)")
        assert zoomed == [pytest.approx(1.25), pytest.approx(1.25)]
        assert window_of(page) != (case.window_center, case.window_width)
        assert not np.allclose(hover(page, "axial", *spot)[0], fitted, atol=0.02)

        if reset == "key":
            page.focus(".pane[data-plane='axial']")
            page.keyboard.press("r")
        else:
            page.click("#rd-reset")
        state = page.evaluate(
            "['axial', 'coronal', 'sagittal'].map(p => [cairnRead.viewer.panes[p].zoom, "
            "cairnRead.viewer.panes[p].centre])"
        )
        assert state == [[1, None]] * 3
        assert window_of(page) == (case.window_center, case.window_width)
        assert np.allclose(hover(page, "axial", *spot)[0], fitted, atol=0.02)


def test_it_switches_between_one_large_pane_and_three_equal_panes(
    page, live_server, phantom_study, canonical, cast
):
    """The layout button and T switch between one large pane beside two small ones and
    three equal panes; the canvases follow the new pane sizes and the slices are redrawn
    to fit them (the sagittal slice checked against numpy as above)."""
    data, affine = canonical
    zooms = zooms_of(affine)
    open_as_reader_a(page, live_server, cast, phantom_study)

    def boxes():
        return {p: pane_box(page, p) for p in ("axial", "coronal", "sagittal")}

    large = boxes()
    assert page.get_attribute("#rd-stage", "data-layout") == "focus"
    assert large["axial"]["width"] > 1.8 * large["coronal"]["width"]
    assert large["axial"]["height"] > 1.8 * large["coronal"]["height"]
    assert page.inner_text("#rd-layout") == "Three equal"

    page.click("#rd-layout")
    wait_js(page, "document.getElementById('rd-stage').dataset.layout === 'even'")
    two_frames(page)
    even = boxes()
    widths = [b["width"] for b in even.values()]
    heights = [b["height"] for b in even.values()]
    assert max(widths) - min(widths) <= 1 and max(heights) - min(heights) <= 1
    assert len({round(b["y"]) for b in even.values()}) == 1  # side by side
    assert page.inner_text("#rd-layout") == "One large"
    canvas = page.evaluate(
        "[...document.querySelectorAll('.pane')].map(p => [p.clientWidth, p.clientHeight, "
        "p.querySelector('canvas.pane-image').width, p.querySelector('canvas.pane-image').height])"
    )
    assert all(c[0] == c[2] and c[1] == c[3] for c in canvas)
    assert_drawn_like_numpy(page, "sagittal", data, zooms, *window_of(page))

    page.keyboard.press("t")
    wait_js(page, "document.getElementById('rd-stage').dataset.layout === 'focus'")
    again = boxes()
    assert again["axial"]["width"] == pytest.approx(large["axial"]["width"], abs=1)
    assert page.inner_text("#rd-layout") == "Three equal"


# ---- landmarks: jumping to a point, markers near the slice --------------------------------------


def click_at(page, plane: str, size: dict, shape, zooms, ijk) -> None:
    box = pane_box(page, plane)
    x, y = screen_at(shape, zooms, plane, size, ijk)
    page.mouse.click(box["x"] + x, box["y"] + y)


def stored_voxel(read, code: str, affine: np.ndarray) -> np.ndarray:
    """The stored world point of a landmark, as a continuous voxel index (nibabel)."""
    from studies.models import Placement

    p = Placement.objects.get(read=read, landmark__code=code)
    return apply_affine(np.linalg.inv(affine), [p.x_mm, p.y_mm, p.z_mm])


def test_it_jumps_to_a_placed_point_in_every_pane(
    page, live_server, phantom_study, canonical, cast
):
    """Clicking a placed landmark's row (and the G key) moves the crosshair to the point and
    every pane to the slice holding it (nearest slice, NIfTI voxel centres); a zoomed pane is
    centred on it. Checked against the stored world point taken back to voxels with nibabel,
    and by reading back the overlay: the marker's colour at the point in each pane and the
    crosshair line passing through it."""
    data, affine = canonical
    zooms = zooms_of(affine)
    open_as_reader_a(page, live_server, cast, phantom_study)
    box = pane_box(page, "axial")
    size = box
    click_at(page, "axial", size, data.shape, zooms, (60.3, 70.2, slice_of(page, "axial")))
    wait_js(page, "cairnRead.queue.pending.length === 0 && cairnRead.book.get('ORB-L') !== null")
    point = stored_voxel(phantom_study, "ORB-L", affine)

    for jump in ("row", "key"):
        page.focus(".pane[data-plane='axial']")
        for key in ("PageUp", "ArrowUp", "o", "PageDown", "+", "+", "+", "n", "End"):
            page.keyboard.press(key)  # away in two planes, coronal zoomed, another landmark
        assert page.evaluate("cairnRead.viewer.panes.axial.depth()") != round(point[2])
        if jump == "row":
            page.click("#lm-list .lm-row[data-index='0']")
        else:
            page.keyboard.press("p")  # back to ORB-L, then G
            page.keyboard.press("g")
        wait_js(
            page,
            f"document.querySelector(\".pane[data-plane='axial']\").dataset.slice "
            f"=== '{round(point[2])}'",
        )
        two_frames(page)
        assert np.allclose(page.evaluate("cairnRead.viewer.cursor"), point, atol=1e-6)
        for plane, (_, _, normal) in PLANES.items():
            assert slice_of(page, plane) == int(np.floor(point[normal] + 0.5)), plane
            pane = pane_box(page, plane)
            psize = pane
            zoom = page.evaluate(f"cairnRead.viewer.panes.{plane}.zoom")
            if zoom > 1:  # centred on the point
                x, y = psize["width"] / 2, psize["height"] / 2
            else:
                x, y = screen_at(data.shape, zooms, plane, psize, point)
            assert 0 <= x < psize["width"] and 0 <= y < psize["height"], plane
            centre = overlay_pixels(page, plane, int(x), int(y), 1, 1)[0, 0]
            assert np.all(np.abs(centre[:3] - ORANGE) <= 3) and centre[3] == 255, plane
            # The crosshair's vertical line (1 px, with a 10 px gap round the point).
            above = overlay_pixels(page, plane, int(np.floor(x)) - 1, int(y) - 25, 3, 1)[0]
            assert above[:, 3].max() > 0, plane
        assert page.evaluate("cairnRead.viewer.panes.coronal.zoom") > 1.9


def marker_look(block: np.ndarray) -> str:
    """'full' (filled with the marker colour), 'faint' (hollow, a thin coloured ring),
    or 'none', from an overlay block centred on the marker's position."""
    h, w, _ = block.shape
    centre = block[h // 2, w // 2]
    if centre[3] == 255 and np.all(np.abs(centre[:3] - ORANGE) <= 3):
        return "full"
    if block[..., 3].max() == 0:
        return "none"
    red, green, blue, alpha = (block[..., c] for c in range(4))
    ring = (alpha > 60) & (red > 150) & (red > green) & (green > blue)
    return "faint" if centre[3] == 0 and ring.any() else "other"


def test_it_draws_markers_full_on_their_slice_faint_within_a_few_mm_and_not_beyond(
    page, live_server, phantom_study, canonical, cast
):
    """A point placed in the coronal pane lies between axial slices (k = K + 0.3). Stepping
    the axial pane over K - 2 .. K + 2: full marker where the point is within half a voxel of
    the slice (nearest-slice rule, NIfTI voxel centres), faint within 4 mm (our reading of
    "a few mm"), nothing beyond. The distance comes from the stored point (nibabel) and the
    2.5 mm slice spacing from the affine; the look is read back from the overlay canvas."""
    data, affine = canonical
    zooms = zooms_of(affine)
    open_as_reader_a(page, live_server, cast, phantom_study)
    coronal = pane_box(page, "coronal")
    csize = coronal
    k_base = slice_of(page, "axial")
    click_at(
        page, "coronal", csize, data.shape, zooms, (55.4, slice_of(page, "coronal"), k_base + 0.3)
    )
    wait_js(page, "cairnRead.queue.pending.length === 0 && cairnRead.book.get('ORB-L') !== null")
    point = stored_voxel(phantom_study, "ORB-L", affine)
    assert point[2] - k_base == pytest.approx(0.3, abs=0.05)
    page.keyboard.press("n")  # ORB-L no longer active: its plain marker shape
    page.focus(".pane[data-plane='axial']")
    axial = pane_box(page, "axial")
    asize = axial
    x, y = screen_at(data.shape, zooms, "axial", asize, point)

    looks = {}
    for offset in (-2, -1, 0, 1, 2):
        target = k_base + offset
        steps = target - slice_of(page, "axial")
        for _ in range(abs(steps)):
            page.keyboard.press("ArrowUp" if steps > 0 else "ArrowDown")
        wait_js(
            page,
            f"document.querySelector(\".pane[data-plane='axial']\").dataset.slice === '{target}'",
        )
        two_frames(page)
        distance_vox = abs(point[2] - target)
        distance_mm = distance_vox * zooms[2]
        expected = "full" if distance_vox <= 0.5 else "faint" if distance_mm <= 4.0 else "none"
        block = overlay_pixels(page, "axial", int(x) - 7, int(y) - 7, 15, 15)
        looks[offset] = marker_look(block)
        assert looks[offset] == expected, (offset, distance_mm)
        drawn = page.evaluate("cairnRead.viewer.panes.axial.markers().map(m => [m.code, m.full])")
        assert drawn == ({"full": [["ORB-L", True]], "faint": [["ORB-L", False]]}.get(expected, []))
    assert looks == {-2: "none", -1: "faint", 0: "full", 1: "faint", 2: "none"}


# ---- loading, active time, saving through server errors --------------------------------------


def test_it_shows_the_loading_progress_up_to_the_volume_size(
    page, live_server, phantom_study, canonical, cast
):
    """With the network slowed to 1 MB/s (Chromium DevTools network emulation), the progress
    bar is visible while the full volume streams in, rises step by step, and ends at 100 %
    of the volume's size from its header (voxels x 2 bytes for int16, numpy's nbytes) before
    it hides."""
    data, _ = canonical
    log_in(page, live_server, cast["reader_a"])
    cdp = page.context.new_cdp_session(page)
    cdp.send("Network.enable")
    cdp.send(
        "Network.emulateNetworkConditions",
        {"offline": False, "latency": 0, "downloadThroughput": 1_000_000, "uploadThroughput": -1},
    )
    page.goto(f"{live_server.url}/read/{phantom_study.code}/", wait_until="commit")
    samples = []
    for _ in range(2000):
        sample = page.evaluate(
            "document.getElementById('rd-load') && "
            "[document.getElementById('rd-progress').value, "
            "document.getElementById('rd-load-text').textContent, "
            "document.getElementById('rd-load').hidden]"
        )
        if not sample:
            page.wait_for_timeout(15)
            continue
        samples.append(sample)
        if sample[2]:
            break
        page.wait_for_timeout(15)
    cdp.send(
        "Network.emulateNetworkConditions",
        {"offline": False, "latency": 0, "downloadThroughput": -1, "uploadThroughput": -1},
    )
    values = [value for value, _, hidden in samples if not hidden]
    assert samples[-1][2], "the progress bar never finished"
    assert len({v for v in values if 0 < v < 1}) >= 3  # several steps in between
    assert values == sorted(values)
    value, text, _ = samples[-1]
    assert value == 1
    assert text == f"100 % of {data.nbytes / 2**20:.0f} MiB"
    assert any("%" in t for v, t, hidden in samples if not hidden and 0 < v < 1)


def test_it_pauses_active_time_while_the_tab_is_hidden(page, live_server, phantom_study, cast):
    """Hidden tab (Page Visibility API: visibilityState 'hidden', then visibilitychange,
    emulated here): the clock stops and shows '(paused)', and the time so far is stored at
    once; visible again with input, it counts on. Tolerance: 0.1 s (the page reports tenths)."""
    from studies.models import Read

    open_as_reader_a(page, live_server, cast, phantom_study)
    box = pane_box(page, "axial")
    page.mouse.move(box["x"] + 100, box["y"] + 100)
    wait_js(page, "cairnRead.clock.total() >= 1.5", timeout=5000)
    assert "(paused)" not in page.inner_text("#rd-clock")

    page.evaluate(
        "Object.defineProperty(document, 'visibilityState', "
        "{configurable: true, get: () => 'hidden'});"
        "Object.defineProperty(document, 'hidden', {configurable: true, get: () => true});"
        "document.dispatchEvent(new Event('visibilitychange'))"
    )
    wait_js(page, "!cairnRead.clock.sending")  # the time so far goes out at once
    at_hide = page.evaluate("cairnRead.clock.total()")
    page.wait_for_timeout(2500)
    assert page.evaluate("cairnRead.clock.total()") == pytest.approx(at_hide, abs=1e-9)
    assert "(paused)" in page.inner_text("#rd-clock")
    stored = Read.objects.get(pk=phantom_study.pk).active_seconds
    assert stored == pytest.approx(at_hide, abs=0.1)

    page.evaluate(
        "delete document.visibilityState; delete document.hidden;"
        "document.dispatchEvent(new Event('visibilitychange'))"
    )
    page.mouse.move(box["x"] + 120, box["y"] + 110)
    wait_js(page, f"cairnRead.clock.total() >= {at_hide + 1.5}", timeout=5000)
    assert "(paused)" not in page.inner_text("#rd-clock")


def test_it_retries_after_server_errors_and_stores_each_event_once_in_order(
    page, live_server, phantom_study, cast
):
    """The events endpoint answers 503 three times, then lets requests through. The page
    keeps retrying the same event (same client UUID, same base version) until it is stored,
    then sends the next; the server ends with exactly the two events, once each, in the
    order they were made (the unique client_event_id makes retries idempotent)."""
    from studies.models import PlacementEvent

    log_in(page, live_server, cast["reader_a"])
    sent = []

    def unavailable_three_times(route):
        sent.append(json.loads(route.request.post_data))
        if len(sent) <= 3:
            route.fulfill(status=503, content_type="text/plain", body="busy")
        else:
            route.continue_()

    page.route(f"**/api/v1/reads/{phantom_study.code}/events/", unavailable_three_times)
    open_read(page, live_server, phantom_study)
    place_two_while_unreachable(page)
    wait_js(page, "cairnRead.queue.pending.length === 0", timeout=20000)
    wait_js(page, "document.getElementById('rd-save').dataset.state === 'saved'")

    first, second = sent[0]["client_event_id"], sent[-1]["client_event_id"]
    assert [body["client_event_id"] for body in sent] == [first] * 4 + [second]
    assert len({body["base_version"] for body in sent[:4]}) == 1
    assert sent[-1]["base_version"] == sent[0]["base_version"] + 1
    stored = list(PlacementEvent.objects.filter(read=phantom_study).order_by("read_version"))
    assert [str(e.client_event_id) for e in stored] == [first, second]
    assert [(e.landmark.code, e.kind) for e in stored] == [("ORB-L", "placed"), ("ORB-R", "placed")]
