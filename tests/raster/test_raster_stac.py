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
