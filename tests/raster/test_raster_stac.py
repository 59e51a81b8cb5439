"""The STAC Item sidecar."""

import json

import pytest
from affine import Affine
from rasterio.crs import CRS

from geosr._version import __version__
from geosr.raster.stac import EXTENSIONS, stac_item, stac_path, write_stac_item

UTM_18N = CRS.from_epsg(32618)


def _item(tmp_path, crs=UTM_18N, **kw):
    args = dict(dst=tmp_path / "out" / "scene_x2.tif", src=str(tmp_path / "in" / "scene.tif"),
                width=200, height=100, count=3, crs=crs, transform=Affine(15, 0, 500000, 0, -15, 4200000),
                scale=2, method="anchored", model_sha256="ab" * 32, created="2024-05-01T12:00:00Z")
    args.update(kw)
    return stac_item(**args)


def test_item_fields(tmp_path):
    item = _item(tmp_path, cog=True, band_names=["red", "green", "blue"])
    # Required fields of a STAC 1.1.0 Item (item-spec.md of the STAC spec).
    for key in ("type", "stac_version", "id", "geometry", "bbox", "properties", "links", "assets"):
        assert key in item
    assert item["stac_version"] == "1.1.0" and item["id"] == "scene_x2"
    assert set(item["stac_extensions"]) == set(EXTENSIONS.values())
    p = item["properties"]
    assert p["datetime"] == "2024-05-01T12:00:00Z"
    assert p["processing:software"] == {"geosr": __version__}
    assert "synthesized" in p["processing:lineage"] and "not measured" in p["processing:lineage"]
    assert p["proj:code"] == "EPSG:32618" and p["proj:shape"] == [100, 200]
    assert p["proj:transform"] == [15, 0, 500000, 0, -15, 4200000]
    assert p["gsd"] == pytest.approx(15.0)
    (link,) = [lk for lk in item["links"] if lk["rel"] == "derived_from"]
    assert link["href"] == "../in/scene.tif"
    asset = item["assets"]["data"]
    assert asset["href"] == "scene_x2.tif" and "cloud-optimized" in asset["type"]
    assert [b["name"] for b in asset["bands"]] == ["red", "green", "blue"]


def test_custom_crs_gives_wkt2(tmp_path):
    crs = CRS.from_proj4("+proj=aea +lat_1=29.5 +lat_2=45.5 +lat_0=23 +lon_0=-96.5 +datum=WGS84 +units=m")
    p = _item(tmp_path, crs=crs)["properties"]
    assert p["proj:code"] is None and p["proj:wkt2"].startswith(("PROJCRS", "PROJCS"))


def test_no_crs_gives_null_geometry(tmp_path):
    item = _item(tmp_path, crs=None)
    assert item["geometry"] is None and "bbox" not in item and "gsd" not in item["properties"]


def test_written_json_round_trips(tmp_path):
    item = _item(tmp_path)
    path = tmp_path / "i.json"
    write_stac_item(path, item)
    assert json.loads(path.read_text()) == item
    assert stac_path(tmp_path / "a.tif") == tmp_path / "a.json"
    assert stac_path(tmp_path / "noext") == tmp_path / "noext.json"


# --- round 2: footprints by RFC 7946's rules; sidecar problems never fail
def _rfc7946_checks(item):
    """RFC 7946: bbox is [west, south, east, north] with south <= north (5); west > east
    only across the antimeridian (5.2); positions within -180..180, -90..90; polygons
    closed (3.1.6); the document is strict JSON (no NaN, no infinity)."""
    json.dumps(item, allow_nan=False)
    west, south, east, north = item["bbox"]
    assert -180 <= west <= 180 and -180 <= east <= 180 and -90 <= south <= north <= 90
    geom = item["geometry"]
    polys = [geom["coordinates"]] if geom["type"] == "Polygon" else geom["coordinates"]
    for poly in polys:
        ring = poly[0]
        assert ring[0] == ring[-1] and len(ring) >= 4
        assert all(-180 <= x <= 180 and -90 <= y <= 90 for x, y in ring)
    return west, south, east, north, geom["type"]


def test_global_raster_spans_every_longitude(tmp_path):
    west, south, east, north, kind = _rfc7946_checks(_item(
        tmp_path, crs=CRS.from_epsg(4326), width=360, height=180,
        transform=Affine(1, 0, -180, 0, -1, 90)))
    assert (west, south, east, north) == (-180, -90, 180, 90) and kind == "Polygon"


@pytest.mark.parametrize("x0", [0.0, -180.5])
def test_global_raster_starting_elsewhere_is_still_global(tmp_path, x0):
    west, _, east, _, _ = _rfc7946_checks(_item(
        tmp_path, crs=CRS.from_epsg(4326), width=361, height=180,
        transform=Affine(1, 0, x0, 0, -1, 90)))
    assert (west, east) == (-180, 180)


def test_antimeridian_crossing_is_cut_and_bbox_wraps(tmp_path):
    # 178E to 178W: RFC 7946 3.1.9 cuts the geometry at 180, 5.2 gives west > east.
    west, south, east, north, kind = _rfc7946_checks(_item(
        tmp_path, crs=CRS.from_epsg(4326), width=40, height=40,
        transform=Affine(0.1, 0, 178, 0, -0.1, 10)))
    assert kind == "MultiPolygon"
    assert west == pytest.approx(178) and east == pytest.approx(-178) and west > east
    assert (south, north) == (pytest.approx(6), pytest.approx(10))
    item = _item(tmp_path, crs=CRS.from_epsg(4326), width=40, height=40,
                 transform=Affine(0.1, 0, 178, 0, -0.1, 10))
    xs = [[x for x, _ in poly[0]] for poly in item["geometry"]["coordinates"]]
    assert sorted((min(p), max(p)) for p in xs) == [(-180, pytest.approx(-178)), (pytest.approx(178), 180)]


def test_utm_zone_60_across_the_antimeridian(tmp_path):
    # Cross-check against pyproj's densified bounds transformation.
    from pyproj import Transformer

    transform = Affine(1000, 0, 700000, 0, -1000, 5000000)
    item = _item(tmp_path, crs=CRS.from_epsg(32660), width=200, height=100, transform=transform)
    west, south, east, north, kind = _rfc7946_checks(item)
    ref = Transformer.from_crs("EPSG:32660", "EPSG:4326", always_xy=True).transform_bounds(
        700000, 4900000, 900000, 5000000, densify_pts=21)
    assert kind == "MultiPolygon" and west > east
    assert [west, south, east, north] == pytest.approx(list(ref), abs=1e-6)


def test_geostationary_full_disk_has_a_finite_footprint(tmp_path):
    # The corners of a full-disk image are in space (PROJ gives infinity there).
    crs = CRS.from_proj4("+proj=geos +h=35785831 +lon_0=0 +sweep=y +a=6378137 +b=6356752.3")
    item = _item(tmp_path, crs=crs, width=40, height=40,
                 transform=Affine(300000, 0, -6000000, 0, -300000, 6000000))
    west, south, east, north, _ = _rfc7946_checks(item)
    # The disk seen from 35786 km reaches about 81.3 degrees from the
    # sub-satellite point (arccos(6378 / 42164), from memory).
    assert -82 < west < -75 and 75 < east < 82 and -82 < south < -75 and 75 < north < 82
    write_stac_item(tmp_path / "geos.json", item)


def test_engineering_crs_gives_null_geometry_and_a_warning(tmp_path):
    from geosr.errors import GeoreferencingWarning

    with pytest.warns(GeoreferencingWarning, match="null geometry"):
        item = _item(tmp_path, crs=CRS.from_wkt('LOCAL_CS["site grid",UNIT["metre",1]]'))
    assert item["geometry"] is None and "bbox" not in item
    json.dumps(item, allow_nan=False)


def test_gcp_referenced_footprint_follows_the_gcps(tmp_path):
    from rasterio.control import GroundControlPoint as G

    gcps = [G(0, 0, 10.0, 50.0), G(0, 80, 10.4, 50.0), G(80, 0, 10.0, 49.6), G(80, 80, 10.4, 49.6)]
    item = _item(tmp_path, crs=CRS.from_epsg(4326), width=80, height=80,
                 transform=Affine.scale(0.5), gcps=gcps)
    west, south, east, north, _ = _rfc7946_checks(item)
    assert [west, south, east, north] == pytest.approx([10.0, 49.6, 10.4, 50.0], abs=1e-9)
    assert "proj:transform" not in item["properties"]
