"""Rescaling stored pixel values to real units while keeping integer types where they fit.

DICOM (RescaleSlope, RescaleIntercept) and NIfTI (scl_slope, scl_inter) both define the
real value as ``slope * stored + intercept`` (DICOM PS3.3 C.11.1.1.2; NIfTI-1 header
``scl_slope`` / ``scl_inter`` description, from memory).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

__all__ = ["apply_rescale", "rescaled_dtype"]

_INTEGER_CANDIDATES = ("uint8", "int8", "uint16", "int16", "uint32", "int32")


def _is_integer(value: float) -> bool:
    return bool(np.isfinite(value)) and float(value) == round(float(value))


def rescaled_dtype(
    raw_dtype: np.dtype,
    raw_min: float,
    raw_max: float,
    slopes: Sequence[float],
    intercepts: Sequence[float],
) -> np.dtype:
    """The smallest dtype that holds ``slope * raw + intercept`` exactly, or float32.

    Parameters
    ----------
    raw_dtype : numpy dtype
        Dtype of the stored values.
    raw_min, raw_max : float
        Range of the stored values (over all slices).
    slopes, intercepts : sequence of float
        One pair per slice (or a single pair for the whole volume).

    Returns
    -------
    numpy dtype
        The raw dtype itself when it already holds every rescaled value, else the
        smallest integer dtype that does (all slopes and intercepts integer-valued),
        else float32 (float64 kept when the raw data are float64).

    Notes
    -----
    The bounds of ``slope * raw + intercept`` over ``[raw_min, raw_max]`` are reached at
    the two ends of the range, so checking both ends for every (slope, intercept) pair
    is enough.
    """
    raw_dtype = np.dtype(raw_dtype)
    if raw_dtype.kind == "f":
        return np.dtype("float64") if raw_dtype.itemsize >= 8 else np.dtype("float32")
    pairs = list(zip(slopes, intercepts, strict=True))
    if not all(_is_integer(s) and _is_integer(b) for s, b in pairs):
        return np.dtype("float32")
    ends = [s * raw_min + b for s, b in pairs] + [s * raw_max + b for s, b in pairs]
    low, high = min(ends), max(ends)
    candidates = [raw_dtype.name, *(c for c in _INTEGER_CANDIDATES if c != raw_dtype.name)]
    for name in candidates:
        info = np.iinfo(name)
        if info.min <= low and high <= info.max and np.dtype(name).itemsize <= 4:
            return np.dtype(name).newbyteorder("=")
    return np.dtype("float32")


def apply_rescale(raw: np.ndarray, slope: float, intercept: float, dtype: np.dtype) -> np.ndarray:
    """Return ``slope * raw + intercept`` as `dtype` (in place when `raw` already has it).

    Parameters
    ----------
    raw : ndarray
        Stored values.
    slope, intercept : float
        Linear map to real units.
    dtype : numpy dtype
        Output dtype, normally from `rescaled_dtype`.

    Returns
    -------
    ndarray of `dtype`, same shape as `raw`
    """
    dtype = np.dtype(dtype)
    identity = float(slope) == 1.0 and float(intercept) == 0.0
    if dtype.kind in "iu":
        if identity:
            return raw if raw.dtype == dtype else raw.astype(dtype)
        # Wrapping (modular) integer arithmetic in the output type is exact whenever the
        # final value fits, which rescaled_dtype guarantees; so no wider temporary is needed.
        if raw.dtype.itemsize == dtype.itemsize and raw.dtype.kind in "iu" and raw.flags.writeable:
            out = raw.view(dtype)
        else:
            out = raw.astype(dtype)
        s = np.array(round(float(slope)), dtype=np.int64).astype(dtype)
        b = np.array(round(float(intercept)), dtype=np.int64).astype(dtype)
        with np.errstate(over="ignore"):
            if s != 1:
                np.multiply(out, s, out=out)
            if b != 0:
                np.add(out, b, out=out)
        return out
    out = raw.astype(dtype)
    if not identity:
        out *= dtype.type(slope)
        out += dtype.type(intercept)
    return out
