"""Quality metrics against scikit-image, published formulas worked by hand, and their limits."""

import math

import numpy as np
import pytest
from scipy import ndimage
from skimage import data
from skimage.metrics import peak_signal_noise_ratio, structural_similarity

from geosr.core.metrics import (
    consistency_error,
    ergas,
    psnr,
    q_index,
    sam,
    sam_map,
    ssim,
)
from geosr.core.resample import degrade
from geosr.errors import InputError, ParameterError


def _sk_ssim(x, y, data_range, **kw):
    # scikit-image's documented settings that match Wang et al. (IEEE TIP 2004).
    return structural_similarity(
        x, y, data_range=data_range, gaussian_weights=True, sigma=1.5,
        use_sample_covariance=False, **kw,
    )


def _camera_noisy(seed=0):
    """scikit-image's bundled camera photo (uint8) and a noisy uint8 copy."""
    ref = data.camera()
    noise = np.random.default_rng(seed).normal(0.0, 12.0, ref.shape)
    est = np.clip(np.round(ref + noise), 0, 255).astype(np.uint8)
    return ref, est


def _astronaut_blurred():
    """scikit-image's bundled astronaut photo as 3 bands and a blurred copy (float64)."""
    ref = data.astronaut().transpose(2, 0, 1).astype(np.float64)
    est = ndimage.gaussian_filter(ref, sigma=(0, 1.3, 1.3))
    return ref, est


def _random_pair(shape, seed=1):
    rng = np.random.default_rng(seed)
    ref = rng.random(shape)
    return ref, ref + 0.1 * rng.standard_normal(shape)


# --------------------------------------------------------------------------- PSNR


def test_psnr_matches_skimage_on_random_images():
    ref, est = _random_pair((3, 40, 37))
    # skimage.metrics.peak_signal_noise_ratio (reference library), explicit data_range.
    for b in range(3):
        assert psnr(ref, est, data_range=1.0, per_band=True)[b] == pytest.approx(
            peak_signal_noise_ratio(ref[b], est[b], data_range=1.0), abs=1e-6
        )
    # On the whole 3-D stack skimage pools the MSE over all bands, our overall value.
    assert psnr(ref, est, data_range=1.0) == pytest.approx(
        peak_signal_noise_ratio(ref, est, data_range=1.0), abs=1e-6
    )


def test_psnr_matches_skimage_on_camera_photo():
    ref, est = _camera_noisy()
    # skimage.metrics.peak_signal_noise_ratio on scikit-image's camera photo.
    assert psnr(ref, est, data_range=255) == pytest.approx(
        peak_signal_noise_ratio(ref, est, data_range=255), abs=1e-6
    )
    # Our default peak is the reference's max - min (not skimage's dtype range),
    # so mirror it explicitly on the skimage side.
    span = float(ref.max()) - float(ref.min())
    assert psnr(ref, est) == pytest.approx(
        peak_signal_noise_ratio(ref, est, data_range=span), abs=1e-6
    )


def test_psnr_matches_skimage_on_astronaut_channels():
    ref, est = _astronaut_blurred()
    # skimage.metrics.peak_signal_noise_ratio per channel of scikit-image's astronaut photo.
    expected = [peak_signal_noise_ratio(ref[b], est[b], data_range=255) for b in range(3)]
    np.testing.assert_allclose(psnr(ref, est, data_range=255, per_band=True), expected, atol=1e-6)


def test_psnr_with_mask_matches_skimage_on_selected_pixels():
    ref, est = _astronaut_blurred()
    valid = np.ones(ref.shape[1:], dtype=bool)
    valid[100:300, 50:120] = False
    # skimage.metrics.peak_signal_noise_ratio on the valid pixels only.
    assert psnr(ref, est, data_range=255, valid=valid) == pytest.approx(
        peak_signal_noise_ratio(ref[:, valid], est[:, valid], data_range=255), abs=1e-6
    )


# --------------------------------------------------------------------------- SSIM


def test_ssim_matches_skimage_on_random_images():
    ref, est = _random_pair((2, 40, 37), seed=3)
    # skimage.metrics.structural_similarity (reference library), Wang et al. settings.
    for b in range(2):
        assert ssim(ref, est, data_range=1.0, per_band=True)[b] == pytest.approx(
            _sk_ssim(ref[b], est[b], 1.0), abs=1e-6
        )


def test_ssim_matches_skimage_on_camera_photo():
    ref, est = _camera_noisy(seed=5)
    # skimage.metrics.structural_similarity on scikit-image's camera photo (uint8 inputs).
    assert ssim(ref, est, data_range=255) == pytest.approx(_sk_ssim(ref, est, 255), abs=1e-6)
    span = float(ref.max()) - float(ref.min())  # our default peak, mirrored on skimage's side
    assert ssim(ref, est) == pytest.approx(_sk_ssim(ref, est, span), abs=1e-6)


def test_ssim_matches_skimage_on_astronaut_channels():
    ref, est = _astronaut_blurred()
    # skimage.metrics.structural_similarity per channel and with channel_axis (it
    # averages the channels, our overall value) on scikit-image's astronaut photo.
    expected = [_sk_ssim(ref[b], est[b], 255) for b in range(3)]
    np.testing.assert_allclose(ssim(ref, est, data_range=255, per_band=True), expected, atol=1e-6)
    assert ssim(ref, est, data_range=255) == pytest.approx(
        _sk_ssim(ref, est, 255, channel_axis=0), abs=1e-6
    )


def test_ssim_with_mask_averages_skimage_map_over_wholly_valid_windows():
    ref, est = _camera_noisy(seed=7)
    ref, est = ref[100:180, 200:290], est[100:180, 200:290]
    valid = np.ones(ref.shape, dtype=bool)
    valid[30:36, 40:47] = False
    valid[0:3, :] = False
    # skimage's full SSIM map (reference library), averaged over pixels whose
    # 11 x 11 window holds only valid pixels; windows found with
    # scipy.ndimage.binary_erosion (border_value=0 also drops the 5-pixel border crop).
    _, smap = _sk_ssim(ref, est, 255, full=True)
    use = ndimage.binary_erosion(valid, structure=np.ones((11, 11), bool), border_value=0)
    assert ssim(ref, est, data_range=255, valid=valid) == pytest.approx(
        smap[use].mean(), abs=1e-6
    )


# --------------------------------------------------------------------------- ERGAS


def test_ergas_worked_example():
    # Wald (2002): ERGAS = 100 (h/l) sqrt(mean_k RMSE_k^2 / mu_k^2), h/l = 1/scale.
    # Band 1: ref [[1,2],[3,4]], mu = 2.5; est [[1,2],[3,6]], errors 0,0,0,2,
    #   MSE = 4/4 = 1, term = 1 / 6.25 = 0.16.
    # Band 2: ref all 10, mu = 10; est [[11,9],[11,9]], errors +-1, MSE = 1,
    #   term = 1 / 100 = 0.01.
    # scale 2: ERGAS = 50 * sqrt((0.16 + 0.01) / 2) = 50 * sqrt(0.085) = 14.577379737113251.
    # Band terms: 50 * sqrt(0.16) = 20, 50 * sqrt(0.01) = 5.
    ref = np.array([[[1, 2], [3, 4]], [[10, 10], [10, 10]]], dtype=float)
    est = np.array([[[1, 2], [3, 6]], [[11, 9], [11, 9]]], dtype=float)
    assert ergas(ref, est, 2) == pytest.approx(50 * math.sqrt(0.085), rel=1e-12)
    assert ergas(ref, est, 2) == pytest.approx(14.577379737113251, rel=1e-12)
    np.testing.assert_allclose(ergas(ref, est, 2, per_band=True), [20.0, 5.0], rtol=1e-12)
    # h/l = 1/scale: at scale 4 the same errors give half the value.
    assert ergas(ref, est, 4) == pytest.approx(ergas(ref, est, 2) / 2, rel=1e-12)


def test_ergas_is_relative_to_the_band_mean():
    # Property of the formula: RMSE_k / mu_k does not change when both images
    # are multiplied by the same c > 0.
    ref, est = _astronaut_blurred()
    ref, est = ref + 1.0, est + 1.0
    assert ergas(7.5 * ref, 7.5 * est, 3) == pytest.approx(ergas(ref, est, 3), rel=1e-10)


# --------------------------------------------------------------------------- SAM


def test_sam_worked_example():
    # Kruse et al. (1993): angle = arccos(<r,e> / (|r||e|)), 2 bands x 2 x 2 pixels.
    #   pixel (0,0): r = (1,0), e = (0,1): <r,e> = 0            -> 90 degrees
    #   pixel (0,1): r = (1,1), e = (1,0): 1 / sqrt(2)          -> 45 degrees
    #   pixel (1,0): r = (3,4), e = (4,3): 24 / (5 * 5) = 0.96  -> arccos(0.96) = 16.2602 degrees
    #   pixel (1,1): r = (2,2), e = (4,4): 16 / (sqrt(8) sqrt(32)) = 1 -> 0 degrees
    # mean = (90 + 45 + arccos(0.96) + 0) / 4
    ref = np.array([[[1, 1], [3, 2]], [[0, 1], [4, 2]]], dtype=float)
    est = np.array([[[0, 1], [4, 4]], [[1, 0], [3, 4]]], dtype=float)
    angles = np.array([[90.0, 45.0], [math.degrees(math.acos(0.96)), 0.0]])
    np.testing.assert_allclose(sam_map(ref, est), angles, atol=1e-12)
    assert sam(ref, est) == pytest.approx(angles.mean(), abs=1e-12)


def test_sam_skips_pixels_with_a_zero_spectrum():
    # The angle is undefined for a zero vector (arccos of 0/0): NaN in the map,
    # left out of the mean. Same pixels as the worked example, (1,1) zeroed in ref.
    ref = np.array([[[1, 1], [3, 0]], [[0, 1], [4, 0]]], dtype=float)
    est = np.array([[[0, 1], [4, 4]], [[1, 0], [3, 4]]], dtype=float)
    amap = sam_map(ref, est)
    assert np.isnan(amap[1, 1])
    assert sam(ref, est) == pytest.approx((90 + 45 + math.degrees(math.acos(0.96))) / 3, abs=1e-12)


def test_sam_is_invariant_to_per_pixel_scaling():
    # Property of the angle (Kruse et al. 1993): scaling a spectrum by c > 0 keeps its direction.
    ref, est = _astronaut_blurred()
    factor = np.random.default_rng(11).uniform(0.2, 5.0, ref.shape[1:])
    assert sam(ref, est * factor) == pytest.approx(sam(ref, est), abs=1e-9)
    assert sam(ref, ref * factor) == pytest.approx(0.0, abs=1e-9)
    assert sam(ref, est) > 0.5


# --------------------------------------------------------------------------- Q


def _checkerboard():
    """8 x 8 block of 1s and 3s: 32 of each, mean 2, population variance 1."""
    i, j = np.indices((8, 8))
    return np.where((i + j) % 2 == 0, 1.0, 3.0)


@pytest.mark.parametrize(
    "make_estimate, expected",
    [
        # Wang & Bovik (2002): Q = 4 s_xy mx my / ((s_x^2 + s_y^2)(mx^2 + my^2)).
        # x: mx = 2, s_x^2 = 1 (population; N - 1 scales every moment by 64/63 and cancels).
        # y = x + 1: my = 3, s_y^2 = 1, s_xy = 1 -> 4*1*2*3 / ((1+1)(4+9)) = 24/26 = 12/13.
        (lambda x: x + 1.0, 12.0 / 13.0),
        # y = 2x: my = 4, s_y^2 = 4, s_xy = 2 -> 4*2*2*4 / ((1+4)(4+16)) = 64/100 = 0.64.
        (lambda x: 2.0 * x, 0.64),
        # y = 4 - x (1s and 3s swapped): my = 2, s_y^2 = 1, s_xy = -1 -> -16/16 = -1.
        (lambda x: 4.0 - x, -1.0),
    ],
)
def test_q_worked_examples_on_one_8x8_block(make_estimate, expected):
    x = _checkerboard()
    assert q_index(x, make_estimate(x)) == pytest.approx(expected, abs=1e-12)


def test_q_constant_blocks():
    # The 0/0 choice documented in q_index: a factor 0/0 counts as 1, so two
    # constant blocks score the luminance factor 2 mx my / (mx^2 + my^2).
    two, three = np.full((8, 8), 2.0), np.full((8, 8), 3.0)
    assert q_index(two, two) == 1.0
    assert q_index(np.zeros((8, 8)), np.zeros((8, 8))) == 1.0
    assert q_index(two, three) == pytest.approx(2 * 2 * 3 / (4 + 9), abs=1e-12)  # 12/13
    # One constant block against a textured one: s_xy = 0 -> Q = 0 (the formula, no 0/0).
    assert q_index(two, _checkerboard()) == 0.0


def test_q_sliding_windows_match_the_formula_window_by_window():
    # Wang & Bovik (2002) slide the window one pixel at a time and average Q;
    # here every window is computed directly with numpy's mean and cov.
    rng = np.random.default_rng(4)
    x = rng.uniform(1.0, 5.0, (13, 16))
    y = x + rng.normal(0.0, 0.7, x.shape)
    for k in (8, 5):
        qs = []
        for i in range(x.shape[0] - k + 1):
            for j in range(x.shape[1] - k + 1):
                a, b = x[i : i + k, j : j + k].ravel(), y[i : i + k, j : j + k].ravel()
                c = np.cov(a, b)
                qs.append(4 * c[0, 1] * a.mean() * b.mean()
                          / ((c[0, 0] + c[1, 1]) * (a.mean() ** 2 + b.mean() ** 2)))
        assert q_index(x, y, block_size=k) == pytest.approx(np.mean(qs), abs=1e-10)


def test_q_of_a_constant_offset_is_below_one():
    # Wang & Bovik (2002): the luminance factor penalises a mean shift.
    ref = data.camera()[100:200, 100:200].astype(float)
    q = q_index(ref, ref + 20.0)
    assert 0.5 < q < 1.0


def test_q_skips_blocks_with_invalid_pixels():
    x = _checkerboard()
    x = np.concatenate([x, x], axis=1)  # 8 x 16: nine 8 x 8 windows
    y = x + 1.0
    y[:, 15] = 100.0  # spoils every window but the first
    valid = np.ones(x.shape, dtype=bool)
    valid[:, 8:] = False
    # Only the left 8 x 8 window is wholly valid: the worked example 12/13.
    assert q_index(x, y, valid=valid) == pytest.approx(12.0 / 13.0, abs=1e-12)


# --------------------------------------------------------------------------- limits


def test_identical_images_give_the_known_limits():
    # Limits of the published formulas: PSNR inf (MSE 0), SSIM 1, ERGAS 0, SAM 0, Q 1.
    ref, _ = _astronaut_blurred()
    assert psnr(ref, ref) == math.inf
    assert np.all(psnr(ref, ref, per_band=True) == math.inf)
    assert ssim(ref, ref) == pytest.approx(1.0, abs=1e-12)
    assert ergas(ref, ref, 2) == 0.0
    assert sam(ref, ref) == 0.0
    assert q_index(ref, ref) == pytest.approx(1.0, abs=1e-12)


def test_integer_dtypes_give_the_float_results():
    ref, est = _camera_noisy(seed=2)
    ref, est = ref[:64, :64], est[:64, :64]
    r16, e16 = ref.astype(np.uint16)[None], est.astype(np.int32)[None]
    rf, ef = ref.astype(np.float64)[None], est.astype(np.float64)[None]
    assert psnr(r16, e16) == psnr(rf, ef)
    assert ssim(r16, e16) == ssim(rf, ef)
    assert q_index(r16, e16) == q_index(rf, ef)
    assert ergas(r16, e16, 3) == ergas(rf, ef, 3)


def test_two_dimensional_arrays_are_one_band():
    ref, est = _random_pair((1, 30, 30), seed=8)
    assert ssim(ref[0], est[0], data_range=1.0) == ssim(ref, est, data_range=1.0)
    assert psnr(ref[0], est[0], per_band=True).shape == (1,)


# --------------------------------------------------------------------------- masks


@pytest.mark.parametrize("mask_ndim", [2, 3])
def test_metrics_ignore_invalid_pixels(mask_ndim):
    ref, est = _astronaut_blurred()
    ref, est = ref[:, 200:264, 180:260] + 1.0, est[:, 200:264, 180:260] + 1.0
    valid = np.ones(ref.shape, dtype=bool)
    valid[:, 20:30, 10:25] = False
    valid[1, 50:, 60:] = False
    if mask_ndim == 2:
        valid = valid.all(axis=0)
    bad = ~np.broadcast_to(valid, ref.shape)
    ref2, est2 = ref.copy(), est.copy()
    ref2[bad], est2[bad] = np.nan, 1e30
    est2[bad & (np.indices(ref.shape)[2] % 2 == 0)] = -np.inf

    def run(r, e):
        return [
            psnr(r, e, data_range=255, valid=valid),
            *ssim(r, e, data_range=255, valid=valid, per_band=True),
            ergas(r, e, 3, valid=valid),
            sam(r, e, valid=valid),
            q_index(r, e, valid=valid),
            *q_index(r, e, valid=valid, per_band=True),
        ]

    clean, dirty = run(ref, est), run(ref2, est2)
    assert clean == dirty
    np.testing.assert_array_equal(sam_map(ref, est, valid=valid), sam_map(ref2, est2, valid=valid))
    assert np.all(np.isnan(sam_map(ref2, est2, valid=valid)[bad.any(axis=0)]))
    # The mask matters: without it the same clean images give other values.
    assert psnr(ref, est, data_range=255) != clean[0]


# --------------------------------------------------------------------------- consistency


@pytest.mark.parametrize("model", ["bicubic", "gaussian", "area"])
@pytest.mark.parametrize("scale", [2, 3])
def test_consistency_of_a_degraded_image_is_zero(model, scale):
    rng = np.random.default_rng(scale)
    image = rng.uniform(0.0, 100.0, (2, 12 * scale, 9 * scale))
    low = degrade(image, scale, model)
    rms, max_abs = consistency_error(low, image, scale, degradation=model)
    assert rms == pytest.approx(0.0, abs=1e-12)
    assert max_abs == pytest.approx(0.0, abs=1e-12)
    # Another image is not consistent with that input; the values are the RMS and
    # max of the difference, computed here with numpy.
    other = image + rng.normal(0.0, 1.0, image.shape)
    d = degrade(other, scale, model) - low
    err = consistency_error(low, other, scale, degradation=model)
    assert err.rms > 0.0
    assert err.rms == pytest.approx(np.sqrt(np.mean(d**2)), rel=1e-12)
    assert err.max_abs == pytest.approx(np.abs(d).max(), rel=1e-12)


def test_consistency_ignores_invalid_pixels_of_both_images():
    scale = 3
    image = data.camera()[:60, :60].astype(float)  # 60 x 60 output grid, 20 x 20 input
    low = degrade(image, scale)
    image = image + np.random.default_rng(0).normal(0.0, 2.0, image.shape)
    valid = np.ones(low.shape, dtype=bool)
    valid[8:12, 5:9] = False
    clean = consistency_error(low, image, scale, valid=valid)
    low2, image2 = low.copy(), image.copy()
    low2[~valid] = np.nan
    image2[~np.repeat(np.repeat(valid, scale, 0), scale, 1)] = 1e30
    assert consistency_error(low2, image2, scale, valid=valid) == clean
    assert clean.rms > 0.0
    # Low-res pixels whose degradation would read the hole are left out, so an
    # exactly consistent output stays at 0 however the hole is filled.
    exact = data.camera()[:60, :60].astype(float)
    low = degrade(exact, scale)
    exact[~np.repeat(np.repeat(valid, scale, 0), scale, 1)] = -5000.0
    rms, max_abs = consistency_error(low, exact, scale, valid=valid)
    assert rms == pytest.approx(0.0, abs=1e-9) and max_abs == pytest.approx(0.0, abs=1e-9)


def test_consistency_rejects_mismatched_shapes():
    with pytest.raises(InputError, match="must have shape .* got"):
        consistency_error(np.zeros((10, 10)), np.zeros((21, 20)), 2)


# --------------------------------------------------------------------------- errors


def _one_line(excinfo):
    message = str(excinfo.value)
    assert "\n" not in message and "must" in message and "got" in message
    return message


def test_errors_are_one_line_input_errors():
    ref, est = _random_pair((2, 16, 16))
    cases = [
        lambda: psnr(ref, est[:, :15]),  # shape mismatch
        lambda: ssim(ref, est, valid=np.zeros((16, 16), bool)),  # empty valid set
        lambda: ergas(ref, np.where(np.eye(16, dtype=bool), np.nan, est), 2),  # NaN at valid pixels
        lambda: q_index(ref, est, valid=np.ones((3, 16), bool)),  # mask shape
        lambda: sam(ref, est, valid=np.ones((16, 16), np.uint8)),  # mask not bool
        lambda: psnr(np.ones((4, 4)), np.ones((4, 4))),  # constant reference, no data_range
        lambda: ssim(ref[:, :10], est[:, :10], data_range=1.0),  # smaller than the window
        lambda: ergas(np.array([[-1.0, 1.0], [1.0, -1.0]]), np.zeros((2, 2)), 2),  # band mean 0
        lambda: psnr(ref.astype(complex), est),  # not a real numeric dtype
        lambda: sam(np.zeros((2, 4, 4)), np.zeros((2, 4, 4))),  # no defined angle
    ]
    for case in cases:
        with pytest.raises(InputError) as excinfo:
            case()
        _one_line(excinfo)


def test_bad_parameters_are_parameter_errors():
    ref, est = _random_pair((2, 16, 16))
    cases = [
        lambda: psnr(ref, est, data_range=0),
        lambda: ssim(ref, est, data_range=float("nan")),
        lambda: ergas(ref, est, -2),
        lambda: q_index(ref, est, block_size=1),
        lambda: consistency_error(ref[:, :8, :8], ref, 2, degradation="box"),
    ]
    for case in cases:
        with pytest.raises(ParameterError) as excinfo:
            case()
        _one_line(excinfo)
