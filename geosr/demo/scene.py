"""The demo scenario: an invented river valley, magnified x3, with a quick look.

Everything here is made up: the scene is generated procedurally from a seed
(no real place, no real data). It has parcels of different crops with
tramlines and furrows, field margins, hedges and tree rows, a winding river
with gravel bars and riparian trees, a reservoir behind a dam, roads with a
bridge, farm tracks, farmsteads with shadows, wooded hills with relief
shading, and a nodata wedge in one corner, like the edge of a swath.

Bands are blue, green, red and near-infrared surface reflectance scaled by
10,000 (uint16, nodata 0), on a UTM grid (zone 33 north) at invented
coordinates. :func:`run_demo` writes the 3 m "truth", the 9 m input made from
it with :func:`geosr.core.resample.degrade`, the input magnified x3 by the shipped
model, and a PNG that shows the same detail crop by nearest neighbour,
bicubic, geosr and the truth side by side.
"""

from __future__ import annotations

import dataclasses
import math
import os
import time

import numpy as np
from scipy import ndimage

from ..errors import InputError, ModelError, ParameterError, RunError

__all__ = [
    "BANDS",
    "LANDCOVER",
    "VEGETATION",
    "WATER",
    "SPECTRA",
    "DemoScene",
    "make_scene",
    "degrade_scene",
    "write_scene",
    "read_scene",
    "detail_window",
    "quicklook_figure",
    "write_quicklook",
    "run_demo",
    "CAPTION",
]

#: Band names, in file order.
BANDS = ("blue", "green", "red", "nir")

#: Land-cover classes of the generator.
LANDCOVER = (
    "river",
    "reservoir",
    "green-crop",
    "ripe-cereal",
    "bare-soil",
    "grass",
    "trees",
    "road",
    "track",
    "red-roof",
    "grey-roof",
    "concrete",
    "gravel",
)
_C = {name: i for i, name in enumerate(LANDCOVER)}

#: Classes where green vegetation dominates (NIR well above red).
VEGETATION = ("green-crop", "ripe-cereal", "grass", "trees")
#: Open water (NIR below red).
WATER = ("river", "reservoir")

#: Surface reflectance (blue, green, red, NIR) of each class. Typical values
#: for these covers as commonly plotted in remote-sensing textbooks (from
#: memory, rounded): vegetation has a red absorption and a high NIR plateau,
#: water absorbs NIR, soils rise slowly from blue to NIR.
SPECTRA = {
    "river": (0.070, 0.080, 0.060, 0.025),
    "reservoir": (0.060, 0.062, 0.036, 0.012),
    "green-crop": (0.035, 0.075, 0.040, 0.420),
    "ripe-cereal": (0.060, 0.095, 0.125, 0.290),
    "bare-soil": (0.085, 0.115, 0.160, 0.230),
    "grass": (0.040, 0.085, 0.060, 0.330),
    "trees": (0.025, 0.050, 0.030, 0.300),
    "road": (0.085, 0.095, 0.105, 0.125),
    "track": (0.110, 0.140, 0.180, 0.230),
    "red-roof": (0.070, 0.085, 0.210, 0.260),
    "grey-roof": (0.200, 0.210, 0.220, 0.240),
    "concrete": (0.170, 0.180, 0.190, 0.215),
    "gravel": (0.150, 0.180, 0.220, 0.260),
}

#: Reflectance is stored as round(reflectance * REFLECTANCE_SCALE) in uint16.
REFLECTANCE_SCALE = 10_000
NODATA = 0
#: UTM zone 33 north on WGS 84; the coordinates below are invented.
CRS = "EPSG:32633"
ORIGIN = (413_000.0, 5_142_000.0)  # west, north of the truth grid, metres
PIXEL = 3.0  # metres, truth grid
SCALE = 3
SIZE = 768

CAPTION = (
    "Demo scene: procedurally generated, no real place and no real data. "
    "The geosr panel's fine detail is synthesized by a statistical model, not measured."
)


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
    """

    data: np.ndarray
    valid: np.ndarray
    landcover: np.ndarray
    transform: object
    crs: str
    pixel: float
    landmarks: dict

    def mask_of(self, *names):
        """Boolean mask of valid pixels of the given land-cover classes."""
        codes = [_C[n] for n in names]
        return np.isin(self.landcover, codes) & self.valid


# ------------------------------------------------------------ generation


def _field(rng, shape, sigma):
    """Smooth random field of unit standard deviation.

    Wide fields are drawn on a coarser grid and interpolated (same look,
    a fraction of the filtering time).
    """
    step = int(sigma // 3) if sigma >= 6 else 1
    if step > 1:
        small = tuple(-(-n // step) + 2 for n in shape)
        f = ndimage.gaussian_filter(rng.standard_normal(small), sigma / step, mode="reflect")
        f = ndimage.zoom(f, step, order=1, mode="nearest", grid_mode=True)[: shape[0], : shape[1]]
    else:
        f = ndimage.gaussian_filter(rng.standard_normal(shape), sigma, mode="reflect")
    f = f - f.mean()
    return f / (f.std() + 1e-12)


def _fractal(rng, shape, sigmas, weights):
    return sum(w * _field(rng, shape, s) for s, w in zip(sigmas, weights))


def _hillshade(elev, azimuth=315.0, altitude=45.0):
    """Relief shading in [0, 1] (the usual slope/aspect formula, sun from the north-west)."""
    dy, dx = np.gradient(elev)
    slope = np.arctan(np.hypot(dx, dy))
    aspect = np.arctan2(dy, -dx)
    zenith = math.radians(90.0 - altitude)
    az = math.radians(360.0 - azimuth + 90.0)
    shade = math.cos(zenith) * np.cos(slope) + math.sin(zenith) * np.sin(slope) * np.cos(az - aspect)
    return np.clip(shade, 0.0, 1.0)


def _paint_crowns(height, centres, radii):
    """Add dome-shaped crowns (max-combined) to a canopy height field in place."""
    rows, cols = height.shape
    for (cy, cx), r in zip(centres, radii):
        r0 = int(math.ceil(r)) + 1
        y0, y1 = max(int(cy) - r0, 0), min(int(cy) + r0 + 1, rows)
        x0, x1 = max(int(cx) - r0, 0), min(int(cx) + r0 + 1, cols)
        if y0 >= y1 or x0 >= x1:
            continue
        yy, xx = np.ogrid[y0:y1, x0:x1]
        d2 = ((yy - cy) ** 2 + (xx - cx) ** 2) / (r * r)
        dome = np.sqrt(np.clip(1.0 - d2, 0.0, None)) * r
        np.maximum(height[y0:y1, x0:x1], dome, out=height[y0:y1, x0:x1])


def _line_points(rng, p0, p1, spacing, jitter):
    """Points every ``spacing`` pixels from p0 to p1 (row, col), jittered."""
    p0, p1 = np.asarray(p0, float), np.asarray(p1, float)
    n = max(int(np.hypot(*(p1 - p0)) / spacing), 1)
    t = (np.arange(n) + 0.5) / n
    pts = p0[None, :] + t[:, None] * (p1 - p0)[None, :]
    return pts + rng.normal(0.0, jitter, pts.shape)


def _rotated_box(shape, centre, half, theta):
    """Mask of a rectangle of half-sizes ``half`` (along, across) rotated by theta."""
    rows, cols = shape
    yy, xx = np.mgrid[0:rows, 0:cols]
    dy, dx = yy - centre[0], xx - centre[1]
    a = dx * math.cos(theta) + dy * math.sin(theta)
    b = -dx * math.sin(theta) + dy * math.cos(theta)
    return (np.abs(a) <= half[0]) & (np.abs(b) <= half[1])


def make_scene(size=SIZE, seed=0):
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
        ``data`` of shape (4, size, size), uint16.
    """
    from affine import Affine

    if isinstance(size, bool) or not isinstance(size, (int, np.integer)) or size < 192 or size % SCALE:
        raise ParameterError(
            f"The 'size' parameter must be an integer multiple of {SCALE} of at least 192, got {size!r}"
        )
    size = int(size)
    rng = np.random.default_rng(seed)
    n = size
    shape = (n, n)
    k = n / SIZE  # lengths below are tuned for 768 pixels
    yy, xx = np.mgrid[0:n, 0:n].astype(np.float64)

    # --- river centre line x_c(y): two meander wavelengths and a drift
    ph = rng.uniform(0, 2 * math.pi, 3)
    ys = np.arange(n, dtype=np.float64)
    xc = (
        0.45 * n
        + 70 * k * np.sin(2 * math.pi * ys / (520 * k) + ph[0])
        + 24 * k * np.sin(2 * math.pi * ys / (170 * k) + ph[1])
        + 10 * k * np.sin(2 * math.pi * ys / (95 * k) + ph[2])
    )
    slope_c = np.gradient(xc)
    d_river = (xx - xc[:, None]) / np.sqrt(1.0 + slope_c[:, None] ** 2)  # signed, ~perpendicular
    half_w = 6.5 * k + 1.5 * k * _field(rng, (n, 1), 40)[:, 0]
    curvature = np.gradient(slope_c)

    # --- relief: a valley floor rising to wooded hills, plus rolling ground
    rolling = _fractal(rng, shape, (6 * k, 20 * k, 60 * k), (0.2, 0.6, 1.4))
    elev = 0.05 * np.abs(d_river) + 0.00018 * np.abs(d_river) ** 2 + 4.0 * rolling
    shade = _hillshade(elev * 1.6)
    flat = _hillshade(np.zeros((3, 3)))[1, 1]
    relief = 1.0 + 0.9 * (shade - flat)

    lc = np.full(shape, _C["grass"], dtype=np.uint8)
    texture = 0.04 * _field(rng, shape, 1.0) + 0.05 * _field(rng, shape, 8 * k)
    nir_vigour = np.zeros(shape)

    # --- parcels in a rotated frame: strips of random widths, cut into fields
    theta = rng.uniform(0.12, 0.28)
    u = xx * math.cos(theta) + yy * math.sin(theta)
    v = -xx * math.sin(theta) + yy * math.cos(theta)
    u_edges = [u.min() - 1]
    while u_edges[-1] < u.max():
        u_edges.append(u_edges[-1] + rng.uniform(45, 120) * k)
    crops = ("green-crop", "ripe-cereal", "bare-soil", "grass", "orchard")
    crop_p = (0.3, 0.27, 0.15, 0.18, 0.10)
    hedge_lines = []  # ((u0, v0), (u1, v1)) in the rotated frame
    track_edges = []
    orchards = []
    strip = np.searchsorted(u_edges, u) - 1
    margin = np.zeros(shape, dtype=bool)
    for s in range(len(u_edges) - 1):
        in_strip = strip == s
        if not in_strip.any():
            continue
        vs = v[in_strip]
        v_edges = [vs.min() - 1]
        while v_edges[-1] < vs.max():
            v_edges.append(v_edges[-1] + rng.uniform(35, 100) * k)
        row = np.searchsorted(v_edges, v[in_strip]) - 1
        lc_strip = lc[in_strip]
        tex_strip = texture[in_strip]
        vig_strip = nir_vigour[in_strip]
        us, vv = u[in_strip], v[in_strip]
        for r in range(len(v_edges) - 1):
            here = row == r
            crop = crops[rng.choice(len(crops), p=crop_p)]
            if crop == "orchard":
                lc_strip[here] = _C["grass"]
                orchards.append((u_edges[s], u_edges[s + 1], v_edges[r], v_edges[r + 1]))
            else:
                lc_strip[here] = _C[crop]
            # tramlines, drill rows or furrows at a parcel-specific direction
            period = rng.uniform(4.0, 9.0)
            along_u = rng.random() < 0.5
            coord = us[here] if along_u else vv[here]
            amp = {"bare-soil": 0.08, "ripe-cereal": 0.05, "green-crop": 0.04}.get(crop, 0.015)
            tex_strip[here] += amp * np.sin(2 * math.pi * coord / period + rng.uniform(0, 6.3))
            tex_strip[here] += rng.normal(0.0, 0.05)  # parcel brightness
            vig_strip[here] = rng.normal(0.0, 0.06)  # crop vigour in the NIR
            if rng.random() < 0.35:
                hedge_lines.append(((u_edges[s], v_edges[r]), (u_edges[s + 1], v_edges[r])))
        lc[in_strip] = lc_strip
        texture[in_strip] = tex_strip
        nir_vigour[in_strip] = vig_strip
        # grass margins along every field edge
        dv = np.abs(vv[:, None] - np.asarray(v_edges)[None, :]).min(axis=1)
        du = np.minimum(np.abs(us - u_edges[s]), np.abs(us - u_edges[s + 1]))
        margin[in_strip] = (dv < 1.2) | (du < 1.2)
        lo, hi = vs.min(), vs.max()
        roll = rng.random()
        if roll < 0.4:
            hedge_lines.append(((u_edges[s], lo), (u_edges[s], hi)))
        elif roll < 0.65:
            track_edges.append(u_edges[s])
    lc[margin] = _C["grass"]
    if not track_edges and len(u_edges) > 3:
        track_edges.append(u_edges[len(u_edges) // 2])

    # --- wooded hills away from the valley floor
    forest = (elev > np.quantile(elev, 0.84)) & (_field(rng, shape, 10 * k) > -0.6)
    lc[forest] = _C["trees"]
    canopy = _field(rng, shape, 1.1 * k)
    texture[forest] += 0.10 * canopy[forest]
    gaps = forest & (canopy < -1.3)
    lc[gaps] = _C["grass"]

    # --- farm tracks along some strip edges
    for ue in track_edges:
        lc[(np.abs(u - ue) < 1.1) & ~forest] = _C["track"]

    # --- river, with gravel bars on the inside of bends
    river = np.abs(d_river) < half_w[:, None]
    bar_side = -np.sign(curvature)[:, None]  # inside of the bend
    bars = (
        ~river
        & (np.abs(d_river) < half_w[:, None] + 4 * k)
        & (np.sign(d_river) == bar_side)
        & (np.abs(curvature)[:, None] > np.quantile(np.abs(curvature), 0.55))
    )
    lc[bars] = _C["gravel"]
    lc[river] = _C["river"]

    # --- reservoir behind a dam, with an outflow stream to the river
    rc = np.array([0.2 * n, 0.78 * n])
    radius = 78 * k
    ang = np.arctan2(yy - rc[0], xx - rc[1])
    wobble = sum(a * np.cos(m * ang + rng.uniform(0, 6.3)) for m, a in ((2, 0.12), (3, 0.08), (5, 0.04)))
    blob = np.hypot(yy - rc[0], xx - rc[1]) < radius * (1.0 + wobble)
    dam_col = rc[1] - 0.55 * radius
    reservoir = blob & (xx >= dam_col)
    dam_rows = np.where(reservoir.any(axis=1))[0]
    dam = (
        (xx >= dam_col - 4 * k)
        & (xx < dam_col)
        & (yy >= dam_rows.min() - 2)
        & (yy <= dam_rows.max() + 2)
    )
    lc[reservoir] = _C["reservoir"]
    lc[dam] = _C["concrete"]
    stream_row = rc[0] + 6 * k * np.sin(2 * math.pi * xx[0] / (60 * k))
    outflow_x = xx[0] < dam_col - 4 * k
    outflow_x &= xx[0] > xc[int(rc[0])]
    stream = (np.abs(yy - stream_row[None, :]) < 1.4 * k) & outflow_x[None, :]
    lc[stream & ~river] = _C["river"]

    # --- roads: one across the valley (bridge over the river), one joining it
    ph2 = rng.uniform(0, 6.3)
    yr = 0.6 * n + 26 * k * np.sin(2 * math.pi * xx[0] / (700 * k) + ph2)
    road1 = np.abs(yy - yr[None, :]) < 2.3 * k
    xr2 = 0.88 * n + 18 * k * np.sin(2 * math.pi * ys / (800 * k))
    road2 = (np.abs(xx - xr2[:, None]) < 2.0 * k) & (yy > yr[None, :])
    roads = road1 | road2
    lc[roads] = _C["road"]
    plain = np.isin(lc, [_C[c] for c in ("river", "reservoir", "road", "track", "gravel", "concrete")])
    texture[plain] = 0.03 * _field(rng, shape, 1.0)[plain]
    bridge_col = int(np.argmin(np.abs(np.arange(n) - xc[np.clip(yr.astype(int), 0, n - 1)])))
    bridge = (int(yr[bridge_col]), bridge_col)

    # --- farmsteads: a yard with sheds and houses beside a road
    sites = [
        (yr[min(bridge_col + int(60 * k), n - 1)] + 26 * k, bridge_col + 60 * k),
        (yr[int(min(0.88 * n, n - 1))] + 40 * k, 0.88 * n - 34 * k),
        (yr[max(bridge_col - int(190 * k), 0)] - 28 * k, bridge_col - 190 * k),
    ]
    buildings = np.zeros(shape, dtype=bool)
    farms = []
    for cy, cx in sites:
        if not (30 <= cy < n - 30 and 30 <= cx < n - 30):
            continue
        farms.append((int(cy), int(cx)))
        yard = _rotated_box(shape, (cy, cx), (24 * k, 18 * k), theta) & ~roads & ~river
        lc[yard] = _C["concrete"]
        texture[yard] += 0.06 * _field(rng, shape, 2.0)[yard]
        for _ in range(rng.integers(3, 6)):
            off = rng.uniform(-12, 12, 2) * k
            half = (rng.uniform(3, 10) * k, rng.uniform(2.5, 6) * k)
            box = _rotated_box(shape, (cy + off[0], cx + off[1]), half, theta) & yard
            roof = "red-roof" if rng.random() < 0.55 else "grey-roof"
            lc[box] = _C[roof]
            buildings |= box
            # a ridge line: the two roof halves lit differently
            b = -(xx - cx - off[1]) * math.sin(theta) + (yy - cy - off[0]) * math.cos(theta)
            texture[box & (b > 0)] -= 0.12
    # --- trees: hedges, riparian trees, orchards
    canopy_h = np.zeros(shape)
    centres, radii = [], []

    def to_xy(pu, pv):
        return pu * math.sin(theta) + pv * math.cos(theta), pu * math.cos(theta) - pv * math.sin(theta)

    for (u0, v0), (u1, v1) in hedge_lines:
        r0, c0 = to_xy(u0, v0)
        r1, c1 = to_xy(u1, v1)
        pts = _line_points(rng, (r0, c0), (r1, c1), 3.2 * k, 0.6 * k)
        centres.extend(pts)
        radii.extend(rng.uniform(1.6, 2.9, len(pts)) * k)
    for u0, u1, v0, v1 in orchards:
        for pu in np.arange(u0 + 4, u1 - 3, 6.0 * k):
            for pv in np.arange(v0 + 4, v1 - 3, 6.0 * k):
                r, c = to_xy(pu, pv)
                centres.append((r, c))
                radii.append(rng.uniform(1.5, 2.2) * k)
    bank = (np.abs(d_river) > half_w[:, None] + 1) & (np.abs(d_river) < half_w[:, None] + 9 * k)
    bank &= _field(rng, shape, 6 * k) > 0.2
    by, bx = np.nonzero(bank)
    pick = rng.random(by.size) < 0.06
    centres.extend(np.column_stack([by[pick], bx[pick]]) + rng.normal(0, 0.5, (pick.sum(), 2)))
    radii.extend(rng.uniform(2.0, 3.6, pick.sum()) * k)
    centres = np.asarray(centres, float).reshape(-1, 2)
    radii = np.asarray(radii, float)
    inside = (centres[:, 0] >= 0) & (centres[:, 0] < n) & (centres[:, 1] >= 0) & (centres[:, 1] < n)
    centres, radii = centres[inside], radii[inside]
    ground = lc[centres[:, 0].astype(int), centres[:, 1].astype(int)]
    allowed = np.isin(ground, [_C[c] for c in ("grass", "green-crop", "ripe-cereal", "bare-soil", "gravel", "track")])
    _paint_crowns(canopy_h, centres[allowed], radii[allowed])
    hard = np.isin(lc, [_C[c] for c in ("road", "river", "reservoir", "red-roof", "grey-roof", "concrete")])
    crowns = (canopy_h > 0.15) & ~hard
    lc[crowns] = _C["trees"]
    gy, gx = np.gradient(canopy_h)
    lit = np.where(crowns, 0.18 * np.tanh(gx + gy) + 0.12 * (canopy_h / 3.0 - 0.5), 0.0)
    texture += lit

    # --- shadows cast to the south-east (sun in the north-west)
    sh = int(round(2 * k)) or 1
    tall = np.where(buildings, 4.0, canopy_h)
    shadow = np.zeros(shape, dtype=bool)
    shadow[sh:, sh:] = tall[:-sh, :-sh] > 0.5
    shadow[2 * sh:, 2 * sh:] |= tall[: -2 * sh, : -2 * sh] > 2.0
    shadow &= ~buildings & ~crowns & ~np.isin(lc, [_C["river"], _C["reservoir"]])

    # --- compose the reflectance
    spectra = np.array([SPECTRA[c] for c in LANDCOVER])  # (classes, 4)
    refl = spectra[lc].transpose(2, 0, 1).copy()  # (4, n, n)
    water = np.isin(lc, [_C["river"], _C["reservoir"]])
    land = ~water
    factor = 1.0 + texture
    factor[land] *= relief[land]
    refl *= factor[None]
    veg = np.isin(lc, [_C[c] for c in VEGETATION])
    refl[3][veg] *= 1.0 + nir_vigour[veg]
    sediment = 1.0 + 0.12 * _field(rng, shape, 25 * k) + 0.03 * _field(rng, shape, 1.5)
    refl[:, water] *= sediment[water][None]
    refl[:, shadow] *= np.array([0.55, 0.5, 0.45, 0.4])[:, None]
    refl = ndimage.gaussian_filter(refl, sigma=(0, 0.55, 0.55), mode="reflect")  # optics
    refl += rng.normal(0.0, 0.0012, refl.shape)  # sensor noise
    data = np.clip(np.rint(refl * REFLECTANCE_SCALE), 1, 65535).astype(np.uint16)

    # --- nodata wedge in the lower-left corner, like the edge of a swath
    valid = ~(xx < 0.2 * (yy - 0.35 * n))
    data[:, ~valid] = NODATA

    transform = Affine(PIXEL, 0.0, ORIGIN[0], 0.0, -PIXEL, ORIGIN[1])
    landmarks = {"bridge": bridge}
    if farms:
        landmarks["farm"] = farms[0]
    landmarks["reservoir"] = (int(rc[0]), int(rc[1]))
    return DemoScene(data, valid, lc, transform, CRS, PIXEL, landmarks)


def degrade_scene(scene, scale=SCALE):
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

    data = scene.data.astype(np.float64)
    if not scene.valid.all():
        _, (iy, ix) = ndimage.distance_transform_edt(~scene.valid, return_indices=True)
        data = data[:, iy, ix]
    low = degrade(data, scale)
    rows, cols = low.shape[-2:]
    valid = scene.valid[: rows * scale, : cols * scale].reshape(rows, scale, cols, scale).all(axis=(1, 3))
    out = np.clip(np.rint(low), 1, 65535).astype(np.uint16)
    out[:, ~valid] = NODATA
    lc = scene.landcover[scale // 2 :: scale, scale // 2 :: scale][:rows, :cols]
    transform = scene.transform @ Affine.scale(scale)
    marks = {k: (r // scale, c // scale) for k, (r, c) in scene.landmarks.items()}
    return DemoScene(out, valid, lc, transform, scene.crs, scene.pixel * scale, marks)


def write_scene(path, scene, description=None):
    """Write a scene as a tiled, compressed GeoTIFF (nodata 0, scales 1e-4)."""
    import rasterio

    count, rows, cols = scene.data.shape
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
        dst.descriptions = BANDS[:count]
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


def read_scene(path):
    """Read a 4-band demo raster back as (data uint16 (4, rows, cols), valid mask)."""
    import rasterio

    with rasterio.open(path) as src:
        data = src.read()
        valid = src.dataset_mask() > 0
    return data, valid


# ------------------------------------------------------------- quick look


def detail_window(scene_shape, landmarks, size=192, scale=SCALE):
    """The detail crop of the quick look on the truth grid.

    Centred between the bridge and the nearest farmstead, clipped to the
    grid, aligned to the coarse pixels.

    Returns
    -------
    tuple of slice
        (rows, cols) slices of length ``size`` (a multiple of ``scale``).
    """
    rows, cols = scene_shape[-2:]
    size = min(size - size % scale, rows - rows % scale, cols - cols % scale)
    pts = [landmarks[k] for k in ("bridge", "farm") if k in landmarks]
    cy, cx = np.mean(pts, axis=0) if pts else (rows / 2, cols / 2)
    r0 = int(np.clip(cy - size / 2, 0, rows - size)) // scale * scale
    c0 = int(np.clip(cx - size / 2, 0, cols - size)) // scale * scale
    return slice(r0, r0 + size), slice(c0, c0 + size)


def _stretch(reference, bands, valid):
    """Per-band 2-98 % linear stretch limits of the reference (common practice)."""
    lo, hi = [], []
    for b in bands:
        vals = reference[b][valid] if valid is not None and valid.any() else reference[b].ravel()
        vals = vals[np.isfinite(vals)]
        if vals.size == 0:
            lo.append(0.0)
            hi.append(1.0)
            continue
        p2, p98 = np.percentile(vals, (2, 98))
        lo.append(p2)
        hi.append(p98 if p98 > p2 else p2 + 1e-6)
    return np.array(lo), np.array(hi)


def _composite(image, bands, lo, hi):
    rgb = np.stack([image[b] for b in bands], axis=-1).astype(np.float64)
    rgb = (rgb - lo) / (hi - lo)
    return np.clip(np.nan_to_num(rgb, nan=0.0), 0.0, 1.0)


def rmse(reference, estimate, valid=None):
    """Root mean square difference over valid pixels of all bands.

    Parameters
    ----------
    reference, estimate : ndarray, shape (bands, rows, cols)
    valid : ndarray of bool, shape (rows, cols), optional
    """
    diff = np.asarray(estimate, np.float64) - np.asarray(reference, np.float64)
    if valid is not None:
        diff = diff[:, valid]
    return float(np.sqrt(np.mean(diff**2))) if diff.size else float("nan")


def quicklook_figure(panels, *, reference=None, valid=None, caption=CAPTION, title=None,
                     rgb=(2, 1, 0), cir=(3, 2, 1)):
    """The quick-look figure: one column per panel, true colour and colour infrared.

    Parameters
    ----------
    panels : sequence of (str, ndarray)
        Label and image, each of shape (4, rows, cols), reflectance floats
        (blue, green, red, NIR), all of one shape.
    reference : ndarray, shape (4, rows, cols), optional
        The image the stretch is taken from (and the RMSE is measured
        against); default the last panel.
    valid : ndarray of bool, shape (rows, cols), optional
        Pixels used for the stretch and the RMSE.
    caption : str
        Printed under the panels.

    Returns
    -------
    matplotlib.figure.Figure
        Not attached to pyplot; save it with ``fig.savefig``.
    """
    from matplotlib.figure import Figure

    if not panels:
        raise InputError("The 'panels' parameter must hold at least one (label, image) pair, got none")
    shape = np.shape(panels[0][1])
    for label, image in panels:
        if np.ndim(image) != 3 or np.shape(image) != shape or shape[0] < 4:
            raise InputError(
                f"Every quick-look panel must be an array of shape (4, rows, cols) like the "
                f"first, {shape}, got {np.shape(image)} for {label!r}"
            )
    ref = np.asarray(reference if reference is not None else panels[-1][1], np.float64)
    ncol = len(panels)
    fig = Figure(figsize=(4.0 * ncol, 9.0), dpi=100)
    rows = (("true colour (red, green, blue)", rgb), ("colour infrared (NIR, red, green)", cir))
    lim = {bands: _stretch(ref, bands, valid) for _, bands in rows}
    axes = fig.subplots(2, ncol, squeeze=False)
    for j, (label, image) in enumerate(panels):
        image = np.asarray(image, np.float64)
        if np.array_equal(image, ref):
            head = f"{label}\nreference"
        else:
            head = f"{label}\nRMSE {rmse(ref, image, valid):.4f}"
        for i, (row_label, bands) in enumerate(rows):
            ax = axes[i][j]
            ax.imshow(_composite(image, bands, *lim[bands]), interpolation="nearest")
            ax.set_xticks([])
            ax.set_yticks([])
            if i == 0:
                ax.set_title(head, fontsize=11)
            if j == 0:
                ax.set_ylabel(row_label, fontsize=10)
    if title:
        fig.suptitle(title, fontsize=13)
    fig.text(0.5, 0.015, caption, ha="center", va="bottom", fontsize=9.5, wrap=True)
    fig.subplots_adjust(left=0.04, right=0.99, top=0.88 if title else 0.92, bottom=0.07,
                        wspace=0.04, hspace=0.06)
    return fig


def write_quicklook(path, panels, **kwargs):
    """Write :func:`quicklook_figure` to a PNG file and return its path."""
    fig = quicklook_figure(panels, **kwargs)
    fig.savefig(path, format="png")
    return os.fspath(path)


# --------------------------------------------------------------- the run


def _check_library(scale, model):
    """Fail early, in one line, when magnification is not available."""
    try:
        from ..pipeline.magnify import magnify_raster
    except ImportError as exc:
        raise RunError(
            f"The demo needs geosr.pipeline.magnify.magnify_raster, which this installation does not have ({exc})"
        ) from None
    if model is None:
        try:
            from ..modelfile import default_model_path
        except ImportError:
            raise RunError(
                "The demo needs geosr.modelfile.default_model_path, which this installation does not have"
            ) from None
        path = default_model_path(scale)
        if not path.is_file():
            raise ModelError(
                f"The demo needs the model shipped for x{scale} (geosr/models/{path.name}), "
                "which this installation does not have; pass a model file with --model"
            )
    return magnify_raster


def run_demo(outdir, *, seed=0, size=SIZE, model=None, quiet=False, echo=None):
    """Generate the demo scene, magnify its coarse version x3, write a quick look.

    Writes into ``outdir`` (created if needed; earlier demo files there are
    replaced): ``valley-truth-3m.tif`` (the generated scene),
    ``valley-input-9m.tif`` (degraded x3: the demo input),
    ``valley-geosr-x3.tif`` (the input magnified by geosr) and
    ``valley-quicklook.png``.

    Parameters
    ----------
    outdir : str or os.PathLike
    seed : int
        Seed of the scene; the same seed gives the same files.
    size : int
        Truth grid side in pixels (multiple of 3).
    model : str, os.PathLike, CoupledDictionary or None
        The model to magnify with; None uses the model shipped for x3.
    quiet : bool
        No progress from the magnification.
    echo : callable, optional
        Called with a progress line for each step.

    Returns
    -------
    dict
        Paths by role: ``"truth"``, ``"input"``, ``"output"``, ``"quicklook"``,
        and ``"seconds"``, the time taken.
    """
    from ..core.resample import upscale_bicubic

    say = echo or (lambda message: None)
    start = time.perf_counter()
    magnify_raster = _check_library(SCALE, model)
    outdir = os.fspath(outdir)
    if os.path.exists(outdir) and not os.path.isdir(outdir):
        raise ParameterError(f"The 'outdir' parameter must be a folder, got the file {outdir!r}")
    os.makedirs(outdir, exist_ok=True)
    paths = {
        "truth": os.path.join(outdir, "valley-truth-3m.tif"),
        "input": os.path.join(outdir, "valley-input-9m.tif"),
        "output": os.path.join(outdir, f"valley-geosr-x{SCALE}.tif"),
        "quicklook": os.path.join(outdir, "valley-quicklook.png"),
    }
    say(f"generating the invented valley ({size} x {size} at {PIXEL:g} m, seed {seed})")
    truth = make_scene(size, seed)
    coarse = degrade_scene(truth, SCALE)
    write_scene(paths["truth"], truth,
                "Demo truth: procedurally generated scene, no real place, no real data.")
    write_scene(paths["input"], coarse,
                f"Demo input: the demo truth degraded x{SCALE} (antialiased bicubic).")
    say(f"magnifying the {coarse.data.shape[2]} x {coarse.data.shape[1]} input x{SCALE}")
    magnify_raster(paths["input"], paths["output"], model, scale=SCALE, overwrite=True, quiet=quiet)

    out, out_valid = read_scene(paths["output"])
    win = detail_window(truth.data.shape, truth.landmarks)
    lwin = tuple(slice(s.start // SCALE, s.stop // SCALE) for s in win)
    f = 1.0 / REFLECTANCE_SCALE
    low = coarse.data[(slice(None),) + lwin].astype(np.float64) * f
    nearest = np.repeat(np.repeat(low, SCALE, axis=1), SCALE, axis=2)
    # bicubic of the whole input, then cropped, so the crop has real context
    filled = coarse.data.astype(np.float64)
    if not coarse.valid.all():
        _, (iy, ix) = ndimage.distance_transform_edt(~coarse.valid, return_indices=True)
        filled = filled[:, iy, ix]
    bicubic = upscale_bicubic(filled, SCALE)[(slice(None),) + win] * f
    geosr = out[(slice(None),) + win].astype(np.float64) * f
    ref = truth.data[(slice(None),) + win].astype(np.float64) * f
    valid = truth.valid[win] & out_valid[win]
    write_quicklook(
        paths["quicklook"],
        [
            (f"nearest neighbour ({PIXEL * SCALE:g} m input)", nearest),
            ("bicubic", bicubic),
            (f"geosr x{SCALE} (synthesized detail)", geosr),
            (f"truth ({PIXEL:g} m)", ref),
        ],
        reference=ref,
        valid=valid,
        title=f"geosr demo: the same {win[0].stop - win[0].start} x "
        f"{win[1].stop - win[1].start} pixel detail, magnified x{SCALE} from {PIXEL * SCALE:g} m",
    )
    paths["seconds"] = time.perf_counter() - start
    return paths
