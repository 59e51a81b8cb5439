"""Geotransforms, GCPs and CRS facts."""

import math

import numpy as np
import pytest
import rasterio.warp
from affine import Affine
from rasterio.control import GroundControlPoint
from rasterio.crs import CRS
from rasterio.transform import from_gcps

from geosr.raster.transforms import (
    apply_transform,
    crs_summary,
    ground_sample_distance,
    scale_gcps,
    scaled_transform,
    wgs84_bbox,
    wgs84_footprint,
)

ROTATED = Affine(17.320508075688775, 4.999999999999999, 100.0,
                 9.999999999999998, -8.660254037844387, 200.0)  # rotated.tif's transform


@pytest.mark.parametrize("t", [Affine(300.04, 0, 101985, 0, -300.04, 2826915), ROTATED])
@pytest.mark.parametrize("s", [2, 3, 4])
def test_scaled_transform_is_affine_composition(t, s):
    # affine's own composition is the reference.
    assert scaled_transform(t, s).almost_equals(t @ Affine.scale(1 / s))
    for col, row in [(0, 0), (3, 5), (10, 15)]:
        assert apply_transform(scaled_transform(t, s), s * col, s * row) == pytest.approx(t @ (col, row))


def test_gcp_scaling_against_rasterio_fit():
    gcps = [GroundControlPoint(row=r, col=c, x=1000 + 20 * c + 3 * r, y=5000 - 20 * r + 2 * c, id=str(i))
            for i, (r, c) in enumerate([(0, 0), (0, 50), (40, 0), (40, 50), (20, 25)])]
    out = scale_gcps(gcps, 3)
    assert [(g.x, g.y, g.id) for g in out] == [(g.x, g.y, g.id) for g in gcps]
    # rasterio's least-squares affine fit of the control points.
    assert from_gcps(out).almost_equals(from_gcps(gcps) @ Affine.scale(1 / 3))


def test_crs_summary():
    # Names and units from the EPSG registry.
    utm = crs_summary(CRS.from_epsg(32618))
    assert utm["name"] == "WGS 84 / UTM zone 18N" and utm["code"] == "EPSG:32618"
    assert utm["kind"] == "projected" and utm["units"] == "metre"
    assert utm["axes"][0].startswith("Easting")
    geo = crs_summary(CRS.from_epsg(4326))
    assert geo["kind"] == "geographic" and geo["units"] == "degree"
    custom = crs_summary(CRS.from_proj4("+proj=aea +lat_1=29.5 +lat_2=45.5 +lat_0=23 +lon_0=-96.5 +datum=WGS84 +units=us-ft"))
    assert custom["code"] is None and "US survey foot" in custom["units"]
    assert crs_summary(None) is None


def test_gsd_in_metres():
    assert ground_sample_distance(CRS.from_epsg(32618), Affine(30, 0, 0, 0, -30, 0), 10, 10) == (30.0, 30.0)
    feet = CRS.from_epsg(2263)  # NAD83 / New York Long Island (ftUS)
    gx, gy = ground_sample_distance(feet, Affine(10, 0, 0, 0, -10, 0), 10, 10)
    assert gx == pytest.approx(10 * 1200 / 3937)  # the US survey foot is 1200/3937 m (definition)
    # One arc-second at the equator on WGS84: the parallel is the equator of
    # radius a = 6378137 m; the meridian's radius of curvature there is
    # a (1 - e^2) = 6335439.327 m (WGS84 defining constants).
    arcsec = 1 / 3600
    t = Affine(arcsec, 0, -0.5 * arcsec * 10, 0, -arcsec, 0.5 * arcsec * 10)
    gx, gy = ground_sample_distance(CRS.from_epsg(4326), t, 10, 10)
    assert gx == pytest.approx(2 * math.pi * 6378137 / 1296000, rel=1e-5)
    assert gy == pytest.approx(2 * math.pi * 6335439.327 / 1296000, rel=1e-4)
    assert ground_sample_distance(None, t, 10, 10) is None


def test_bbox_against_gdal():
    crs = CRS.from_epsg(32618)
    t = Affine(300.0379266750948, 0.0, 101985.0, 0.0, -300.041782729805, 2826915.0)
    bounds = (101985.0, 2826915.0 - 718 * 300.041782729805, 101985.0 + 791 * 300.0379266750948, 2826915.0)
    # GDAL's densified bounds transformation is the reference.
    ref = rasterio.warp.transform_bounds(crs, "EPSG:4326", *bounds, densify_pts=21)
    assert wgs84_bbox(crs, t, 791, 718) == pytest.approx(list(ref), abs=1e-7)
    geom, bbox = wgs84_footprint(crs, t, 791, 718)
    assert geom["type"] == "Polygon" and bbox == pytest.approx(list(ref), abs=1e-3)
    ring = np.array(geom["coordinates"][0])
    assert (ring[0] == ring[-1]).all() and len(ring) == 4 * 22 + 1


def test_footprint_across_the_antimeridian_is_split():
    # UTM zone 60N has its central meridian at 177 E; eastings past about
    # 850 km at 10 N lie beyond 180.
    crs = CRS.from_epsg(32660)
    t = Affine(1000, 0, 700000, 0, -1000, 1200000)
    geom, bbox = wgs84_footprint(crs, t, 250, 100)
    ref = rasterio.warp.transform_bounds(crs, "EPSG:4326", 700000, 1100000, 950000, 1200000, densify_pts=21)
    assert ref[0] > ref[2]  # GDAL reports the crossing as west > east too
    assert bbox == pytest.approx(list(ref), abs=1e-3)
    assert geom["type"] == "MultiPolygon" and len(geom["coordinates"]) == 2
    west, east = (np.array(p[0]) for p in geom["coordinates"])
    assert west[:, 0].max() == pytest.approx(180.0) and west[:, 0].min() > 170
    assert east[:, 0].min() == pytest.approx(-180.0) and east[:, 0].max() < -170


def test_no_crs_no_footprint():
    assert wgs84_footprint(None, ROTATED, 10, 15) == (None, None)
