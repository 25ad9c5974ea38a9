// Loading the voxels: one raw little-endian body, i fastest, streamed into a buffer
// preallocated from the header's decoded size (the browser undoes Content-Encoding itself,
// so Content-Length would count compressed bytes: progress uses the header instead).

const TYPED = {
  int8: Int8Array,
  uint8: Uint8Array,
  int16: Int16Array,
  uint16: Uint16Array,
  int32: Int32Array,
  uint32: Uint32Array,
  float32: Float32Array,
};

export class VolumeError extends Error {}

/** The typed-array constructor for a header dtype; throws VolumeError on an unknown one. */
export function typedArrayFor(dtype) {
  const Ctor = TYPED[dtype];
  if (!Ctor) throw new VolumeError(`unsupported voxel type ${JSON.stringify(dtype)}`);
  return Ctor;
}

/**
 * Fetch `url` into a new typed array of `count` voxels of `dtype`.
 * `onProgress(received, total)` is called per chunk (callers throttle their own drawing);
 * `onSlab(received)` lets the caller use the part already in.
 */
export async function fetchVoxels(url, dtype, count, { onProgress, signal } = {}) {
  const Ctor = typedArrayFor(dtype);
  const total = count * Ctor.BYTES_PER_ELEMENT;
  const response = await fetch(url, { credentials: "same-origin", signal, cache: "default" });
  if (!response.ok) {
    throw new VolumeError(`the volume could not be loaded (HTTP ${response.status})`);
  }
  const bytes = new Uint8Array(total);
  let offset = 0;
  if (response.body && response.body.getReader) {
    const reader = response.body.getReader();
    for (;;) {
      const { done, value } = await reader.read();
      if (done) break;
      if (offset + value.byteLength > total) {
        reader.cancel();
        throw new VolumeError(`the volume is larger than its header says (${total} bytes)`);
      }
      bytes.set(value, offset);
      offset += value.byteLength;
      if (onProgress) onProgress(offset, total);
    }
  } else {
    const whole = new Uint8Array(await response.arrayBuffer());
    if (whole.byteLength > total) throw new VolumeError("the volume is larger than its header says");
    bytes.set(whole);
    offset = whole.byteLength;
    if (onProgress) onProgress(offset, total);
  }
  if (offset !== total) {
    throw new VolumeError(`the volume arrived incomplete: ${offset} of ${total} bytes`);
  }
  return new Ctor(bytes.buffer);
}

/** A volume in memory: voxels plus shape; `scale` maps its index to the canonical grid. */
export class Volume {
  constructor(data, shape, scale = 1) {
    this.data = data;
    this.shape = shape;
    this.scale = scale;
    this.strideJ = shape[0];
    this.strideK = shape[0] * shape[1];
  }

  /** Value of the voxel nearest to canonical continuous index `ijk`, or null outside. */
  valueAt(ijk) {
    const idx = [0, 1, 2].map((a) => Math.round(ijk[a] / this.scale));
    for (let a = 0; a < 3; a += 1) if (idx[a] < 0 || idx[a] >= this.shape[a]) return null;
    return this.data[idx[0] + idx[1] * this.strideJ + idx[2] * this.strideK];
  }
}

/**
 * Percentile window (centre, width) from a strided sample of about 200k voxels;
 * the range between the `lowPct` and `highPct` percentiles (common practice for MR and
 * ultrasound, which have no absolute intensity scale).
 */
export function percentileWindow(data, lowPct = 1, highPct = 99) {
  const step = Math.max(1, Math.floor(data.length / 200000));
  const n = Math.floor(data.length / step);
  const sample = new Float64Array(n);
  for (let s = 0, p = 0; s < n; s += 1, p += step) sample[s] = data[p];
  sample.sort();
  const at = (pct) => sample[Math.min(n - 1, Math.max(0, Math.round((pct / 100) * (n - 1))))];
  const low = at(lowPct);
  const high = at(highPct);
  const width = Math.max(high - low, 1);
  return { center: low + width / 2, width };
}
