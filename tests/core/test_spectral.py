"""Tests of geosr.core.spectral: the cross-band guard's invariants."""

from __future__ import annotations

import numpy as np
import pytest

from geosr.core.spectral import DEFAULT_MAX_ANGLE, DEFAULT_MIN_GAIN, guard_spectra
from geosr.errors import InputError, ParameterError


def _angle(a, b):
    """Per-pixel spectral angle in degrees (Kruse et al., RSE 1993), as
    atan2(|a x b|, a . b): exact near zero, where arccos is ill-conditioned."""
    unit = b / np.linalg.norm(b, axis=0)
    along = (a * unit).sum(0)
    perp = np.linalg.norm(a - along * unit, axis=0)
    return np.degrees(np.arctan2(perp, along))


def _pair(seed=0, bands=4, shape=(17, 23), detail=30.0):
    rng = np.random.default_rng(seed)
    base = rng.uniform(5, 200, (bands,) + shape)
    return base + rng.normal(0, detail, base.shape), base


@pytest.mark.parametrize("cap", [0.0, 0.5, DEFAULT_MAX_ANGLE, 10.0])
def test_angle_to_interpolated_spectrum_never_exceeds_cap(cap):
    out, base = _pair()
    assert (_angle(out, base) > cap + 1).any()  # the input does break the cap
    res = guard_spectra(out, base, max_angle=cap)
    assert _angle(res, base).max() <= cap + 1e-6


def test_brightness_part_kept_and_floored():
    out, base = _pair(1)
    unit = base / np.linalg.norm(base, axis=0)
    along_in = ((out - base) * unit).sum(0)
    res = guard_spectra(out, base)
    along_out = ((res - base) * unit).sum(0)
    norm = np.linalg.norm(base, axis=0)
    floor = (DEFAULT_MIN_GAIN - 1) * norm
    np.testing.assert_allclose(along_out, np.maximum(along_in, floor), rtol=1e-12, atol=1e-9)
    assert (along_in < floor).any()  # the floor was exercised


def test_detail_along_the_spectrum_is_unchanged():
    # A spectrally flat detail (a brightness change only) must pass untouched.
    _, base = _pair(2)
    gain = np.random.default_rng(3).uniform(0.6, 1.8, base.shape[1:])
    out = base * gain
    np.testing.assert_allclose(guard_spectra(out, base), out, rtol=1e-12)


def test_small_perpendicular_detail_is_unchanged():
    out, base = _pair(4, detail=0.01)
    assert _angle(out, base).max() < DEFAULT_MAX_ANGLE
    np.testing.assert_array_equal(guard_spectra(out, base), out)


def test_single_band_unchanged():
    out, base = _pair(5, bands=1)
    res = guard_spectra(out, base)
    np.testing.assert_array_equal(res, out)
    assert res is not out


def test_invalid_and_zero_pixels_unchanged():
    out, base = _pair(6)
    valid = np.ones(out.shape[1:], dtype=bool)
    valid[3, 4] = False
    base[:, 5, 6] = 0.0
    out[:, 7, 8] = np.nan
    res = guard_spectra(out, base, valid)
    np.testing.assert_array_equal(res[:, 3, 4], out[:, 3, 4])
    np.testing.assert_array_equal(res[:, 5, 6], out[:, 5, 6])
    assert np.isnan(res[:, 7, 8]).all()
    assert not np.array_equal(res, out)


def test_chunked_equals_whole():
    out, base = _pair(7, shape=(40, 30))
    whole = guard_spectra(out, base)
    parts = np.empty_like(whole)
    for r in range(0, 40, 13):
        for c in range(0, 30, 7):
            sl = (slice(None), slice(r, r + 13), slice(c, c + 7))
            parts[sl] = guard_spectra(out[sl], base[sl])
    np.testing.assert_array_equal(parts, whole)


def test_float32_kept_and_input_not_modified():
    out, base = _pair(8)
    out32, base32 = out.astype(np.float32), base.astype(np.float32)
    before = out32.copy()
    res = guard_spectra(out32, base32)
    assert res.dtype == np.float32
    np.testing.assert_array_equal(out32, before)


def test_bad_arguments():
    out, base = _pair(9)
    with pytest.raises(InputError):
        guard_spectra(out, base[:, :-1])
    with pytest.raises(InputError):
        guard_spectra(out, base, np.ones((2, 2), dtype=bool))
    with pytest.raises(ParameterError):
        guard_spectra(out, base, max_angle=90)
    with pytest.raises(ParameterError):
        guard_spectra(out, base, min_gain=1.5)
