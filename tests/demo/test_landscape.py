"""The demo scene's pieces: the grid and layers, each landscape feature, the quick look's canvas."""

from __future__ import annotations

import logging
import math
import subprocess
import sys

import numpy as np
import pytest

from geosr import demo
from geosr.demo import fields, reflectance, roads, terrain, trees, water
from geosr.demo.canvas import Grid, Layers
from geosr.demo.landcover import CODE, LANDCOVER
from geosr.demo.scene import fill_nodata


def blank(n=192, seed=0):
    """A grid, its layers (all grass) and a seeded generator, as make_scene starts them."""
    grid = Grid.square(n, tuned_for=768)
    layers = Layers(np.full(grid.shape, CODE["grass"], np.uint8), np.zeros(grid.shape),
                    np.zeros(grid.shape))
    return grid, layers, np.random.default_rng(seed)


def test_grid_coordinates_and_length_unit():
    grid = Grid.square(192, tuned_for=768)
    assert grid.shape == (192, 192) and grid.k == 0.25
    assert grid.yy[5, 7] == 5.0 and grid.xx[5, 7] == 7.0 and grid.xx.dtype == np.float64
    np.testing.assert_array_equal(grid.ys, grid.yy[:, 0])


def test_layers_paint_and_find_classes():
    _, layers, _ = blank(8)
    mask = np.zeros((8, 8), bool)
    mask[2:4, 3:6] = True
    layers.paint(mask, "river")
    np.testing.assert_array_equal(layers.covered_by("river"), mask)
    np.testing.assert_array_equal(layers.covered_by("river", "grass"), np.ones((8, 8), bool))
    assert len(LANDCOVER) == len(set(CODE.values())) == max(CODE.values()) + 1


def test_smooth_field_has_unit_variance_and_repeats():
    for sigma in (1.0, 12.0):  # the direct and the coarse-grid paths
        f = terrain.smooth_field(np.random.default_rng(1), (96, 80), sigma)
        assert f.shape == (96, 80)
        assert abs(f.mean()) < 1e-12 and f.std() == pytest.approx(1.0, rel=1e-9)
        np.testing.assert_array_equal(f, terrain.smooth_field(np.random.default_rng(1), (96, 80), sigma))


def test_hillshade_of_flat_ground_and_of_slopes_facing_the_sun():
    # The usual hillshade formula (from memory, as documented for GDAL's gdaldem):
    # cos(zenith) cos(slope) + sin(zenith) sin(slope) cos(azimuth - aspect); flat
    # ground gives cos(zenith) = cos(45 degrees) for a sun 45 degrees high.
    assert terrain.hillshade(np.zeros((4, 4)))[1, 1] == pytest.approx(math.cos(math.radians(45)))
    rows = 0.3 * np.arange(16.0)[:, None] * np.ones((1, 16))
    towards_sun = terrain.hillshade(rows)  # rising to the south: facing north, the sun is north-west
    away = terrain.hillshade(-rows)
    assert towards_sun[8, 8] > math.cos(math.radians(45)) > away[8, 8]


def test_river_has_its_width_and_bars_on_its_banks():
    grid, layers, rng = blank()
    course = water.river_course(rng, grid)
    river = water.paint_river(layers, course, grid.k)
    widths = river.sum(axis=1)
    # half width 6.5 k +- a smooth field of 1.5 k (k = 0.25): about 3 pixels across
    # where the river runs north-south, more where it runs slanted
    assert widths.min() >= 1 and 2 <= np.median(widths) <= 6
    assert course.half_width.mean() == pytest.approx(6.5 * grid.k, abs=1e-9)
    bars = layers.covered_by("gravel")
    assert bars.any() and not (bars & river).any()
    assert (np.abs(course.distance[bars]) < course.half_width.max() + 4 * grid.k).all()


def test_roads_bridge_the_river():
    grid, layers, rng = blank(384, seed=2)  # k = 0.5: the road is 2.3 pixels wide
    course = water.river_course(rng, grid)
    road = roads.paint_roads(rng, grid, layers, course)
    assert course.channel[road.bridge] and road.mask[road.bridge]
    assert layers.covered_by("road")[road.bridge]


def test_parcels_cover_the_grid_with_crops_and_margins():
    grid, layers, rng = blank(seed=5)
    parcels = fields.paint_parcels(rng, grid, layers)
    assert 0.12 <= parcels.theta <= 0.28
    found = {LANDCOVER[c] for c in np.unique(layers.landcover)}
    assert found <= {"green-crop", "ripe-cereal", "bare-soil", "grass"} and len(found) >= 3
    assert layers.texture.std() > 0.01 and layers.nir_vigour.std() > 0.0
    # the frame's inverse: a pixel's (u, v) maps back to its (row, col)
    r, c = parcels.to_rowcol(parcels.u[40, 70], parcels.v[40, 70])
    assert (r, c) == pytest.approx((40.0, 70.0))


def test_crowns_are_domes_as_tall_as_wide():
    height = trees._dome_heights((21, 21), np.array([[10.0, 10.0]]), np.array([4.0]))
    assert height[10, 10] == 4.0 and height[10, 14] == 0.0  # sqrt(1 - d^2/r^2) r
    assert height[10, 12] == pytest.approx(math.sqrt(1 - 0.25) * 4)
    grid, layers, _ = blank(21)
    layers.paint(np.eye(21, dtype=bool), "road")
    _, crowns = trees.paint_crowns(grid, layers, np.array([[10.0, 10.0]]), np.array([4.0]))
    assert crowns.sum() > 20 and not crowns[10, 10]  # a crown never hides a road
    assert layers.covered_by("trees")[10, 12]


def test_shadows_fall_south_east_of_tall_things():
    grid = Grid.square(24, tuned_for=24)  # k = 1: shadows 2 pixels away
    layers = Layers(np.full(grid.shape, CODE["grass"], np.uint8), np.zeros(grid.shape),
                    np.zeros(grid.shape))
    house = np.zeros(grid.shape, bool)
    house[8:10, 8:10] = True
    shadow = reflectance.cast_shadows(grid, layers, house, np.zeros(grid.shape), np.zeros_like(house))
    assert shadow[11, 11] and shadow[13, 13] and not shadow[6, 6] and not (shadow & house).any()


def test_swath_edge_blanks_the_lower_left_corner():
    grid = Grid.square(192, tuned_for=768)
    data = np.ones((4, 192, 192), np.uint16)
    valid = reflectance.swath_edge(grid, data)
    assert not valid[-1, 0] and valid[0, 0] and valid[-1, -1]
    assert (data[:, ~valid] == demo.NODATA).all() and (data[:, valid] == 1).all()


def test_fill_nodata_copies_the_nearest_valid_pixel():
    data = np.array([[[1.0, 9.0, 9.0, 9.0, 5.0]]])
    valid = np.array([[True, False, False, False, True]])
    filled = fill_nodata(data, valid)
    assert filled[0, 0, 1] == 1.0 and filled[0, 0, 3] == 5.0 and filled[0, 0, 0] == 1.0
    assert fill_nodata(data, np.ones_like(valid)) is data  # nothing to fill


# ------------------------------------------------------------ plumbing


def test_quicklook_builds_on_an_agg_canvas_without_pyplot(tmp_path):
    code = (
        "import sys, numpy as np\n"
        "import matplotlib\n"
        "before = matplotlib.rcParams._get_backend_or_none()\n"
        "from geosr.demo import quicklook_figure, write_quicklook\n"
        "p = [('a', np.ones((4, 6, 6)) * 0.1), ('b', np.ones((4, 6, 6)) * 0.2)]\n"
        f"write_quicklook({str(tmp_path / 'q.png')!r}, p)\n"
        "fig = quicklook_figure(p)\n"
        "print(type(fig.canvas).__name__, 'matplotlib.pyplot' in sys.modules,\n"
        "      matplotlib.rcParams._get_backend_or_none() == before)\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.split() == ["FigureCanvasAgg", "False", "True"]
    assert (tmp_path / "q.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # the PNG signature


def test_demo_modules_do_not_print():
    import ast
    from pathlib import Path

    for path in Path(demo.__file__).parent.glob("*.py"):
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
                assert node.func.id != "print", f"{path.name}:{node.lineno} prints"


def test_run_demo_logs_its_steps_without_an_echo(tmp_path, tiny_sparse_x3, caplog):
    model = tmp_path / "m.npz"
    tiny_sparse_x3.save(model)
    with caplog.at_level(logging.INFO, logger="geosr.demo.run"):
        demo.run_demo(tmp_path / "out", size=192, model=model)
    messages = [r.getMessage() for r in caplog.records if r.name == "geosr.demo.run"]
    assert messages[0].startswith("generating the invented valley (192 x 192")
    assert messages[1] == "magnifying the 64 x 64 input x3"
