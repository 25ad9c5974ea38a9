// Voxel <-> world conversions and the geometry of the three planes: pure functions, no DOM.
//
// World coordinates are millimetres in the RAS+ frame (NIfTI convention: +x right,
// +y anterior, +z superior). Voxel indices are continuous: an integer is a voxel centre,
// voxel i covers [i - 0.5, i + 0.5]. The volume arrives in closest-canonical order, so voxel
// axis i runs roughly towards R, j towards A and k towards S; world positions always go
// through the full affine, so an oblique grid stays exact.

/** Multiply a 4x4 affine (array of rows) by [i, j, k, 1]; returns [x, y, z]. */
export function voxelToWorld(affine, ijk) {
  const out = [0, 0, 0];
  for (let r = 0; r < 3; r += 1) {
    const row = affine[r];
    out[r] = row[0] * ijk[0] + row[1] * ijk[1] + row[2] * ijk[2] + row[3];
  }
  return out;
}

/** Inverse of a 4x4 affine with bottom row (0, 0, 0, 1); throws on a singular matrix. */
export function invertAffine(affine) {
  const [a, b, c] = affine[0];
  const [d, e, f] = affine[1];
  const [g, h, i] = affine[2];
  const det = a * (e * i - f * h) - b * (d * i - f * g) + c * (d * h - e * g);
  if (!Number.isFinite(det) || Math.abs(det) < 1e-12) {
    throw new RangeError(`affine is singular: ${JSON.stringify(affine)}`);
  }
  const m = [
    [(e * i - f * h) / det, (c * h - b * i) / det, (b * f - c * e) / det],
    [(f * g - d * i) / det, (a * i - c * g) / det, (c * d - a * f) / det],
    [(d * h - e * g) / det, (b * g - a * h) / det, (a * e - b * d) / det],
  ];
  const t = [affine[0][3], affine[1][3], affine[2][3]];
  const rows = m.map((row) => [...row, -(row[0] * t[0] + row[1] * t[1] + row[2] * t[2])]);
  rows.push([0, 0, 0, 1]);
  return rows;
}

/** Continuous voxel index of a world point, given the inverse affine. */
export function worldToVoxel(inverse, xyz) {
  return voxelToWorld(inverse, xyz);
}

/** Voxel size along each voxel axis (length of the affine's columns), mm. */
export function spacingOf(affine) {
  return [0, 1, 2].map((c) => Math.hypot(affine[0][c], affine[1][c], affine[2][c]));
}

/** Largest angle (degrees) between a voxel axis and its closest world axis. */
export function obliqueDegrees(affine) {
  let worst = 0;
  const spacing = spacingOf(affine);
  for (let c = 0; c < 3; c += 1) {
    const comps = [0, 1, 2].map((r) => Math.abs(affine[r][c]) / spacing[c]);
    const cos = Math.min(1, Math.max(...comps));
    worst = Math.max(worst, (Math.acos(cos) * 180) / Math.PI);
  }
  return worst;
}

const LETTERS = [
  ["L", "R"],
  ["P", "A"],
  ["I", "S"],
];

/** Orientation letter(s) for a world direction: dominant axis first, a second when strong. */
export function directionLetters(vec) {
  const norm = Math.hypot(vec[0], vec[1], vec[2]) || 1;
  const parts = [0, 1, 2]
    .map((axis) => ({ axis, value: vec[axis] / norm }))
    .sort((p, q) => Math.abs(q.value) - Math.abs(p.value));
  let text = LETTERS[parts[0].axis][parts[0].value > 0 ? 1 : 0];
  if (Math.abs(parts[1].value) > 0.3) text += LETTERS[parts[1].axis][parts[1].value > 0 ? 1 : 0];
  return text;
}

// Each plane shows two voxel axes on screen. `u` runs left to right, `v` top to bottom, and
// both are flipped so that the display is radiological: patient right on the screen's left,
// anterior (axial) or superior (coronal, sagittal) at the top, anterior at the left in sagittal.
export const PLANES = {
  axial: { name: "Axial", normal: 2, uAxis: 0, vAxis: 1 },
  coronal: { name: "Coronal", normal: 1, uAxis: 0, vAxis: 2 },
  sagittal: { name: "Sagittal", normal: 0, uAxis: 1, vAxis: 2 },
};

/** Slice coordinates (u, v) of a continuous voxel index in a plane of a volume of `shape`. */
export function voxelToSlice(plane, shape, ijk) {
  const p = PLANES[plane];
  return [shape[p.uAxis] - 1 - ijk[p.uAxis], shape[p.vAxis] - 1 - ijk[p.vAxis]];
}

/** Continuous voxel index of slice coordinates (u, v) on the slice at `depth` (normal axis). */
export function sliceToVoxel(plane, shape, u, v, depth) {
  const p = PLANES[plane];
  const ijk = [0, 0, 0];
  ijk[p.uAxis] = shape[p.uAxis] - 1 - u;
  ijk[p.vAxis] = shape[p.vAxis] - 1 - v;
  ijk[p.normal] = depth;
  return ijk;
}

/** Orientation letters at the four edges of a plane: {left, right, top, bottom}. */
export function planeLetters(plane, affine) {
  const p = PLANES[plane];
  const column = (c) => [affine[0][c], affine[1][c], affine[2][c]];
  // Screen +x runs along -uAxis, screen +y (down) along -vAxis.
  const right = column(p.uAxis).map((x) => -x);
  const down = column(p.vAxis).map((x) => -x);
  return {
    right: directionLetters(right),
    left: directionLetters(right.map((x) => -x)),
    bottom: directionLetters(down),
    top: directionLetters(down.map((x) => -x)),
  };
}

/**
 * Where a pane draws a slice: CSS px per mm and the view centre in slice coordinates.
 * The slice (w x h voxels of su x sv mm) is fitted to the pane at its true physical aspect,
 * then zoomed; `centre` is the slice coordinate shown at the pane's centre.
 */
export function paneTransform(pane, w, h, su, sv, zoom, centre) {
  const fit = Math.min(pane.width / (w * su), pane.height / (h * sv));
  const pxPerMm = fit * zoom;
  const kx = su * pxPerMm; // CSS px per voxel along u
  const ky = sv * pxPerMm;
  return {
    kx,
    ky,
    pxPerMm,
    toScreen: (u, v) => [pane.width / 2 + (u - centre[0]) * kx, pane.height / 2 + (v - centre[1]) * ky],
    toSlice: (x, y) => [centre[0] + (x - pane.width / 2) / kx, centre[1] + (y - pane.height / 2) / ky],
  };
}

/** A "nice" scale-bar length (1, 2 or 5 times a power of ten mm) near `targetMm`. */
export function niceLength(targetMm) {
  const power = 10 ** Math.floor(Math.log10(Math.max(targetMm, 1e-6)));
  const steps = [1, 2, 5, 10];
  let best = power;
  for (const s of steps) if (s * power <= targetMm) best = s * power;
  return best;
}

/** A random version-4 UUID (works outside secure contexts too). */
export function uuid4() {
  const b = new Uint8Array(16);
  crypto.getRandomValues(b);
  b[6] = (b[6] & 0x0f) | 0x40;
  b[8] = (b[8] & 0x3f) | 0x80;
  const hex = [...b].map((x) => x.toString(16).padStart(2, "0")).join("");
  return `${hex.slice(0, 8)}-${hex.slice(8, 12)}-${hex.slice(12, 16)}-${hex.slice(16, 20)}-${hex.slice(20)}`;
}
