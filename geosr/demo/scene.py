"""The demo scene: an invented river valley, its georeferencing, degradation and files.

Everything here is made up: the scene is generated procedurally from a seed
(no real place, no real data). Each landscape feature has its own module,
painted in this order (the order of the random draws, so one seed always
gives one scene): the river's course (:mod:`.water`), the relief
(:mod:`.terrain`), parcels of different crops with tramlines and furrows,
field margins and tracks (:mod:`.fields`), wooded hills (:mod:`.trees`), the
river with gravel bars and a reservoir behind a dam (:mod:`.water`), roads
with a bridge (:mod:`.roads`), farmsteads (:mod:`.buildings`), hedges,
orchards and riparian trees (:mod:`.trees`), then shadows, spectra, optics
and noise (:mod:`.reflectance`), a panchromatic-like band with its own
noise (the guide, drawn last) and a nodata wedge in one corner, like the
edge of a swath.

Bands are blue, green, red and near-infrared surface reflectance scaled by
10,000 (uint16, nodata 0), on a UTM grid (zone 33 north) at invented
coordinates; the guide is one more band on the same grid, stored alike.
"""

from __future__ import annotations

import dataclasses
import os

import numpy as np
from scipy import ndimage

from ..errors import InputError, ParameterError
from . import buildings, fields, reflectance, roads, terrain, trees, water
from .canvas import Grid, Layers
from .landcover import BANDS, CODE, GUIDE_BAND, NODATA, REFLECTANCE_SCALE

__all__ = [
    "CRS",
    "ORIGIN",
    "PIXEL",
    "SCALE",
    "SIZE",
    "DemoScene",
    "degrade_scene",
    "fill_nodata",
    "guide_scene",
    "make_scene",
    "read_scene",
    "write_scene",
]

#: UTM zone 33 north on WGS 84; the coordinates below are invented.
CRS = "EPSG:32633"
ORIGIN = (413_000.0, 5_142_000.0)  # west, north of the truth grid, metres
PIXEL = 3.0  # metres, truth grid
SCALE = 3
SIZE = 768


@dataclasses.dataclass
class DemoScene:
    """A generated scene and its georeferencing.

    Attributes
    ----------
    data : ndarray, shape (4, rows, cols), uint16
        Blue, green, red, NIR reflectance times 10,000; 0 is nodata.
    valid : ndarray, shape (rows, cols), bool
        False in the nodata wedge.
    landcover : ndarray, shape (rows, cols), uint8
        Index into :data:`LANDCOVER` (also under the nodata wedge).
    transform : affine.Affine
    crs : str
    pixel : float
        Ground sample distance in metres.
    landmarks : dict
        Named (row, col) positions, e.g. ``"bridge"``, ``"farm"``.
    guide : ndarray, shape (rows, cols), uint16, or None
        The panchromatic-like band measured on the same grid (reflectance
        times 10,000, 0 is nodata); None for a degraded scene.
    """

    data: np.ndarray
    valid: np.ndarray
    landcover: np.ndarray
    transform: object
    crs: str
    pixel: float
    landmarks: dict
    guide: np.ndarray | None = None

    def mask_of(self, *names):
        """Boolean mask of valid pixels of the given land-cover classes."""
        codes = [CODE[n] for n in names]
        return np.isin(self.landcover, codes) & self.valid


def _check_size(size):
    if isinstance(size, bool) or not isinstance(size, (int, np.integer)) or size < 192 or size % SCALE:
        raise ParameterError(
            f"The 'size' parameter must be an integer multiple of {SCALE} of at least 192, got {size!r}"
        )
    return int(size)


def _paint_landscape(rng, grid):
    """Paint every feature, in the order of the random draws; return what the bands need."""
    course = water.river_course(rng, grid)
    elev, shading = terrain.relief(rng, grid, course.distance)
    layers = Layers(np.full(grid.shape, CODE["grass"], dtype=np.uint8),
                    terrain.base_texture(rng, grid), np.zeros(grid.shape))
    parcels = fields.paint_parcels(rng, grid, layers)
    forest = trees.paint_forest(rng, grid, layers, elev)
    fields.paint_tracks(layers, parcels, forest)
    river = water.paint_river(layers, course, grid.k)
    centre = water.paint_reservoir(rng, grid, layers, course, river)
    road = roads.paint_roads(rng, grid, layers, course)
    roads.smooth_hard_surfaces(rng, grid, layers)
    houses, farms = buildings.paint_farmsteads(rng, grid, layers, road, river, parcels.theta)
    centres, radii = trees.crown_sites(rng, grid, layers, parcels, course)
    height, crowns = trees.paint_crowns(grid, layers, centres, radii)
    shadow = reflectance.cast_shadows(grid, layers, houses, height, crowns)
    landmarks = {"bridge": road.bridge}
    if farms:
        landmarks["farm"] = farms[0]
    landmarks["reservoir"] = (int(centre[0]), int(centre[1]))
    return layers, shading, shadow, landmarks


def make_scene(size: int = SIZE, seed: int | None = 0) -> DemoScene:
    """Generate the invented river valley.

    Parameters
    ----------
    size : int
        Rows and columns of the truth grid (3 m pixels); a multiple of 3,
        at least 192.
    seed : int
        Seed of every random choice: the same seed gives the same scene.

    Returns
    -------
    DemoScene
        ``data`` of shape (4, size, size), uint16, and ``guide`` of shape
        (size, size), uint16: the panchromatic-like band (see
        :data:`~geosr.demo.landcover.PAN_WEIGHTS`) with its own sensor noise,
        drawn after every other random choice so the four bands do not
        depend on it.
    """
    from affine import Affine

    size = _check_size(size)
    rng = np.random.default_rng(seed)
    grid = Grid.square(size, tuned_for=SIZE)
    layers, shading, shadow, landmarks = _paint_landscape(rng, grid)
    refl = reflectance.surface(rng, grid, layers, shading, shadow)
    data = reflectance.record(rng, refl)
    guide = reflectance.panchromatic(rng, refl)
    valid = reflectance.swath_edge(grid, data)
    guide[~valid] = NODATA
    transform = Affine(PIXEL, 0.0, ORIGIN[0], 0.0, -PIXEL, ORIGIN[1])
    return DemoScene(data, valid, layers.landcover, transform, CRS, PIXEL, landmarks, guide)


def guide_scene(scene: DemoScene) -> DemoScene:
    """The scene's guide band as a one-band scene on the same grid, for :func:`write_scene`.

    Raises
    ------
    InputError
        The scene has no guide (a degraded scene).
    """
    if scene.guide is None:
        raise InputError("The scene must have a guide band (one made by make_scene), got None")
    return dataclasses.replace(scene, data=scene.guide[None], guide=None)


def degrade_scene(scene: DemoScene, scale: int = SCALE) -> DemoScene:
    """The coarse input: the truth degraded by ``scale`` with geosr's default model.

    Nodata pixels are filled from their nearest valid neighbours before the
    degradation (so no zeros leak into valid pixels), and a coarse pixel is
    valid only when all of its ``scale x scale`` truth pixels are.

    Returns
    -------
    DemoScene
        ``data`` of shape (4, rows // scale, cols // scale), uint16, with the
        transform scaled by ``scale``.
    """
    from affine import Affine

    from ..core.resample import degrade

    low = degrade(fill_nodata(scene.data.astype(np.float64), scene.valid), scale)
    rows, cols = low.shape[-2:]
    blocks = scene.valid[: rows * scale, : cols * scale].reshape(rows, scale, cols, scale)
    valid = np.all(blocks, axis=(1, 3))
    out = np.clip(np.rint(low), 1, 65535).astype(np.uint16)
    out[:, ~valid] = NODATA
    lc = scene.landcover[scale // 2 :: scale, scale // 2 :: scale][:rows, :cols]
    transform = scene.transform @ Affine.scale(scale)
    marks = {k: (r // scale, c // scale) for k, (r, c) in scene.landmarks.items()}
    return DemoScene(out, valid, lc, transform, scene.crs, scene.pixel * scale, marks)


def fill_nodata(data: np.ndarray, valid: np.ndarray) -> np.ndarray:
    """``data`` (bands, rows, cols) with invalid pixels copied from their nearest valid ones."""
    if valid.all():
        return data
    _, (iy, ix) = ndimage.distance_transform_edt(~valid, return_indices=True)
    return data[:, iy, ix]


def write_scene(path: str | os.PathLike, scene: DemoScene, description: str | None = None) -> str:
    """Write a scene as a tiled, compressed GeoTIFF (nodata 0, scales 1e-4).

    Four bands are named blue, green, red and NIR; one band (a
    :func:`guide_scene`) is named ``"pan"``.
    """
    import rasterio

    count, rows, cols = scene.data.shape
    names = (GUIDE_BAND,) if count == 1 else BANDS[:count]
    profile = {
        "driver": "GTiff",
        "width": cols,
        "height": rows,
        "count": count,
        "dtype": "uint16",
        "crs": scene.crs,
        "transform": scene.transform,
        "nodata": NODATA,
        "tiled": True,
        "blockxsize": 256 if cols >= 256 else 16 * max(1, cols // 16),
        "blockysize": 256 if rows >= 256 else 16 * max(1, rows // 16),
        "compress": "deflate",
        "predictor": 2,
    }
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(scene.data)
        dst.descriptions = names
        dst.scales = (1.0 / REFLECTANCE_SCALE,) * count
        dst.offsets = (0.0,) * count
        dst.update_tags(
            AREA_OR_POINT="Area",
            GEOSR_DEMO="yes",
            DEMO_NOTE="Procedurally generated scene: no real place, no real data.",
        )
        if description:
            dst.update_tags(TIFFTAG_IMAGEDESCRIPTION=description)
    return os.fspath(path)


def read_scene(path: str | os.PathLike) -> tuple[np.ndarray, np.ndarray]:
    """Read a demo raster back as (data uint16 (bands, rows, cols), valid mask)."""
    import rasterio

    with rasterio.open(path) as src:
        data = src.read()
        valid = src.dataset_mask() > 0
    return data, valid
