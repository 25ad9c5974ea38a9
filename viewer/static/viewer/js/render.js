// Pane pictures: nearest-voxel resampling through a window/level lookup table, at the true
// physical aspect ratio (the transform comes from coords.paneTransform).
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

const BACKGROUND = 0xff141210; // #101214, packed RGBA (little-endian)

/**
 * Voxel offsets along one screen axis: for each device pixel, the offset (in the source
 * volume's i-fastest array) of the voxel whose cell contains the pixel centre, or -1 off the
 * image. The slice coordinate of device pixel p's centre is `c0 + dc * (p + 0.5)`; the
 * screen axis runs against the voxel axis (radiological), so index = (n - 1) - coordinate.
 * A coarse volume (scale 2) holds canonical voxel 2a at index a.
 */
export function axisOffsets(out, count, c0, dc, nFine, scale, nSource, stride) {
  for (let p = 0; p < count; p += 1) {
    const c = nFine - 1 - (c0 + dc * (p + 0.5));
    if (c < -0.5 || c >= nFine - 0.5) {
      out[p] = -1;
      continue;
    }
    let a = Math.floor(c / scale + 0.5);
    if (a > nSource - 1) a = nSource - 1;
    if (a < 0) a = 0;
    out[p] = a * stride;
  }
}

/**
 * One pane's picture, resampled here (nearest voxel to each device pixel centre) straight
 * from the volume through the lookup table into the pane's ImageData. Doing the scaling
 * ourselves keeps every pixel on exactly the voxel a click there would pick.
 */
export class PaneRaster {
  constructor(ctx) {
    this.ctx = ctx;
    this.image = null;
    this.pixels = null;
    this.cols = null;
    this.rows = null;
    this.key = "";
  }

  ensure(width, height) {
    if (this.image && this.image.width === width && this.image.height === height) return;
    this.image = this.ctx.createImageData(width, height);
    this.pixels = new Uint32Array(this.image.data.buffer);
    this.cols = new Int32Array(width);
    this.rows = new Int32Array(height);
  }

  /**
   * Draw slice `depth` (canonical index) of `volume` in `plane` through transform `t`
   * (CSS px <-> slice coordinates) at device-pixel ratio `dpr`. Returns false when nothing
   * changed since the last call.
   */
  draw(volume, shape, plane, depth, window, table, t, size, dpr, key) {
    const width = Math.round(size.width * dpr);
    const height = Math.round(size.height * dpr);
    const fullKey = `${volume.scale}|${depth}|${window.center}|${window.width}|${width}x${height}|${key}`;
    if (fullKey === this.key) return false;
    this.ensure(width, height);
    const p = PLANES[plane];
    const strides = [1, volume.shape[0], volume.shape[0] * volume.shape[1]];
    const s = volume.scale;
    // The transform is linear per axis: slice coordinate = origin + device px / (dpr * k).
    const [u0, v0] = t.toSlice(0, 0);
    axisOffsets(this.cols, width, u0, 1 / (dpr * t.kx), shape[p.uAxis], s,
      volume.shape[p.uAxis], strides[p.uAxis]);
    axisOffsets(this.rows, height, v0, 1 / (dpr * t.ky), shape[p.vAxis], s,
      volume.shape[p.vAxis], strides[p.vAxis]);
    const depthSource = Math.min(volume.shape[p.normal] - 1, Math.floor(depth / s + 0.5));
    const base = depthSource * strides[p.normal];
    if (table) fillLut(this, volume.data, base, table, width, height);
    else fillArithmetic(this, volume.data, base, window, width, height);
    this.ctx.putImageData(this.image, 0, 0);
    this.key = fullKey;
    return true;
  }

  invalidate() {
    this.key = "";
  }
}

/** First and one-past-last pixel with a voxel (offsets are -1 off the image). */
function validRange(offsets) {
  let a = 0;
  let b = offsets.length;
  while (a < b && offsets[a] < 0) a += 1;
  while (b > a && offsets[b - 1] < 0) b -= 1;
  return [a, b];
}

// Rows that show the same voxel row as the row above are copied (copyWithin is native), so
// the per-pixel loop runs once per distinct voxel row, not once per screen row.
function fillLut(raster, data, base, table, width, height) {
  const { pixels, cols, rows } = raster;
  const lut = table.lut;
  const mask = table.mask;
  const [x0, x1] = validRange(cols);
  let lastRo = -2;
  let lastStart = 0;
  for (let y = 0, q = 0; y < height; y += 1, q += width) {
    const ro = rows[y];
    if (ro < 0 || x0 >= x1) {
      pixels.fill(BACKGROUND, q, q + width);
    } else if (ro === lastRo) {
      pixels.copyWithin(q, lastStart, lastStart + width);
    } else {
      const rowBase = base + ro;
      pixels.fill(BACKGROUND, q, q + x0);
      for (let x = x0, p = q + x0; x < x1; x += 1, p += 1) {
        pixels[p] = lut[data[rowBase + cols[x]] & mask];
      }
      pixels.fill(BACKGROUND, q + x1, q + width);
    }
    lastRo = ro;
    lastStart = q;
  }
}

function fillArithmetic(raster, data, base, window, width, height) {
  const { pixels, cols, rows } = raster;
  const lo = window.center - window.width / 2;
  const scale = 255 / window.width;
  const [x0, x1] = validRange(cols);
  let lastRo = -2;
  let lastStart = 0;
  for (let y = 0, q = 0; y < height; y += 1, q += width) {
    const ro = rows[y];
    if (ro < 0 || x0 >= x1) {
      pixels.fill(BACKGROUND, q, q + width);
    } else if (ro === lastRo) {
      pixels.copyWithin(q, lastStart, lastStart + width);
    } else {
      const rowBase = base + ro;
      pixels.fill(BACKGROUND, q, q + x0);
      for (let x = x0, p = q + x0; x < x1; x += 1, p += 1) {
        let g = Math.round((data[rowBase + cols[x]] - lo) * scale);
        g = g < 0 ? 0 : g > 255 ? 255 : g;
        pixels[p] = 0xff000000 | (g << 16) | (g << 8) | g;
      }
      pixels.fill(BACKGROUND, q + x1, q + width);
    }
    lastRo = ro;
    lastStart = q;
  }
}
