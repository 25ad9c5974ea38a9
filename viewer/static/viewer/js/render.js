// Slice extraction with a window/level lookup table, drawn at the true physical aspect.
//
// Grey level of a stored value v under window (centre c, width w), common practice linear
// windowing: g = clamp(round((v - (c - w / 2)) / w * 255), 0, 255). The lookup table holds
// one packed RGBA pixel per possible stored value (8- and 16-bit types); other types are
// windowed arithmetically.

import { PLANES } from "./coords.js";

/** Grey level 0..255 of value `v` under window (`center`, `width`). */
export function greyLevel(v, center, width) {
  const g = Math.round(((v - (center - width / 2)) / width) * 255);
  return g < 0 ? 0 : g > 255 ? 255 : g;
}

const LUT_KINDS = {
  int16: { size: 65536, signed: true, mask: 0xffff },
  uint16: { size: 65536, signed: false, mask: 0xffff },
  int8: { size: 256, signed: true, mask: 0xff },
  uint8: { size: 256, signed: false, mask: 0xff },
};

/** A lookup table for `dtype` and a window, or null where the type needs arithmetic. */
export function buildLut(dtype, center, width) {
  const kind = LUT_KINDS[dtype];
  if (!kind) return null;
  const lut = new Uint32Array(kind.size);
  const half = kind.size / 2;
  for (let n = 0; n < kind.size; n += 1) {
    const v = kind.signed && n >= half ? n - kind.size : n;
    const g = greyLevel(v, center, width);
    lut[n] = 0xff000000 | (g << 16) | (g << 8) | g;
  }
  return { lut, mask: kind.mask, center, width };
}

/** Start offset and steps (per u, per v) of a plane's slice `depth` in an i-fastest array. */
export function sliceWalk(plane, shape, depth) {
  const p = PLANES[plane];
  const strides = [1, shape[0], shape[0] * shape[1]];
  const base =
    (shape[p.uAxis] - 1) * strides[p.uAxis] +
    (shape[p.vAxis] - 1) * strides[p.vAxis] +
    depth * strides[p.normal];
  return {
    w: shape[p.uAxis],
    h: shape[p.vAxis],
    base,
    du: -strides[p.uAxis],
    dv: -strides[p.vAxis],
  };
}

/** Fill `pixels` (Uint32Array, w*h) with slice `depth` of `volume` in `plane`, via `table`. */
export function extractSlice(volume, plane, depth, table, pixels) {
  const walk = sliceWalk(plane, volume.shape, depth);
  const { w, h, du, dv } = walk;
  const data = volume.data;
  const lut = table.lut;
  const mask = table.mask;
  let p = 0;
  for (let v = 0; v < h; v += 1) {
    let off = walk.base + v * dv;
    for (let u = 0; u < w; u += 1) {
      pixels[p] = lut[data[off] & mask];
      p += 1;
      off += du;
    }
  }
}

/** Same as extractSlice for types without a lookup table (32-bit integers, float32). */
export function extractSliceArithmetic(volume, plane, depth, center, width, pixels) {
  const walk = sliceWalk(plane, volume.shape, depth);
  const { w, h, du, dv } = walk;
  const data = volume.data;
  const lo = center - width / 2;
  const scale = 255 / width;
  let p = 0;
  for (let v = 0; v < h; v += 1) {
    let off = walk.base + v * dv;
    for (let u = 0; u < w; u += 1) {
      let g = Math.round((data[off] - lo) * scale);
      g = g < 0 ? 0 : g > 255 ? 255 : g;
      pixels[p] = 0xff000000 | (g << 16) | (g << 8) | g;
      p += 1;
      off += du;
    }
  }
}

/**
 * One pane's slice image: an offscreen canvas the size of the slice, refilled when the
 * slice or the window changes and then scaled onto the pane by drawImage.
 */
export class SliceImage {
  constructor() {
    this.canvas = document.createElement("canvas");
    this.ctx = this.canvas.getContext("2d");
    this.image = null;
    this.pixels = null;
    this.key = "";
  }

  /** Re-extract if (volume, plane, depth, window) changed; returns true when it did. */
  update(volume, plane, depth, window, table) {
    const key = `${volume.scale}|${plane}|${depth}|${window.center}|${window.width}`;
    if (key === this.key) return false;
    const walk = sliceWalk(plane, volume.shape, depth);
    if (!this.image || this.image.width !== walk.w || this.image.height !== walk.h) {
      this.canvas.width = walk.w;
      this.canvas.height = walk.h;
      this.image = this.ctx.createImageData(walk.w, walk.h);
      this.pixels = new Uint32Array(this.image.data.buffer);
    }
    if (table) extractSlice(volume, plane, depth, table, this.pixels);
    else extractSliceArithmetic(volume, plane, depth, window.center, window.width, this.pixels);
    this.ctx.putImageData(this.image, 0, 0);
    this.key = key;
    return true;
  }

  /** Forget the drawn slice (e.g. after the volume was swapped). */
  invalidate() {
    this.key = "";
  }
}
