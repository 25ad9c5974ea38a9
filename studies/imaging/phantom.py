"""Synthetic head phantoms with known landmark positions, for the demo and the tests.

An invented object, not an anatomical model: an ellipsoidal shell around a softer core,
two dark ventricle-like ellipsoids, two round "orbs" and four small bright beads. The
landmarks are the centres of the orbs and beads, so their true world position is known
exactly. Each case gets its own size, pose, voxel grid and storage orientation.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from .volume import Volume

__all__ = ["PHANTOM_LANDMARKS", "Phantom", "make_phantom"]


@dataclass(frozen=True)
class PhantomLandmark:
    code: str
    name: str
    description: str
    head_mm: tuple[float, float, float]
    radius_mm: float
    intensity: float
    may_be_absent: bool = False


# Positions in the phantom's own frame (mm, +x right, +y anterior, +z superior).
PHANTOM_LANDMARKS = (
    PhantomLandmark(
        "ORB-L",
        "Left orb centre",
        "Centre of the round grey body at the front left.",
        (-30.0, 58.0, -12.0),
        10.0,
        260.0,
    ),
    PhantomLandmark(
        "ORB-R",
        "Right orb centre",
        "Centre of the round grey body at the front right.",
        (30.0, 58.0, -12.0),
        10.0,
        260.0,
    ),
    PhantomLandmark(
        "BEAD-M",
        "Midline bead",
        "Small bright bead between the two dark ventricles.",
        (0.0, 4.0, 18.0),
        3.0,
        1250.0,
    ),
    PhantomLandmark(
        "BEAD-P",
        "Posterior bead",
        "Small bright bead low at the back of the core.",
        (0.0, -52.0, -26.0),
        3.0,
        1150.0,
    ),
    PhantomLandmark(
        "KNOB-V",
        "Vertex knob",
        "Bright knob on the inner face of the shell at the top.",
        (0.0, -6.0, 62.0),
        3.5,
        1100.0,
    ),
    PhantomLandmark(
        "BEAD-X",
        "Accessory bead",
        "Small bright bead to the right of the midline, above the ventricles; "
        "absent in some cases: mark it not visible then.",
        (22.0, -18.0, 34.0),
        2.5,
        1350.0,
        may_be_absent=True,
    ),
)

_SHELL = np.array([68.0, 86.0, 74.0])  # outer semi-axes, mm
_SHELL_THICKNESS = 6.0


@dataclass
class Phantom:
    """A generated case: the volume plus the true landmark positions (world mm, RAS+)."""

    volume: Volume
    truth_mm: dict[str, np.ndarray]
    present: dict[str, bool]


def _rotation(rng: np.random.Generator, max_deg: float) -> np.ndarray:
    angles = np.deg2rad(rng.uniform(-max_deg, max_deg, size=3))
    cx, cy, cz = np.cos(angles)
    sx, sy, sz = np.sin(angles)
    rx = np.array([[1, 0, 0], [0, cx, -sx], [0, sx, cx]])
    ry = np.array([[cy, 0, sy], [0, 1, 0], [-sy, 0, cy]])
    rz = np.array([[cz, -sz, 0], [sz, cz, 0], [0, 0, 1]])
    return rz @ ry @ rx


def _grid_affine(
    spacing: np.ndarray, shape: np.ndarray, flips: np.ndarray, oblique_deg: float
) -> np.ndarray:
    """A voxel grid centred on the world origin, optionally stored flipped or tilted."""
    c, s = np.cos(np.deg2rad(oblique_deg)), np.sin(np.deg2rad(oblique_deg))
    tilt = np.array([[c, -s, 0.0], [s, c, 0.0], [0.0, 0.0, 1.0]])
    linear = tilt @ np.diag(spacing * flips)
    affine = np.eye(4)
    affine[:3, :3] = linear
    affine[:3, 3] = -linear @ ((shape - 1) / 2.0)
    return affine


def _head_coords(
    affine: np.ndarray, shape: tuple[int, ...], rotation, scale, shift, origin=(0, 0, 0)
) -> list[np.ndarray]:
    """Phantom-frame coordinates (x, y, z arrays) of the voxel centres of a block of the grid."""
    axes = [np.arange(o, o + n, dtype=np.float32) for o, n in zip(origin, shape, strict=True)]
    linear = (rotation.T @ affine[:3, :3] / scale).astype(np.float32)
    offset = (rotation.T @ (affine[:3, 3] - shift) / scale).astype(np.float32)
    i, j, k = np.meshgrid(*axes, indexing="ij", sparse=True)
    return [
        linear[row, 0] * i + linear[row, 1] * j + linear[row, 2] * k + offset[row]
        for row in range(3)
    ]


def _ellipsoid(head: list[np.ndarray], centre, semi_axes) -> np.ndarray:
    total = np.zeros(np.broadcast_shapes(*(h.shape for h in head)), dtype=np.float32)
    for h, c, a in zip(head, centre, semi_axes, strict=True):
        total += ((h - np.float32(c)) / np.float32(a)) ** 2
    return total <= 1.0


def _paint_sphere(image, affine, rotation, scale, shift, centre_world, landmark) -> None:
    """Paint a small sphere, working only on the block of voxels around it."""
    centre_vox = np.linalg.solve(affine[:3, :3], centre_world - affine[:3, 3])
    half = landmark.radius_mm * scale / np.sqrt((affine[:3, :3] ** 2).sum(0)) + 2.0
    low = np.maximum(np.floor(centre_vox - half).astype(int), 0)
    high = np.minimum(np.ceil(centre_vox + half).astype(int) + 1, image.shape)
    block = tuple(slice(lo, hi) for lo, hi in zip(low, high, strict=True))
    head = _head_coords(affine, tuple(high - low), rotation, scale, shift, origin=tuple(low))
    r = landmark.radius_mm
    image[block][_ellipsoid(head, landmark.head_mm, (r, r, r))] = landmark.intensity


def make_phantom(
    seed: int,
    *,
    spacing_mm: tuple[float, float, float] = (1.5, 1.5, 1.5),
    flips: tuple[int, int, int] = (1, 1, 1),
    oblique_deg: float = 0.0,
    accessory_present: bool = True,
    noise_sd: float = 20.0,
) -> Phantom:
    """Generate one phantom case.

    Parameters
    ----------
    seed : int
        Seeds size, pose and noise: the same seed gives the same voxels.
    spacing_mm : tuple of 3 float
        Voxel size along the stored array axes.
    flips : tuple of 3 int (+1 or -1)
        Storage orientation (e.g. (-1, 1, 1) stores the first axis right-to-left).
    oblique_deg : float
        Tilt of the voxel grid about the superior axis (an oblique affine).
    accessory_present : bool
        Whether the may-be-absent accessory bead exists in this case.
    noise_sd : float
        Standard deviation of the added Gaussian noise.
    """
    rng = np.random.default_rng(seed)
    rotation = _rotation(rng, 8.0)
    scale = float(rng.uniform(0.92, 1.08))
    shift = rng.uniform(-8.0, 8.0, size=3)
    spacing = np.asarray(spacing_mm, dtype=float)
    extent = 2.0 * _SHELL * 1.08 * scale + 24.0
    shape = tuple(int(n) for n in np.ceil(extent / spacing))
    affine = _grid_affine(spacing, np.asarray(shape, float), np.asarray(flips, float), oblique_deg)
    head = _head_coords(affine, shape, rotation, scale, shift)

    image = np.zeros(shape, dtype=np.float32)
    image[_ellipsoid(head, (0, 0, 0), _SHELL)] = 900.0
    image[_ellipsoid(head, (0, 0, 0), _SHELL - _SHELL_THICKNESS)] = 420.0
    for side in (-1.0, 1.0):
        image[_ellipsoid(head, (side * 9.0, 2.0, 14.0), (6.0, 22.0, 9.0))] = 140.0
    truth, present = {}, {}
    for landmark in PHANTOM_LANDMARKS:
        exists = accessory_present or not landmark.may_be_absent
        present[landmark.code] = exists
        world = rotation @ (scale * np.asarray(landmark.head_mm)) + shift
        truth[landmark.code] = world if exists else np.full(3, np.nan)
        if exists:
            _paint_sphere(image, affine, rotation, scale, shift, world, landmark)
    image = ndimage.gaussian_filter(image, sigma=0.6)
    image += rng.normal(0.0, noise_sd, size=shape).astype(np.float32)
    data = np.clip(np.rint(image), -32768, 32767).astype(np.int16)
    volume = Volume(
        data=data,
        affine=affine,
        modality="MR",
        provenance={"source": "synthetic phantom", "seed": seed},
    )
    return Phantom(volume=volume, truth_mm=truth, present=present)
