"""Degradation models and bicubic interpolation against published values and reference libraries."""

import warnings

import numpy as np
import pytest

from geosr.core.resample import (
    crop_to_multiple,
    default_sigma,
    degradation_margin,
    degrade,
    degrade_valid,
    keys_kernel,
    rescale,
    upscale_bicubic,
    upscale_valid,
)
from geosr.errors import InputError, ParameterError


def _resize_right():
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # it warns that PyTorch is absent
        from resize_right import interp_methods, resize_right
    return resize_right, interp_methods


def test_keys_kernel_published_values():
    # Keys, "Cubic convolution interpolation for digital image processing",
    # IEEE TASSP 29(6), 1981, eq. (15) with a = -0.5:
    # u(s) = 1.5|s|^3 - 2.5|s|^2 + 1 on [0, 1]; -0.5|s|^3 + 2.5|s|^2 - 4|s| + 2 on [1, 2].
    # u(0.5) = 0.1875 - 0.625 + 1 = 0.5625; u(1.5) = -1.6875 + 5.625 - 6 + 2 = -0.0625.
    assert keys_kernel(0.0) == 1.0
    assert keys_kernel(1.0) == 0.0
    assert keys_kernel(2.0) == 0.0
    assert keys_kernel(0.5) == pytest.approx(0.5625)
    assert keys_kernel(-1.5) == pytest.approx(-0.0625)
    assert keys_kernel(2.5) == 0.0


def test_keys_kernel_partition_of_unity():
    # Keys (1981): the interpolation of a constant is the constant.
    x = np.linspace(0, 1, 11)
    total = sum(keys_kernel(x - k) for k in range(-2, 4))
    np.testing.assert_allclose(total, 1.0, atol=1e-12)


@pytest.mark.parametrize("scale", [2, 3, 4])
def test_degrade_matches_resize_right(scale):
    # resize-right (PyPI), which states agreement with MATLAB's imresize: antialiased
    # cubic downscaling, here with the same symmetric border.
    resize_right, interp_methods = _resize_right()
    x = np.random.default_rng(scale).random((12 * scale, 10 * scale))
    ref = resize_right.resize(
        x, scale_factors=1 / scale, interp_method=interp_methods.cubic,
        antialiasing=True, pad_mode="symmetric",
    )
    np.testing.assert_allclose(degrade(x, scale), ref, atol=1e-12)


@pytest.mark.parametrize("scale", [2, 3, 4])
def test_upscale_matches_resize_right(scale):
    # resize-right (PyPI): cubic interpolation with pixel centres aligned.
    resize_right, interp_methods = _resize_right()
    x = np.random.default_rng(10 + scale).random((15, 11))
    ref = resize_right.resize(
        x, scale_factors=scale, interp_method=interp_methods.cubic, pad_mode="symmetric"
    )
    np.testing.assert_allclose(upscale_bicubic(x, scale), ref, atol=1e-12)


@pytest.mark.parametrize("scale", [2, 3])
def test_upscale_matches_gdal_cubic_inside(scale):
    # GDAL's cubic resampling (through rasterio) uses the Keys kernel with a = -0.5;
    # away from the border (GDAL extends edges differently) the grids agree.
    pytest.importorskip("rasterio")
    from rasterio.enums import Resampling
    from rasterio.io import MemoryFile

    lr = np.random.default_rng(1).random((40, 50)).astype(np.float32)
    with MemoryFile() as mf:
        with mf.open(driver="GTiff", width=50, height=40, count=1, dtype="float32") as ds:
            ds.write(lr, 1)
        with mf.open() as ds:
            gdal = ds.read(1, out_shape=(40 * scale, 50 * scale), resampling=Resampling.cubic)
    mine = upscale_bicubic(lr, scale)
    inner = slice(2 * scale, -2 * scale)
    np.testing.assert_allclose(mine[inner, inner], gdal[inner, inner], atol=1e-5)


def test_upscale_reproduces_quadratics():
    # Keys (1981): with a = -0.5 the interpolation is exact for polynomials of degree 2.
    i, j = np.mgrid[0:20, 0:20].astype(float)
    lr = 0.3 * i**2 - 0.2 * i * j + 0.7 * j + 5
    hr = upscale_bicubic(lr, 3)
    y, x = (np.mgrid[0:60, 0:60] + 0.5) / 3 - 0.5
    exact = 0.3 * y**2 - 0.2 * y * x + 0.7 * x + 5
    np.testing.assert_allclose(hr[6:-6, 6:-6], exact[6:-6, 6:-6], atol=1e-9)


def test_area_is_block_mean():
    # skimage.transform.downscale_local_mean (reference library): mean of each block.
    from skimage.transform import downscale_local_mean

    x = np.random.default_rng(2).random((18, 24))
    np.testing.assert_allclose(degrade(x, 3, "area"), downscale_local_mean(x, (3, 3)), atol=1e-12)


def test_gaussian_matches_scipy():
    # scipy.ndimage.gaussian_filter with mode "reflect" (= numpy "symmetric") sampled at
    # the block centres (odd scale: an integer pixel) is the Gaussian PSF model.
    from scipy.ndimage import gaussian_filter

    x = np.random.default_rng(3).random((30, 33))
    sigma = 1.2
    ref = gaussian_filter(x, sigma, mode="reflect", truncate=4.0)[1::3, 1::3]
    np.testing.assert_allclose(degrade(x, 3, "gaussian", sigma=sigma), ref, atol=1e-6)


def test_default_sigma_mtf():
    # The default PSF's transfer at the low-res Nyquist frequency 1/(2s) is 0.3
    # (common practice in Wald-protocol studies; the 0.3 figure is from memory).
    s = 3
    sigma = default_sigma(s)
    mtf = np.exp(-2 * np.pi**2 * sigma**2 * (1 / (2 * s)) ** 2)
    assert mtf == pytest.approx(0.3)


@pytest.mark.parametrize("model", ["bicubic", "gaussian", "area"])
def test_degrade_valid_with_real_context_equals_whole(model):
    x = np.random.default_rng(4).random((60, 60))
    whole = degrade(x, 3, model)
    margin = max(degradation_margin(3, model))
    margin = 3 * -(-margin // 3)
    pad = np.pad(x, margin, mode="symmetric")
    part = degrade_valid(pad[15 : 15 + 30 + 2 * margin, 0 : 27 + 2 * margin], 3, model, margin=margin)
    np.testing.assert_allclose(part, whole[5:15, 0:9], atol=1e-12)


def test_upscale_valid_with_context_equals_whole():
    x = np.random.default_rng(5).random((20, 20))
    pad = np.pad(x, 2, mode="symmetric")
    part = upscale_valid(pad[3 : 3 + 8 + 4, 5 : 5 + 7 + 4], 3)
    np.testing.assert_allclose(part, upscale_bicubic(x, 3)[9:33, 15:36], atol=1e-12)


def test_value_symmetries_and_dtypes():
    x = np.random.default_rng(6).random((24, 24))
    for f in (lambda a: degrade(a, 2), lambda a: upscale_bicubic(a, 2)):
        np.testing.assert_allclose(f(4 * x + 9), 4 * f(x) + 9, rtol=1e-12)
        assert f(x.astype(np.float32)).dtype == np.float32
        assert f((x * 255).astype(np.uint8)).dtype == np.float64


def test_rescale_constant_and_shape():
    out = rescale(np.full((50, 40), 7.0), 0.98)
    assert out.shape == (49, 39)
    np.testing.assert_allclose(out, 7.0)


@pytest.mark.parametrize("bad", [0, 1, -2, 2.5, 9, "3", True, None])
def test_bad_scale_is_refused(bad):
    with pytest.raises(ParameterError, match="'scale' parameter"):
        degrade(np.zeros((18, 18)), bad)


def test_size_not_multiple_is_refused():
    with pytest.raises(InputError, match="multiple of the scale"):
        degrade(np.zeros((10, 9)), 3)
    assert crop_to_multiple(np.zeros((10, 11)), 3).shape == (9, 9)


def test_bad_sigma_and_model():
    with pytest.raises(ParameterError, match="'sigma'"):
        degrade(np.zeros((9, 9)), 3, "gaussian", sigma=-1)
    with pytest.raises(ParameterError, match="'degradation' parameter must be one of"):
        degrade(np.zeros((9, 9)), 3, "lanczos")
