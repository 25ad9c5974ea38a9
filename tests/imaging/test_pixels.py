"""Rescale dtype rules (the Django-free rule is tests/unit/test_layering.py)."""

from __future__ import annotations

import numpy as np

from studies.imaging.pixels import apply_rescale, rescaled_dtype


def test_it_keeps_int16_for_a_ct_intercept_when_values_fit():
    """Source: PS3.3 C.11.1.1.2 (slope * stored + intercept); stored 0..3071 with intercept
    -1024 gives -1024..2047, which int16 holds (numpy iinfo)."""
    assert rescaled_dtype(np.dtype("uint16"), 0, 3071, [1.0], [-1024.0]) == np.int16
    out = apply_rescale(np.array([0, 3071], dtype=np.uint16), 1.0, -1024.0, np.dtype("int16"))
    np.testing.assert_array_equal(out, [-1024, 2047])


def test_it_widens_when_the_range_does_not_fit_and_floats_for_fractions():
    """Source: numpy iinfo ranges: 60000 - 1024 needs no sign but -1024 does, so int32;
    a slope of 0.5 cannot stay integer."""
    assert rescaled_dtype(np.dtype("uint16"), 0, 60000, [1.0], [-1024.0]) == np.int32
    assert rescaled_dtype(np.dtype("int16"), -5, 5, [0.5], [0.0]) == np.float32
    out = apply_rescale(np.array([[1, 2], [3, 4]], dtype=np.int16), 3.0, -2.0, np.dtype("int16"))
    np.testing.assert_array_equal(out, [[1, 4], [7, 10]])
