"""Tests of geosr.assess.guided: Wald's protocol with a guide, baselines, QNR, report."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
import rasterio
from affine import Affine
from skimage import data as skdata
from skimage.metrics import peak_signal_noise_ratio

from geosr.assess.guided import GUIDED_METHODS, QNR_METHODS
from geosr.assess.protocol import assess_raster
from geosr.core.injection import component_substitution, highpass_injection
from geosr.core.resample import degrade, upscale_bicubic
from geosr.errors import GeoreferencingWarning, InputError, ParameterError

from helpers import TEST_DATA

T30 = Affine(30.0, 0.0, 300000.0, 0.0, -30.0, 4000000.0)


def _landsat():
    """The vendored Landsat 8 crops, bands 2-4 (0 is fill), and their profile."""
    bands = []
    for b in (2, 3, 4):
        with rasterio.open(TEST_DATA / f"landsat8-b{b}-crop.tif") as ds:
            bands.append(ds.read(1))
            crs, transform = ds.crs, ds.transform
    return np.stack(bands), crs, transform


def _write(path, data, crs, transform, nodata=None):
    data = np.asarray(data)
    data = data[None] if data.ndim == 2 else data
    with rasterio.open(path, "w", driver="GTiff", width=data.shape[2], height=data.shape[1],
                       count=data.shape[0], dtype=data.dtype.name, crs=crs, transform=transform,
                       nodata=nodata) as ds:
        ds.write(data)
    return path


def _mean_guide(bands):
    """Mean of ``bands`` where every one is valid (non-zero), 0 (fill) elsewhere."""
    return np.where((bands > 0).all(axis=0), bands.astype(np.float64).mean(axis=0), 0).astype(np.float32)


def _psnr(result, m):
    return result[m]["overall"]["psnr"]


@pytest.fixture(scope="module")
def landsat_runs(tmp_path_factory):
    """Guided assessments at x2 on the Landsat crops: 3 bands with the mean of all bands as
    guide, and band 2 alone with the mean of bands 3 and 4 (leave one out)."""
    tmp = tmp_path_factory.mktemp("landsat")
    a, crs, t = _landsat()
    ref = _write(tmp / "ref.tif", a, crs, t, nodata=0)
    guide = _write(tmp / "guide.tif", _mean_guide(a), crs, t, nodata=0)
    b2 = _write(tmp / "b2.tif", a[:1], crs, t, nodata=0)
    g34 = _write(tmp / "g34.tif", _mean_guide(a[1:]), crs, t, nodata=0)
    return {"all": assess_raster(ref, tmp / "rep-all", 2, guide=[guide]),
            "loo": assess_raster(b2, tmp / "rep-loo", 2, guide=[g34]), "dir": tmp}


# Margins: measured on these crops at x2 (see the comments), less about 0.3 dB.
@pytest.mark.slow
def test_guided_beats_bicubic_and_single_image_on_landsat(landsat_runs):
    r = landsat_runs["all"]
    # measured: guided 44.29, highpass 47.31, substitution 40.53, geosr 33.22, bicubic 32.83 dB
    assert _psnr(r, "guided") - _psnr(r, "bicubic") > 11.15
    assert _psnr(r, "guided") - _psnr(r, "geosr") > 10.75
    assert _psnr(r, "highpass") - _psnr(r, "bicubic") > 14.15
    assert _psnr(r, "substitution") - _psnr(r, "bicubic") > 7.4
    r = landsat_runs["loo"]
    # measured: guided 39.77, highpass 40.45, substitution 36.13, geosr 31.59, bicubic 31.17 dB
    assert _psnr(r, "guided") - _psnr(r, "bicubic") > 8.3
    assert _psnr(r, "guided") - _psnr(r, "geosr") > 7.9
    assert _psnr(r, "highpass") - _psnr(r, "bicubic") > 9.0
    assert _psnr(r, "substitution") - _psnr(r, "bicubic") > 4.65


@pytest.mark.slow
def test_qnr_rows_and_guide_entry(landsat_runs):
    for r in (landsat_runs["all"], landsat_runs["loo"]):
        nr = r["no_reference"]
        assert set(nr["methods"]) == set(QNR_METHODS) and nr["scale"] == 2 and "Wald run" in nr["setup"]
        for v in nr["methods"].values():
            assert 0.0 <= v["qnr"] <= 1.0 and v["d_lambda"] >= 0.0 and v["d_s"] >= 0.0
            # QNR = (1 - D_lambda)(1 - D_s) (Alparone et al., PE&RS 74(2), 2008, alpha = beta = 1)
            assert v["qnr"] == pytest.approx((1 - v["d_lambda"]) * (1 - v["d_s"]))
        # bicubic interpolation adds no detail: the guide's detail is missing (D_s largest)
        assert nr["methods"]["interpolation"]["d_s"] > nr["methods"]["guided"]["d_s"]
    g = landsat_runs["loo"]["guide"]
    assert g["files"] == ["g34.tif"] and g["scale_ratio"] == 1 and g["bands"] == [1]
    assert len(g["sha256"][0]) == 64 and len(g["correlation"]) == 1
    # D_lambda has no band pair with one band: 0 by definition
    assert landsat_runs["loo"]["no_reference"]["methods"]["guided"]["d_lambda"] == 0.0


@pytest.mark.slow
def test_report_folder_has_the_guided_tables(landsat_runs):
    folder = landsat_runs["dir"] / "rep-all"
    on_disk = json.loads((folder / "metrics.json").read_text())
    assert on_disk["methods"] == list(GUIDED_METHODS) and "no_reference" in on_disk
    assert on_disk["guided"]["overall"]["psnr"] == pytest.approx(_psnr(landsat_runs["all"], "guided"))
    md = (folder / "report.md").read_text()
    for needle in ("| guided (geosr) |", "| highpass (GLP/HPF) |", "| substitution (GSA) |",
                   "| method | QNR | D_lambda | D_s |", "correlation with the guide", "co-registered"):
        assert needle in md, needle
    for name in ("crop_comparison.png", "error_guided.png", "psnr_gain.png"):
        assert (folder / name).stat().st_size > 1000


@pytest.mark.slow
def test_rgb_byte_crop_all_bands_guide(tmp_path):
    with rasterio.open(TEST_DATA / "rgb-byte-crop.tif") as ds:
        a, crs, t = ds.read(), ds.crs, ds.transform
    ref = _write(tmp_path / "ref.tif", a, crs, t, nodata=0)
    guide = _write(tmp_path / "guide.tif", _mean_guide(a), crs, t, nodata=0)
    r = assess_raster(ref, tmp_path / "rep", 2, guide=[guide])
    # measured: guided 33.14, highpass 34.50, substitution 28.29, geosr 20.77, bicubic 19.95 dB
    assert _psnr(r, "guided") - _psnr(r, "bicubic") > 12.9
    assert _psnr(r, "guided") - _psnr(r, "geosr") > 12.05
    assert _psnr(r, "highpass") - _psnr(r, "bicubic") > 14.25
    assert _psnr(r, "substitution") - _psnr(r, "bicubic") > 8.05


# ---------------------------------------------------------------- baselines by hand


def _hand_highpass(coarse, guide, s):
    """GLP/HPF with regression gains (Aiazzi et al., PE&RS 72(5), 2006), one guide band:
    U_b + cov(U_b, P_L) / var(P_L) (P - P_L), P_L = upscale(degrade(P))."""
    u = upscale_bicubic(coarse, s)
    p_low = upscale_bicubic(degrade(guide, s), s)
    out = []
    for b in range(coarse.shape[0]):
        c = np.cov(u[b].ravel(), p_low.ravel())
        out.append(u[b] + c[0, 1] / c[1, 1] * (guide - p_low))
    return np.stack(out)


def _hand_gsa(coarse, guide, s):
    """GSA (Aiazzi, Baronti & Selva, IEEE TGRS 45(10), 2007): intensity regressed on the
    upsampled bands, the guide equalised to it, gains cov(U_b, I) / var(I)."""
    u = upscale_bicubic(coarse, s)
    p_low = upscale_bicubic(degrade(guide, s), s)
    design = np.column_stack([b.ravel() for b in u] + [np.ones(guide.size)])
    coef = np.linalg.lstsq(design, p_low.ravel(), rcond=None)[0]
    intensity = np.tensordot(coef[:-1], u, 1) + coef[-1]
    pan_eq = (guide - guide.mean()) * intensity.std() / guide.std() + intensity.mean()
    out = []
    for b in range(coarse.shape[0]):
        c = np.cov(u[b].ravel(), intensity.ravel())
        out.append(u[b] + c[0, 1] / c[1, 1] * (pan_eq - intensity))
    return np.stack(out)


def test_baselines_equal_the_published_formulas_on_a_small_array():
    rgb = skdata.astronaut()[100:164, 180:244].astype(np.float64)
    fine = np.moveaxis(rgb, -1, 0)
    guide = fine.mean(axis=0) + 5.0 * np.sin(np.arange(64) / 3.0)[None, :]
    coarse = degrade(fine, 2)
    np.testing.assert_allclose(highpass_injection(coarse, guide, 2), _hand_highpass(coarse, guide, 2),
                               rtol=0, atol=1e-8)
    np.testing.assert_allclose(component_substitution(coarse, guide, 2), _hand_gsa(coarse, guide, 2),
                               rtol=0, atol=1e-8)
    # two guide bands: P = sum_j w_j G_j with w from coarse_b ~ sum_j w_j degrade(G_j) + c
    pair = np.stack([fine[0], fine[2]])
    design = np.column_stack([degrade(pair[0], 2).ravel(), degrade(pair[1], 2).ravel(), np.ones(32 * 32)])
    w = np.linalg.lstsq(design, coarse[1].ravel(), rcond=None)[0]
    hand = _hand_highpass(coarse[1:2], w[0] * pair[0] + w[1] * pair[1], 2)
    np.testing.assert_allclose(highpass_injection(coarse[1:2], pair, 2), hand, rtol=0, atol=1e-8)


def test_assess_rows_equal_skimage_psnr_of_the_hand_baselines(tmp_path):
    """The assessment's numbers are PSNR (skimage) of the published formulas' output."""
    ref = np.moveaxis(skdata.astronaut()[100:196, 180:276], -1, 0)  # uint8, all valid
    guide = ref.astype(np.float64).mean(axis=0)
    src = _write(tmp_path / "ref.tif", ref, "EPSG:32618", T30)
    g = _write(tmp_path / "g.tif", guide.astype(np.float32), "EPSG:32618", T30)
    r = assess_raster(src, tmp_path / "rep", 2, guide=[g])
    low = degrade(ref.astype(np.float64), 2)
    data_range = float(ref.max()) - float(ref.min())
    for name, hand in (("highpass", _hand_highpass(low, guide, 2)), ("substitution", _hand_gsa(low, guide, 2)),
                       ("interpolation", upscale_bicubic(low, 2))):
        product = np.clip(np.rint(hand), 0, 255)  # as the uint8 reference holds it
        expected = peak_signal_noise_ratio(ref.astype(np.float64), product, data_range=data_range)
        assert r[name]["overall"]["psnr"] == pytest.approx(expected, abs=1e-9), name
    assert r["protocol"]["valid_pixels"] == 96 * 96
    assert r["guide"]["fallback_share"] == 0.0  # every guide pixel valid: no bicubic fallback
    # so the PSNR over the guided footprint is the PSNR over every compared pixel
    assert r["guide"]["footprint_psnr"]["highpass"] == pytest.approx(r["highpass"]["overall"]["psnr"], abs=1e-9)


@pytest.mark.slow
def test_a_guide_over_part_of_the_reference(tmp_path):
    """Pixels the guide does not cover are left out of the comparison."""
    a, crs, t = _landsat()
    b2 = _write(tmp_path / "b2.tif", a[:1], crs, t, nodata=0)
    whole = _write(tmp_path / "whole.tif", _mean_guide(a[1:]), crs, t, nodata=0)
    left = _write(tmp_path / "left.tif", _mean_guide(a[1:])[:, :160], crs, t, nodata=0)
    n_whole = assess_raster(b2, tmp_path / "rep-whole", 2, guide=[whole])["protocol"]["valid_pixels"]
    r = assess_raster(b2, tmp_path / "rep", 2, guide=[left])
    n = r["protocol"]["valid_pixels"]
    assert 0 < n < n_whole * 160 / 256  # the guide's right edge costs the degradation's reach too
    # Guided output falls back only where the guide itself is invalid, and
    # those pixels are left out of the comparison: no compared pixel falls back.
    assert "guide valid" in r["protocol"]["mask"] and r["guide"]["fallback_share"] == 0.0
    foot = r["guide"]["footprint_psnr"]
    assert foot["guided"] == pytest.approx(_psnr(r, "guided"), abs=0.05)


# ---------------------------------------------------------------- a guide finer than REF


@pytest.fixture
def fine_guide(tmp_path):
    """REF 64 x 64 at 30 m (the Landsat crop degraded x2) and a 128 x 128 guide at 15 m."""
    a, crs, _ = _landsat()
    fine = a[:, 128:, 128:].astype(np.float64)  # no fill there
    ref = _write(tmp_path / "ref30.tif", np.rint(degrade(fine, 2)).astype(np.uint16), crs, T30)
    t15 = T30 @ Affine.scale(0.5)
    guide = _write(tmp_path / "g15.tif", fine.mean(axis=0).astype(np.float32), crs, t15)
    return ref, guide, fine, crs


def test_the_scale_is_the_guides_ratio(fine_guide, tmp_path):
    ref, guide, _, _ = fine_guide
    r = assess_raster(ref, tmp_path / "rep", None, guide=guide)
    assert r["protocol"]["scale"] == 2 and r["guide"]["scale_ratio"] == 2
    assert r["guide"]["on_reference_grid"].startswith("degraded x2")
    nr = r["no_reference"]
    assert nr["scale"] == 2 and "native resolution" in nr["setup"]
    for v in nr["methods"].values():
        assert 0.0 <= v["qnr"] <= 1.0 and v["d_lambda"] >= 0.0 and v["d_s"] >= 0.0
    assert _psnr(r, "guided") > _psnr(r, "bicubic") + 5  # measured 43.20 vs 27.98 dB
    assert assess_raster(ref, tmp_path / "rep2", 2, guide=[guide])["protocol"]["scale"] == 2


def test_a_scale_other_than_the_ratio_is_refused(fine_guide, tmp_path):
    ref, guide, _, _ = fine_guide
    with pytest.raises(ParameterError, match="must equal the guide's ratio 2") as err:
        assess_raster(ref, tmp_path / "rep", 3, guide=[guide])
    assert "\n" not in str(err.value)
    assert not (tmp_path / "rep").exists()


def test_off_grid_guide_is_resampled_with_a_warning(fine_guide, tmp_path):
    ref, _, fine, crs = fine_guide
    shifted = _write(tmp_path / "shifted.tif", fine.mean(axis=0).astype(np.float32), crs,
                     T30 @ Affine.scale(0.5) @ Affine.translation(0.5, 0.25))
    with pytest.warns(GeoreferencingWarning, match="resampled onto it"):
        r = assess_raster(ref, tmp_path / "rep", None, guide=[shifted])
    assert r["guide"]["resampled"] == ["shifted.tif"]


def test_bad_guides_are_refused_in_one_line(fine_guide, tmp_path):
    ref, _, fine, crs = fine_guide
    cases = [
        (T30 @ Affine.translation(1000, 0) @ Affine.scale(0.5), InputError, "must overlap the reference"),
        (T30 @ Affine.scale(1 / 1.5), InputError, "a whole number of times"),
        (T30 @ Affine.scale(2), InputError, "a whole number of times"),
    ]
    for i, (transform, exc, needle) in enumerate(cases):
        g = _write(tmp_path / f"g{i}.tif", fine[0].astype(np.float32), crs, transform)
        with pytest.raises(exc, match=needle) as err:
            assess_raster(ref, tmp_path / f"rep{i}", None, guide=[g])
        assert "\n" not in str(err.value)
    with pytest.raises(ParameterError, match="'scale' parameter is needed"):
        same = _write(tmp_path / "same.tif", np.ones((64, 64), np.float32), crs, T30)
        assess_raster(ref, tmp_path / "rep", None, guide=[same])
    with pytest.raises(ParameterError, match="'consistency' parameter does not apply"):
        assess_raster(ref, tmp_path / "rep", None, guide=[tmp_path / "g0.tif"], consistency=True)
    with pytest.raises(ParameterError, match="'guide_bands' parameter only applies"):
        assess_raster(ref, tmp_path / "rep", 2, guide_bands=[1])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with pytest.raises(InputError, match="existing rasters"):
            assess_raster(ref, tmp_path / "rep", None, guide=[tmp_path / "missing.tif"])
