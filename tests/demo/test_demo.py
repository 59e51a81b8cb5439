"""The demo scenario: the generated valley, its files, the quick look, the command."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import rasterio
from affine import Affine
from click.testing import CliRunner
from pyproj import CRS

from geosr import demo
from geosr.cli.main import geosr as cli
from geosr.demo.scene import fill_nodata
from geosr.errors import ModelError, ParameterError


@pytest.fixture(scope="module")
def scene():
    return demo.make_scene(seed=0)


@pytest.fixture(scope="module")
def small():
    return demo.make_scene(192, seed=3)


def ndvi(scene, mask):
    """Normalised difference vegetation index (Rouse et al. 1974): (NIR - red) / (NIR + red)."""
    red = scene.data[2][mask].astype(np.float64)
    nir = scene.data[3][mask].astype(np.float64)
    return (nir - red) / (nir + red)


# ----------------------------------------------------------------- the scene
def test_scene_layout_dtype_and_grid(scene):
    assert scene.data.dtype == np.uint16 and scene.data.shape == (4, 768, 768)
    assert scene.valid.shape == scene.landcover.shape == (768, 768)
    assert scene.transform.a == 3.0 and scene.transform.e == -3.0 and scene.transform.b == 0.0
    crs = CRS.from_user_input(scene.crs)  # pyproj is the CRS authority
    assert crs.utm_zone == "33N" and crs.axis_info[0].unit_name == "metre"
    assert demo.BANDS == ("blue", "green", "red", "nir")


def test_scene_has_every_kind_of_land_cover(scene):
    for name in demo.LANDCOVER:
        assert scene.mask_of(name).sum() > 50, name
    assert {"bridge", "farm", "reservoir"} <= set(scene.landmarks)


def test_nodata_wedge_along_one_corner(scene):
    valid = scene.valid
    assert 0.01 < (~valid).mean() < 0.15
    assert not valid[-1, 0] and valid[0, 0] and valid[0, -1] and valid[-1, -1]
    assert (scene.data[:, ~valid] == demo.NODATA).all()
    assert (scene.data[:, valid] != demo.NODATA).all()  # a valid pixel never takes nodata
    rows, cols = np.nonzero(~valid)
    assert cols.max() < 768 // 3 and rows.min() > 768 // 4  # only the lower-left corner


def test_same_seed_same_scene_other_seed_other_scene(small):
    again = demo.make_scene(192, seed=3)
    np.testing.assert_array_equal(small.data, again.data)
    np.testing.assert_array_equal(small.landcover, again.landcover)
    np.testing.assert_array_equal(small.guide, again.guide)
    other = demo.make_scene(192, seed=4)
    assert not np.array_equal(small.data, other.data)
    assert not np.array_equal(small.guide, other.guide)


@pytest.mark.parametrize("bad", [0, 100, 193, 2.0, "768", True])
def test_bad_sizes_are_refused(bad):
    with pytest.raises(ParameterError, match="'size' parameter"):
        demo.make_scene(bad)


def test_vegetation_is_bright_in_the_nir_and_water_dark(scene):
    veg = scene.mask_of(*demo.VEGETATION)
    water = scene.mask_of(*demo.WATER)
    assert veg.mean() > 0.4 and water.mean() > 0.02
    # NIR above red over vegetation and below red over water, pixel by pixel
    nir, red = scene.data[3].astype(int), scene.data[2].astype(int)
    # pixels at a shore mix water and land through the optics' blur: look 2 pixels in
    from scipy import ndimage

    open_water = ndimage.binary_erosion(water, iterations=2)
    assert open_water.sum() > 0.3 * water.sum()
    assert (nir[veg] > red[veg]).mean() > 0.99
    assert (nir[open_water] < red[open_water]).all()
    # NDVI of green vegetation is typically above 0.3 and of open water below 0
    # (Rouse et al. 1974 define the index; the thresholds are common practice)
    green = scene.mask_of("green-crop", "grass", "trees")
    assert np.median(ndvi(scene, green)) > 0.5
    assert np.median(ndvi(scene, water)) < 0.0


def test_reflectance_is_plausible(scene):
    refl = scene.data[:, scene.valid] / demo.REFLECTANCE_SCALE
    assert refl.min() > 0.0 and refl.max() < 0.8
    water = scene.mask_of(*demo.WATER)
    assert np.median(scene.data[3][water]) / demo.REFLECTANCE_SCALE < 0.05


# -------------------------------------------------------------- the guide
def test_guide_is_a_noisy_broad_band_of_the_truth(scene):
    """A panchromatic-like band: a weighted sum of the four bands plus its own sensor noise."""
    from scipy.stats import pearsonr
    from sklearn.linear_model import LinearRegression  # the reference least squares

    from geosr.demo.reflectance import NOISE

    guide, valid = scene.guide, scene.valid
    assert guide.dtype == np.uint16 and guide.shape == scene.valid.shape
    assert (guide[~valid] == demo.NODATA).all() and (guide[valid] > 0).all()
    assert sum(demo.PAN_WEIGHTS) == pytest.approx(1.0) and min(demo.PAN_WEIGHTS) > 0
    bands = scene.data[:, valid].T.astype(np.float64)
    pan = guide[valid].astype(np.float64)
    fit = LinearRegression().fit(bands, pan)
    # the weights come back (the bands' own noise biases them by well under 0.01)
    np.testing.assert_allclose(fit.coef_, demo.PAN_WEIGHTS, atol=0.01)
    # what the bands leave unexplained is the noise of the guide and of the weighted
    # bands, independent: sigma * sqrt(1 + sum w^2), in DN (measured 13.53 vs 13.55)
    expected = NOISE * demo.REFLECTANCE_SCALE * np.sqrt(1 + np.sum(np.square(demo.PAN_WEIGHTS)))
    assert np.std(pan - fit.predict(bands)) == pytest.approx(expected, rel=0.05)
    # high multiple correlation with the truth bands, but not 1: the guide has its own
    # noise (measured R = 0.99935 at seed 0)
    r = np.sqrt(fit.score(bands, pan))
    assert 0.999 < r < 0.9999
    # it correlates with every band, above geosr's weak-correlation warning (0.6), and
    # equals none (measured 0.64, 0.89, 0.70, 0.70)
    from geosr.pipeline.guided import WEAK_CORRELATION

    for b in range(4):
        assert WEAK_CORRELATION < pearsonr(pan, bands[:, b]).statistic < 0.95, demo.BANDS[b]


def test_guide_scene_is_one_pan_band_on_the_truth_grid(tmp_path, small):
    guide = demo.guide_scene(small)
    assert guide.data.shape == (1, 192, 192) and guide.transform == small.transform
    path = demo.write_scene(tmp_path / "g.tif", guide)
    with rasterio.open(path) as ds:
        assert ds.count == 1 and ds.descriptions == (demo.GUIDE_BAND,) and ds.res == (3.0, 3.0)
        np.testing.assert_array_equal(ds.read(1), small.guide)
        np.testing.assert_array_equal(ds.dataset_mask() > 0, small.valid)
    from geosr.errors import InputError

    with pytest.raises(InputError, match="must have a guide band"):
        demo.guide_scene(demo.degrade_scene(small))


# -------------------------------------------------------------- the input
def test_degraded_input_matches_the_library_degradation(small):
    from geosr.core.resample import degrade

    coarse = demo.degrade_scene(small, 3)
    assert coarse.data.shape == (4, 64, 64) and coarse.data.dtype == np.uint16
    # transform arithmetic of the affine package is the reference
    assert coarse.transform.almost_equals(small.transform @ Affine.scale(3))
    assert coarse.pixel == 9.0
    blocks = small.valid.reshape(64, 3, 64, 3).all(axis=(1, 3))
    np.testing.assert_array_equal(coarse.valid, blocks)
    assert (coarse.data[:, ~coarse.valid] == 0).all() and (coarse.data[:, coarse.valid] > 0).all()
    # far from the nodata wedge the input is exactly the rounded library degradation
    expected = np.clip(np.rint(degrade(small.data.astype(np.float64), 3)), 1, 65535)
    np.testing.assert_array_equal(coarse.data[:, :20, -30:], expected[:, :20, -30:])


def test_written_scene_georeferencing(tmp_path, small):
    path = demo.write_scene(tmp_path / "s.tif", small, "a description")
    with rasterio.open(path) as ds:
        assert ds.crs == rasterio.crs.CRS.from_epsg(32633)
        assert ds.transform == small.transform and ds.nodata == 0 and ds.dtypes == ("uint16",) * 4
        assert ds.descriptions == demo.BANDS and ds.scales == (1e-4,) * 4
        assert ds.tags()["AREA_OR_POINT"] == "Area" and ds.tags()["GEOSR_DEMO"] == "yes"
        np.testing.assert_array_equal(ds.read(), small.data)
        np.testing.assert_array_equal(ds.dataset_mask() > 0, small.valid)


# ------------------------------------------------------------- quick look
def test_detail_window_is_inside_and_aligned(scene):
    rows, cols = demo.detail_window(scene.data.shape, scene.landmarks)
    assert rows.stop - rows.start == cols.stop - cols.start == 192
    assert 0 <= rows.start and rows.stop <= 768 and 0 <= cols.start and cols.stop <= 768
    assert rows.start % 3 == 0 and cols.start % 3 == 0
    br, bc = scene.landmarks["bridge"]
    assert rows.start <= br < rows.stop and cols.start <= bc < cols.stop


def test_rmse_agrees_with_sklearn():
    from sklearn.metrics import mean_squared_error  # the reference implementation

    rng = np.random.default_rng(0)
    a, b = rng.random((4, 10, 12)), rng.random((4, 10, 12))
    valid = rng.random((10, 12)) > 0.3
    expected = np.sqrt(mean_squared_error(a[:, valid].ravel(), b[:, valid].ravel()))
    assert demo.rmse(a, b, valid) == pytest.approx(expected, rel=1e-12)


def test_quicklook_figure_and_png(tmp_path):
    rng = np.random.default_rng(1)
    truth = rng.uniform(0.02, 0.4, (4, 30, 30))
    blurred = truth * 0.9
    panels = [("nearest", blurred), ("bicubic", blurred + 0.01), ("truth", truth)]
    fig = demo.quicklook_figure(panels, reference=truth, title="T")
    titles = [ax.get_title() for ax in fig.axes[:3]]
    assert titles[0] == f"nearest\nRMSE {demo.rmse(truth, blurred):.4f}"
    assert titles[2] == "truth\nreference"
    texts = [t.get_text() for t in fig.texts]
    assert demo.CAPTION in texts and "synthesized" in demo.CAPTION
    assert [ax.get_ylabel() for ax in fig.axes if ax.get_ylabel()] == [
        "true colour (red, green, blue)", "colour infrared (NIR, red, green)"]

    path = demo.write_quicklook(tmp_path / "q.png", panels, reference=truth)
    assert Path(path).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG spec)
    from matplotlib.image import imread

    image = imread(path)
    assert image.shape[:2] == (900, 1200)  # 4 in per panel x 3 panels, 9 in high, 100 dpi


def test_quicklook_refuses_mismatched_panels():
    from geosr.errors import InputError

    with pytest.raises(InputError, match="shape"):
        demo.quicklook_figure([("a", np.zeros((4, 8, 8))), ("b", np.zeros((4, 8, 9)))])
    with pytest.raises(InputError, match="at least one"):
        demo.quicklook_figure([])


# ------------------------------------------------------------ the whole run
#: The demo's files by role, in the order the command prints them.
NAMES = {
    "truth": "valley-truth-3m.tif",
    "input": "valley-input-9m.tif",
    "guide": "valley-guide-3m.tif",
    "output": "valley-geosr-x3.tif",
    "guided": "valley-geosr-guided-x3.tif",
    "quicklook": "valley-quicklook.png",
}


@pytest.fixture
def model_x3(tmp_path, tiny_sparse_x3):
    path = tmp_path / "tiny-x3.npz"
    tiny_sparse_x3.save(path)
    return path


def independent_psnr(paths):
    """PSNR of each method against the truth, by scikit-image, from the files alone.

    Over the pixels valid in the truth and both geosr outputs, all bands pooled,
    peak the truth's range there (the convention of geosr.core.metrics.psnr).
    """
    from skimage.metrics import peak_signal_noise_ratio

    from geosr.core.resample import upscale_bicubic

    def read(role):
        with rasterio.open(paths[role]) as ds:
            return ds.read().astype(np.float64), ds.dataset_mask() > 0

    truth, valid = read("truth")
    low, low_valid = read("input")
    single, single_valid = read("output")
    guided, guided_valid = read("guided")
    valid &= single_valid & guided_valid
    images = {
        "nearest": np.repeat(np.repeat(low, 3, axis=1), 3, axis=2),
        "bicubic": upscale_bicubic(fill_nodata(low, low_valid), 3),
        "single-image": single,
        "guided": guided,
    }
    ref = truth[:, valid]
    return {name: peak_signal_noise_ratio(ref, image[:, valid], data_range=np.ptp(ref))
            for name, image in images.items()}


def printed_psnr(stdout):
    """The PSNR line of ``geosr demo`` as {method: dB}."""
    line = stdout.strip().splitlines()[-1]
    parts = [part.split() for part in line.split(":", 1)[1].split(",")]
    return {name: float(value) for name, value, _ in parts}


def check_demo_files(paths, size):
    with rasterio.open(paths["guide"]) as g, rasterio.open(paths["guided"]) as go:
        # the guide sits on the truth's grid, three times finer than the input
        assert (g.width, g.height, g.count) == (size, size, 1) and g.descriptions == ("pan",)
        assert (go.width, go.height, go.count) == (size, size, 4) and go.nodata == 0
        assert go.tags()["GEOSR_METHOD"] == "guided" and go.tags()["GEOSR_SYNTHESIZED"] == "yes"
        guide_transform, guide_crs = g.transform, g.crs
        assert go.transform.almost_equals(g.transform) and go.crs == g.crs
    with rasterio.open(paths["truth"]) as t, rasterio.open(paths["input"]) as i, \
            rasterio.open(paths["output"]) as o:
        assert guide_transform == t.transform and guide_crs == t.crs
        assert (t.width, t.height) == (size, size) and (i.width, i.height) == (size // 3, size // 3)
        assert (o.width, o.height) == (size, size) and o.count == 4
        assert t.crs == i.crs == o.crs and CRS.from_user_input(o.crs.to_wkt()).utm_zone == "33N"
        assert i.transform.almost_equals(t.transform @ Affine.scale(3))
        # magnifying the input x3 lands exactly on the truth's grid
        assert o.transform.almost_equals(t.transform) and o.bounds == t.bounds
        assert i.nodata == 0 and o.nodata == 0
        assert o.tags()["GEOSR_SYNTHESIZED"] == "yes" and o.tags()["GEOSR_SCALE"] == "3"
        truth, out = t.read(), o.read()
        valid = (t.dataset_mask() > 0) & (o.dataset_mask() > 0)
        assert valid.mean() > 0.8
    assert Path(paths["quicklook"]).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    return truth, out, valid


@pytest.fixture(scope="module")
def guided_run(tmp_path_factory):
    """``run_demo`` at 192 x 192 (seed 3) with the shipped model; the quick look's panels kept."""
    import geosr.demo.run

    shown = []

    def keep(path, panels, **kwargs):
        shown.append(panels)
        return demo.write_quicklook(path, panels, **kwargs)

    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(geosr.demo.run, "write_quicklook", keep)
        result = demo.run_demo(tmp_path_factory.mktemp("guided") / "out", size=192, seed=3)
    return result, shown[0]


def test_guide_file_is_on_the_exact_3x_finer_grid_of_the_input(guided_run):
    paths, _ = guided_run
    with rasterio.open(paths["guide"]) as g, rasterio.open(paths["input"]) as i:
        # pixel sizes 3 m and 9 m: a ratio of exactly 3, same CRS, same origin
        assert g.res == (3.0, 3.0) and i.res == (9.0, 9.0)
        assert g.crs == i.crs and (g.transform.c, g.transform.f) == (i.transform.c, i.transform.f)
        # the affine package's arithmetic is the reference for "3 times finer"
        assert g.transform == i.transform @ Affine.scale(1 / 3)
        assert (g.width, g.height) == (3 * i.width, 3 * i.height) and g.bounds == i.bounds
        assert g.nodata == 0 and g.dtypes == ("uint16",)
        np.testing.assert_array_equal(g.read(1), demo.make_scene(192, seed=3).guide)


def test_guided_result_beats_single_image_and_bicubic(guided_run):
    paths, _ = guided_run
    psnr = independent_psnr(paths)
    assert paths["psnr"] == pytest.approx(psnr, abs=1e-9)  # geosr.core.metrics agrees with skimage
    assert list(paths["psnr"]) == list(demo.METHODS)
    # measured at 192 x 192, seed 3: nearest 27.79, bicubic 29.67, single-image 31.16,
    # guided 34.38 dB; the margins asserted are 0.3 dB below those measured
    assert psnr["nearest"] < psnr["bicubic"] < psnr["single-image"]
    assert psnr["guided"] - psnr["single-image"] > 2.9, psnr
    assert psnr["guided"] - psnr["bicubic"] > 4.4, psnr


def test_quick_look_shows_five_panels_in_order(guided_run):
    from matplotlib.image import imread

    paths, panels = guided_run
    labels = [label for label, _ in panels]
    assert len(labels) == 5
    for label, word in zip(labels, ["nearest", "bicubic", "single-image", "guided", "truth"]):
        assert word in label, labels
    # 4 in per panel at 100 dpi, 9 in high: the four-panel quick look was 1600 wide
    assert imread(paths["quicklook"]).shape[:2] == (900, 5 * 400)
    assert "synthesized by a statistical model, not measured" in demo.CAPTION


def test_demo_never_overwrites_its_inputs(guided_run):
    paths, _ = guided_run
    files = [paths[role] for role in NAMES]
    assert len(set(files)) == len(files)
    assert [Path(f).name for f in files] == list(NAMES.values())
    # what the two magnifications read is still what the demo generated
    scene = demo.make_scene(192, seed=3)
    data, _ = demo.read_scene(paths["input"])
    np.testing.assert_array_equal(data, demo.degrade_scene(scene).data)
    guide, _ = demo.read_scene(paths["guide"])
    np.testing.assert_array_equal(guide[0], scene.guide)
    from geosr.errors import DestinationError
    from geosr.pipeline.magnify import magnify_raster

    with pytest.raises(DestinationError):  # the guide can never be the destination
        magnify_raster(paths["input"], paths["guide"], guide=paths["guide"], overwrite=True)


def test_same_seed_same_files_but_the_creation_time(guided_run, tmp_path):
    import filecmp

    paths, _ = guided_run
    again = demo.run_demo(tmp_path / "again", size=192, seed=3)
    for role in ("truth", "input", "guide", "quicklook"):
        assert filecmp.cmp(paths[role], again[role], shallow=False), role
    for role in ("output", "guided"):
        with rasterio.open(paths[role]) as a, rasterio.open(again[role]) as b:
            np.testing.assert_array_equal(a.read(), b.read())
            tags_a, tags_b = a.tags(), b.tags()
            assert tags_a.pop("GEOSR_CREATED") and tags_b.pop("GEOSR_CREATED")
            assert tags_a == tags_b
    assert again["psnr"] == paths["psnr"]


def test_run_demo_with_a_given_model(tmp_path, model_x3):
    lines = []
    paths = demo.run_demo(tmp_path / "out", size=192, model=model_x3, echo=lines.append)
    check_demo_files(paths, 192)
    assert any("generating" in line for line in lines)
    again = demo.run_demo(tmp_path / "out", size=192, model=model_x3)  # replaces
    assert again["output"] == paths["output"]


def test_demo_command_prints_where_each_file_went(tmp_path, model_x3, monkeypatch):
    result = CliRunner().invoke(cli, ["demo", str(tmp_path / "d"), "--model", str(model_x3), "-q",
                                      "--size", "192"])
    assert result.exit_code == 0, result.stderr
    lines = result.stdout.strip().splitlines()
    assert len(lines) == 7
    for line, name in zip(lines, NAMES.values()):
        assert line.endswith(str(tmp_path / "d" / name)) and Path(line.split()[-1]).is_file()
    assert lines[-1].startswith("PSNR against the truth:")
    assert [part.split()[0] for part in lines[-1].split(":", 1)[1].split(",")] == list(demo.METHODS)
    assert all(part.strip().endswith(" dB") for part in lines[-1].split(",")), lines[-1]
    assert result.stderr == ""


def test_demo_size_must_be_a_multiple_of_3(tmp_path):
    result = CliRunner().invoke(cli, ["demo", str(tmp_path / "d"), "--size", "200"])
    assert result.exit_code == 2
    assert result.stderr.strip().splitlines() == [
        ("geosr: error: Invalid value for '--size': must be a multiple of 3, got 200. "
         "Try 'geosr demo --help'.")
    ]


def test_demo_without_the_shipped_model_is_one_clear_line(tmp_path, monkeypatch):
    import geosr.modelfile

    monkeypatch.setattr(geosr.modelfile, "default_model_path", lambda scale: tmp_path / "none.npz")
    with pytest.raises(ModelError, match="needs the model shipped for x3"):
        demo.run_demo(tmp_path / "x")
    assert not (tmp_path / "x").exists()  # nothing is written before the check
    result = CliRunner().invoke(cli, ["demo", str(tmp_path / "x")])
    assert result.exit_code == 1
    assert result.stderr.strip().splitlines() == [
        ("geosr: error: The demo needs the model shipped for x3 (geosr/models/none.npz), which "
         "this installation does not have; pass a model file with --model")
    ]


@pytest.mark.slow
def test_geosr_demo_end_to_end_with_the_shipped_model(tmp_path):
    """`geosr demo` as a user runs it: a real process, the shipped model, nothing installed."""
    import geosr.modelfile

    if not hasattr(geosr.modelfile, "default_model"):
        pytest.skip("geosr.modelfile.default_model does not exist yet (no shipped models)")
    geosr_exe = Path(sys.executable).parent / "geosr"
    cmd = [str(geosr_exe)] if geosr_exe.exists() else [sys.executable, "-m", "geosr.cli.main"]
    proc = subprocess.run(cmd + ["demo", str(tmp_path / "demo")], check=False,
                          capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    for name in NAMES.values():
        assert str(tmp_path / "demo" / name) in proc.stdout
    paths = {role: tmp_path / "demo" / name for role, name in NAMES.items()}
    truth, out, valid = check_demo_files(paths, 768)
    # the magnified detail is closer to the truth than bicubic interpolation of the input
    from geosr.core.resample import upscale_bicubic

    with rasterio.open(paths["input"]) as i:
        low = i.read().astype(np.float64)
    bicubic = upscale_bicubic(low, 3)
    from scipy import ndimage

    # away from the image border and the nodata wedge, where bicubic has no context
    inner = ndimage.binary_erosion(valid, np.ones((3, 3), bool), iterations=12, border_value=0)
    err_geosr = demo.rmse(truth, out, inner)
    err_bicubic = demo.rmse(truth, bicubic, inner)
    assert err_geosr < err_bicubic, (err_geosr, err_bicubic)
    # the full-size guided result: measured 39.51 dB, 3.37 dB above single-image (36.14)
    # and 4.77 dB above bicubic (34.74), seed 0
    psnr = independent_psnr(paths)
    assert psnr["guided"] - psnr["single-image"] > 3.1, psnr
    assert psnr["guided"] - psnr["bicubic"] > 4.4, psnr
    assert printed_psnr(proc.stdout) == pytest.approx(psnr, abs=0.006)
