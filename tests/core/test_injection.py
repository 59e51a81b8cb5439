"""Guided baselines (high-pass injection, GSA) against their published formulas worked by hand."""

import numpy as np
import pytest
from skimage import data
from skimage.metrics import peak_signal_noise_ratio

from geosr.core.injection import GUIDED_BASELINES, component_substitution, highpass_injection
from geosr.core.resample import degrade, upscale_bicubic
from geosr.errors import InputError, ParameterError

from helpers import camera

BASELINES = [highpass_injection, component_substitution]


def _random_pair(seed=0, bands=2, h=10, w=12, s=3, guide_bands=1):
    rng = np.random.default_rng(seed)
    coarse = rng.uniform(10.0, 200.0, (bands, h, w))
    guide = rng.uniform(10.0, 200.0, (guide_bands, s * h, s * w))
    return coarse, guide[0] if guide_bands == 1 else guide


@pytest.mark.parametrize("degradation", ["bicubic", "gaussian", "area"])
def test_highpass_matches_hand_computation(degradation):
    # Aiazzi et al., PE&RS 72(5) 2006: out_b = U_b + g_b (P - P_L), with the
    # regression gain g_b = cov(U_b, P_L) / var(P_L) and P_L the guide passed
    # through the sensor's degradation (MTF-matched) and interpolated back.
    s = 3
    coarse, guide = _random_pair(s=s)
    before = (coarse.copy(), guide.copy())
    got = highpass_injection(coarse, guide, s, degradation=degradation)
    p_low = upscale_bicubic(degrade(guide, s, degradation), s)
    for b in range(coarse.shape[0]):
        u = upscale_bicubic(coarse[b], s)
        c = np.cov(u.ravel(), p_low.ravel())
        gain = c[0, 1] / c[1, 1]
        np.testing.assert_allclose(got[b], u + gain * (guide - p_low), rtol=1e-12, atol=1e-9)
    np.testing.assert_array_equal(coarse, before[0])  # inputs untouched
    np.testing.assert_array_equal(guide, before[1])


def test_highpass_recovers_the_truth_from_a_guide_carrying_its_detail():
    # A guide G = c T + d has detail c (T - U), and the regression gain is
    # cov(U, c U + d) / var(c U + d) = 1 / c, so U + (1/c)(G - G_L) = T exactly.
    s = 2
    truth = camera(64, 80)
    coarse = degrade(truth, s)
    out = highpass_injection(coarse, 2.5 * truth + 7.0, s)
    np.testing.assert_allclose(out, truth, atol=1e-8)
    assert np.abs(upscale_bicubic(coarse, s) - truth).max() > 10  # bicubic does not


def test_highpass_fits_several_guide_bands_at_the_coarse_grid():
    # X = degrade(G1) - degrade(G2) exactly, so the least-squares combination
    # fitted at the coarse grid is P = G1 - G2 = T and the truth comes back.
    s = 2
    truth = camera(64, 64)
    extra = np.random.default_rng(1).uniform(0.0, 50.0, truth.shape)
    guide = np.stack([truth + extra, extra])
    out = highpass_injection(degrade(truth, s), guide, s)
    np.testing.assert_allclose(out, truth, atol=1e-7)


@pytest.mark.parametrize("method", BASELINES)
def test_a_constant_guide_adds_nothing(method):
    s = 2
    coarse, _ = _random_pair(s=s)
    out = method(coarse, np.full((20, 24), 42.0), s)
    np.testing.assert_allclose(out, upscale_bicubic(coarse, s), rtol=0, atol=1e-9)


def test_component_substitution_matches_hand_computation():
    # Aiazzi, Baronti & Selva, IEEE TGRS 45(10) 2007 (GSA): I = sum a_b U_b + a_0
    # regressed on the degraded guide P_L; P equalised to I by mean and std;
    # g_b = cov(U_b, I) / var(I); out_b = U_b + g_b (P_eq - I).
    s = 2
    coarse, guide = _random_pair(seed=3, bands=3, s=s, guide_bands=2)
    got = component_substitution(coarse, guide, s)
    pan = guide.mean(axis=0)
    p_low = upscale_bicubic(degrade(pan, s), s)
    u = upscale_bicubic(coarse, s)
    design = np.column_stack([u[b].ravel() for b in range(3)] + [np.ones(pan.size)])
    coef = np.linalg.lstsq(design, p_low.ravel(), rcond=None)[0]
    inten = (design @ coef).reshape(pan.shape)
    pan_eq = (pan - pan.mean()) * inten.std() / pan.std() + inten.mean()
    for b in range(3):
        c = np.cov(u[b].ravel(), inten.ravel())
        np.testing.assert_allclose(got[b], u[b] + c[0, 1] / c[1, 1] * (pan_eq - inten),
                                   rtol=1e-10, atol=1e-8)


@pytest.mark.parametrize("method, least_gain", [
    # Measured +11.71 dB (high-pass) and +11.13 dB (GSA) over bicubic's 30.23 dB;
    # the bounds sit 0.3 dB below. The guide is an exact combination of the
    # bands, the optimistic set-up of the protocol.
    (highpass_injection, 11.4),
    (component_substitution, 10.8),
])
def test_astronaut_beats_bicubic_under_walds_protocol(method, least_gain):
    # Wald's protocol: degrade the RGB photo by 2, guide = mean of the full-res
    # bands, compare with the full-res photo (skimage's PSNR).
    truth = np.moveaxis(data.astronaut().astype(np.float64), -1, 0)
    coarse = degrade(truth, 2)
    guide = truth.mean(axis=0)
    out = method(coarse, guide, 2)
    base = peak_signal_noise_ratio(truth, upscale_bicubic(coarse, 2), data_range=255)
    gain = peak_signal_noise_ratio(truth, out, data_range=255) - base
    assert gain > least_gain


@pytest.mark.parametrize("method", BASELINES)
def test_float32_stays_float32_and_agrees_with_float64(method):
    coarse, guide = _random_pair(seed=5, s=2)
    out32 = method(coarse.astype(np.float32), guide.astype(np.float32), 2)
    assert out32.dtype == np.float32
    np.testing.assert_allclose(out32, method(coarse, guide, 2), rtol=1e-4, atol=1e-3)
    assert method(coarse[0], guide, 2).shape == (20, 24)


@pytest.mark.parametrize("method", BASELINES)
def test_invalid_values_are_never_read(method):
    s = 2
    truth = camera(48, 48)
    coarse = np.stack([degrade(truth, s), degrade(truth[::-1], s)])
    guide = truth.copy()
    valid = np.ones((24, 24), dtype=bool)
    valid[5:9, 3:7] = False
    gvalid = np.ones((48, 48), dtype=bool)
    gvalid[30:40, 20:28] = False
    outs = []
    for fill in (np.nan, 1e6):
        c = coarse.copy()
        g = guide.copy()
        c[:, ~valid] = fill
        g[~gvalid] = fill
        outs.append(method(c, g, s, valid=valid, guide_valid=gvalid))
    out_valid = np.repeat(np.repeat(valid, s, 0), s, 1)
    assert np.isfinite(outs[0][:, out_valid]).all()
    np.testing.assert_array_equal(outs[0][:, out_valid], outs[1][:, out_valid])
    # No guide: no detail, the bicubic interpolation (coarse valid around there).
    np.testing.assert_allclose(outs[0][:, ~gvalid], upscale_bicubic(coarse, s)[:, ~gvalid], atol=1e-9)


@pytest.mark.parametrize("method", BASELINES)
def test_bad_input_gets_one_line_errors(method):
    coarse, guide = _random_pair(s=2)
    with pytest.raises(InputError, match="grid 2 times finer"):
        method(coarse, guide[:-1], 2)
    with pytest.raises(ParameterError, match="'scale'"):
        method(coarse, guide, 9)
    with pytest.raises(ParameterError, match="degradation"):
        method(coarse, guide, 2, degradation="lanczos")
    bad = coarse.copy()
    bad[0, 1, 1] = np.nan
    with pytest.raises(InputError, match="finite"):
        method(bad, guide, 2)
    with pytest.raises(InputError, match="'valid'"):
        method(coarse, guide, 2, valid=np.ones((3, 3), dtype=bool))


def test_the_baselines_are_registered_by_name():
    assert GUIDED_BASELINES == {"highpass": highpass_injection, "substitution": component_substitution}
