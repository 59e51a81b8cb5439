"""Geotransforms, ground control points and CRS facts (pyproj is the authority).

A raster magnified by ``s`` covers the same ground with ``s`` times as many
pixels along each axis; its geotransform is the source's composed with a
scaling of pixel coordinates, ``src.transform * Affine.scale(1 / s)``, which
also holds for rotated and sheared transforms. Ground control points keep
their world coordinates while their pixel coordinates (GDAL's continuous
pixel/line, corner based) are multiplied by ``s``; rational polynomial
coefficients (RPCs) get their image offsets and scales changed to match
(:func:`scale_rpcs`).
"""

from __future__ import annotations

import math

import numpy as np
from affine import Affine
from pyproj import CRS as ProjCRS
from pyproj import Transformer
from rasterio.control import GroundControlPoint

__all__ = [
    "scaled_transform",
    "apply_transform",
    "scale_gcps",
    "scale_rpcs",
    "crs_summary",
    "ground_sample_distance",
    "wgs84_bbox",
    "wgs84_footprint",
]


def scaled_transform(transform, scale):
    """Geotransform of the raster magnified by ``scale``.

    Parameters
    ----------
    transform : affine.Affine
    scale : int

    Returns
    -------
    affine.Affine
        ``transform * Affine.scale(1 / scale)``, written out so that it
        does not depend on the operator affine versions prefer.
    """
    k = 1.0 / scale
    return Affine(transform.a * k, transform.b * k, transform.c,
                  transform.d * k, transform.e * k, transform.f)


def apply_transform(transform, cols, rows):
    """World coordinates of pixel coordinates (scalars or arrays)."""
    return (transform.a * cols + transform.b * rows + transform.c,
            transform.d * cols + transform.e * rows + transform.f)


def scale_gcps(gcps, scale):
    """Ground control points of the magnified raster.

    Parameters
    ----------
    gcps : sequence of rasterio.control.GroundControlPoint
    scale : int

    Returns
    -------
    list of GroundControlPoint
        Same world coordinates and ids, pixel coordinates times ``scale``.
    """
    return [
        GroundControlPoint(row=g.row * scale, col=g.col * scale, x=g.x, y=g.y, z=g.z,
                           id=g.id, info=g.info)
        for g in gcps
    ]


def scale_rpcs(rpcs, scale):
    """Rational polynomial coefficients of the raster magnified by ``scale``.

    The polynomials give image line and sample from normalised ground
    coordinates as ``line = LINE_OFF + LINE_SCALE * f(ground)``, with line
    and sample counted from the centre of the first pixel (GDAL's RPC
    transformer adds half a pixel to reach its corner-based coordinates).
    Magnified by ``s``, the corner-based coordinate ``u`` becomes ``s * u``,
    so the centre-based one becomes ``s * (line + 0.5) - 0.5``: the offsets
    become ``s * OFF + (s - 1) / 2`` and the scales ``s * SCALE``. The
    polynomials, the ground offsets and scales and the error estimates are
    unchanged.

    Parameters
    ----------
    rpcs : rasterio.rpc.RPC
    scale : int

    Returns
    -------
    rasterio.rpc.RPC
    """
    from rasterio.rpc import RPC

    s = float(scale)
    fields = rpcs.to_dict()
    fields["line_off"] = s * rpcs.line_off + (s - 1.0) / 2.0
    fields["samp_off"] = s * rpcs.samp_off + (s - 1.0) / 2.0
    fields["line_scale"] = s * rpcs.line_scale
    fields["samp_scale"] = s * rpcs.samp_scale
    return RPC(**fields)


def _proj(crs):
    if crs is None:
        return None
    if isinstance(crs, ProjCRS):
        return crs
    try:
        return ProjCRS.from_user_input(crs.to_wkt())
    except AttributeError:
        return ProjCRS.from_user_input(crs)


def crs_summary(crs):
    """Name, code, units and axis order of a CRS, for logs, reports and STAC.

    Parameters
    ----------
    crs : rasterio.crs.CRS, pyproj.CRS, str or None

    Returns
    -------
    dict or None
        ``name``, ``code`` (``"EPSG:32618"`` or None for a custom CRS),
        ``kind`` (``"projected"``, ``"geographic"`` or the pyproj type name),
        ``units`` (of the first axis), ``axes`` (``"Easting (E, metre)"``...),
        ``wkt2`` (WKT 2019).
    """
    pc = _proj(crs)
    if pc is None:
        return None
    auth = pc.to_authority(min_confidence=100)
    kind = "projected" if pc.is_projected else "geographic" if pc.is_geographic else pc.type_name
    axes = [f"{a.name} ({a.direction}, {a.unit_name})" for a in pc.axis_info]
    units = pc.axis_info[0].unit_name if pc.axis_info else None
    return {
        "name": pc.name,
        "code": f"{auth[0]}:{auth[1]}" if auth else None,
        "kind": kind,
        "units": units,
        "axes": axes,
        "wkt2": pc.to_wkt(),
    }


def ground_sample_distance(crs, transform, width, height):
    """Pixel size on the ground in metres, along columns and along rows.

    For a projected CRS the pixel steps are converted from the CRS's linear
    unit to metres; for a geographic CRS they are geodesic distances on the
    CRS's ellipsoid, measured at the raster's centre.

    Parameters
    ----------
    crs : rasterio.crs.CRS or None
    transform : affine.Affine
    width, height : int

    Returns
    -------
    tuple of float or None
        ``(along_columns, along_rows)`` in metres; None without a CRS or
        for a CRS whose units are not lengths or angles.
    """
    pc = _proj(crs)
    if pc is None or not pc.axis_info:
        return None
    a, b, d, e = transform.a, transform.b, transform.d, transform.e
    if pc.is_geographic:
        geod = pc.get_geod()
        col, row = width / 2.0, height / 2.0
        x0, y0 = apply_transform(transform, col, row)
        x1, y1 = apply_transform(transform, col + 1, row)
        x2, y2 = apply_transform(transform, col, row + 1)
        to_lonlat = Transformer.from_crs(pc, pc.geodetic_crs, always_xy=True)
        # Axis order of GIS software: x is longitude, y latitude.
        lon0, lat0 = to_lonlat.transform(x0, y0)
        lon1, lat1 = to_lonlat.transform(x1, y1)
        lon2, lat2 = to_lonlat.transform(x2, y2)
        gx = abs(geod.inv(lon0, lat0, lon1, lat1)[2])
        gy = abs(geod.inv(lon0, lat0, lon2, lat2)[2])
        return float(gx), float(gy)
    factor = pc.axis_info[0].unit_conversion_factor
    if pc.axis_info[0].unit_name in ("unknown", None) or not factor:
        return None
    return float(math.hypot(a, d) * factor), float(math.hypot(b, e) * factor)


def _edge_points(transform, width, height, densify):
    """Pixel-corner points along the raster outline, clockwise, closed."""
    n = max(2, int(densify) + 2)
    t = np.linspace(0.0, 1.0, n)[:-1]
    cols = np.concatenate([t * width, np.full_like(t, width), (1 - t) * width, np.zeros_like(t)])
    rows = np.concatenate([np.zeros_like(t), t * height, np.full_like(t, height), (1 - t) * height])
    xs, ys = apply_transform(transform, cols, rows)
    return np.asarray(xs, dtype=float), np.asarray(ys, dtype=float)


def _to_wgs84(crs, xs, ys):
    tr = Transformer.from_crs(_proj(crs), ProjCRS.from_epsg(4326), always_xy=True)
    lon, lat = tr.transform(xs, ys)
    return np.asarray(lon, dtype=float), np.asarray(lat, dtype=float)


def wgs84_bbox(crs, transform, width, height, densify=21):
    """WGS84 bounding box ``[west, south, east, north]`` of a raster.

    Uses pyproj's densified, antimeridian-aware bounds transformation; when
    the raster crosses the antimeridian ``west > east`` (RFC 7946, 5.2).

    Returns
    -------
    list of float or None
        None without a CRS.
    """
    if crs is None:
        return None
    xs, ys = _edge_points(transform, width, height, 0)
    tr = Transformer.from_crs(_proj(crs), ProjCRS.from_epsg(4326), always_xy=True)
    west, south, east, north = tr.transform_bounds(
        float(xs.min()), float(ys.min()), float(xs.max()), float(ys.max()), densify_pts=densify
    )
    if not (transform.b == 0 and transform.d == 0):
        # A rotated grid's outline is not its axis-aligned bounds: use the outline.
        return _bbox_of_ring(*_unwrapped_ring(crs, transform, width, height, densify))
    return [float(west), float(south), float(east), float(north)]


def _unwrapped_ring(crs, transform, width, height, densify):
    xs, ys = _edge_points(transform, width, height, densify)
    lon, lat = _to_wgs84(crs, xs, ys)
    lon = np.where(np.isfinite(lon), lon, np.nan)
    # Unwrap: each step is the shorter way round the globe.
    steps = np.diff(lon)
    steps = (steps + 180.0) % 360.0 - 180.0
    lon = np.concatenate([[lon[0]], lon[0] + np.cumsum(steps)])
    if lon.min() < -180.0:
        lon = lon + 360.0
    return lon, lat


def _bbox_of_ring(lon, lat):
    west, east = float(np.nanmin(lon)), float(np.nanmax(lon))
    if east > 180.0:  # crosses the antimeridian
        east -= 360.0
    return [west, float(np.nanmin(lat)), east, float(np.nanmax(lat))]


def _clip_ring(points, keep_left, x0):
    """Sutherland-Hodgman clipping of a closed ring against the line lon = x0."""
    out = []
    n = len(points)
    for i in range(n):
        cur, nxt = points[i], points[(i + 1) % n]
        cur_in = cur[0] <= x0 if keep_left else cur[0] >= x0
        nxt_in = nxt[0] <= x0 if keep_left else nxt[0] >= x0
        if cur_in:
            out.append(cur)
        if cur_in != nxt_in:
            t = (x0 - cur[0]) / (nxt[0] - cur[0])
            out.append((x0, cur[1] + t * (nxt[1] - cur[1])))
    return out


def _close(ring):
    ring = [[float(x), float(y)] for x, y in ring]
    if ring and ring[0] != ring[-1]:
        ring.append(list(ring[0]))
    return ring


def wgs84_footprint(crs, transform, width, height, densify=21):
    """WGS84 outline of a raster as a GeoJSON geometry, with its bounding box.

    The four edges are densified (``densify`` extra points each) before
    reprojection, so curved outlines keep their shape. A footprint that
    crosses the antimeridian is split there into a MultiPolygon, and the
    bounding box then has ``west > east`` (RFC 7946, 3.1.9 and 5.2).

    Parameters
    ----------
    crs : rasterio.crs.CRS or None
    transform : affine.Affine
    width, height : int
    densify : int

    Returns
    -------
    geometry : dict or None
    bbox : list of float or None
    """
    if crs is None:
        return None, None
    lon, lat = _unwrapped_ring(crs, transform, width, height, densify)
    if not (np.isfinite(lon).all() and np.isfinite(lat).all()):
        return None, wgs84_bbox(crs, transform, width, height, densify)
    turn = lon[-1] - lon[0] + ((lon[0] - lon[-1] + 180.0) % 360.0 - 180.0)
    if abs(turn) > 180.0:
        # The outline winds round a pole: close it through the pole.
        pole = 90.0 if np.mean(lat) > 0 else -90.0
        ring = [(((x + 180.0) % 360.0) - 180.0, y) for x, y in zip(lon, lat)]
        geometry = {"type": "Polygon", "coordinates": [_close(ring + [(ring[-1][0], pole), (ring[0][0], pole)])]}
        south = float(lat.min()) if pole > 0 else -90.0
        north = 90.0 if pole > 0 else float(lat.max())
        return geometry, [-180.0, south, 180.0, north]
    bbox = _bbox_of_ring(lon, lat)
    points = list(zip(lon.tolist(), lat.tolist()))
    if lon.max() <= 180.0:
        return {"type": "Polygon", "coordinates": [_close(points)]}, bbox
    west_part = _clip_ring(points, True, 180.0)
    east_part = [(x - 360.0, y) for x, y in _clip_ring(points, False, 180.0)]
    polys = [[_close(p)] for p in (west_part, east_part) if len(p) >= 3]
    return {"type": "MultiPolygon", "coordinates": polys}, bbox
