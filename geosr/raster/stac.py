"""A STAC Item sidecar for a magnified raster.

The Item (STAC 1.1.0) records where the raster came from and how, so that a
catalogue can read the provenance: the ``processing`` extension
(software and version, a lineage that says the detail is synthesized), the
``projection`` extension (code or WKT2, shape, transform), the ground
sample distance in metres, a WGS84 footprint and bounding box, and a
``derived_from`` link to the source.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

from .._version import __version__
from ..cautions import CAUTION
from .transforms import crs_summary, ground_sample_distance, wgs84_footprint

__all__ = ["STAC_VERSION", "EXTENSIONS", "stac_item", "write_stac_item", "stac_path"]

STAC_VERSION = "1.1.0"

#: Extension schemas the Item declares.
EXTENSIONS = {
    "processing": "https://stac-extensions.github.io/processing/v1.2.0/schema.json",
    "projection": "https://stac-extensions.github.io/projection/v2.0.0/schema.json",
}


def stac_path(dst):
    """Path of the sidecar of ``dst``: the same name with ``.json``."""
    dst = Path(dst)
    return dst.with_suffix(".json") if dst.suffix else dst.with_name(dst.name + ".json")


def _href(target, base_dir):
    """A relative href when both live on one local file system, else absolute."""
    target = os.fspath(target)
    if target.startswith("/vsi") or "://" in target:
        return target
    try:
        return os.path.relpath(os.path.abspath(target), base_dir)
    except ValueError:  # different drives
        return Path(os.path.abspath(target)).as_uri()


def stac_item(*, dst, src, width, height, count, crs, transform, scale, method,
              model_sha256, created, cog=False, band_names=None, source_name=None, sources=()):
    """Build the STAC Item for a magnified raster.

    Parameters
    ----------
    dst : str or os.PathLike
        The final output path (its sidecar sits beside it).
    src : str
        The source path.
    width, height, count : int
        Output size and band count.
    crs : rasterio.crs.CRS or None
    transform : affine.Affine
        Output geotransform.
    scale : int
    method : str
    model_sha256 : str
    created : str
        ISO 8601 UTC time of the run.
    cog : bool
    band_names : sequence of str, optional
    source_name : str, optional
        The name of ``src`` shown in the lineage (its file name by default).
    sources : sequence of (path, title), optional
        Further files the run read its pixels from (the guides of a guided
        run), listed as ``derived_from`` links.

    Returns
    -------
    dict
        A GeoJSON Feature. Without a CRS, ``geometry`` and ``bbox`` are
        null/absent (STAC allows a null geometry).
    """
    dst = Path(os.path.abspath(dst))
    base = str(dst.parent)
    geometry, bbox = wgs84_footprint(crs, transform, width, height)
    summary = crs_summary(crs)
    gsd = ground_sample_distance(crs, transform, width, height)
    source_name = source_name or os.path.basename(os.fspath(src))
    props = {
        "datetime": created,
        "created": created,
        "processing:software": {"geosr": __version__},
        "processing:lineage": (
            f"Magnified x{scale} from {source_name} by geosr {__version__} with the {method} "
            f"method (model sha256 {model_sha256}). Fine detail is synthesized by a "
            f"statistical model, not measured. {CAUTION}"
        ),
        "processing:level": "L4",
        "processing:datetime": created,
        "geosr:scale": int(scale),
        "geosr:method": str(method),
        "geosr:model_sha256": str(model_sha256),
        "geosr:synthesized": True,
        "proj:shape": [int(height), int(width)],
        "proj:transform": [transform.a, transform.b, transform.c, transform.d, transform.e, transform.f],
    }
    if summary is not None:
        if summary["code"]:
            props["proj:code"] = summary["code"]
        else:
            props["proj:code"] = None
            props["proj:wkt2"] = summary["wkt2"]
    else:
        props["proj:code"] = None
    if gsd is not None:
        props["gsd"] = float((gsd[0] * gsd[1]) ** 0.5)
    media = "image/tiff; application=geotiff" + ("; profile=cloud-optimized" if cog else "")
    asset = {
        "href": _href(dst, base),
        "type": media,
        "title": f"Magnified x{scale} (synthesized detail)",
        "roles": ["data"],
    }
    if band_names:
        asset["bands"] = [{"name": str(n)} for n in band_names]
    item = {
        "type": "Feature",
        "stac_version": STAC_VERSION,
        "stac_extensions": list(EXTENSIONS.values()),
        "id": dst.stem,
        "geometry": geometry,
        "properties": props,
        "links": [
            {
                "rel": "derived_from",
                "href": _href(src, base),
                "type": "image/tiff; application=geotiff",
                "title": f"Source raster {source_name}",
            }
        ],
        "assets": {"data": asset},
    }
    for path, title in sources:
        item["links"].append({
            "rel": "derived_from",
            "href": _href(path, base),
            "type": "image/tiff; application=geotiff",
            "title": str(title),
        })
    if bbox is not None:
        item["bbox"] = [float(v) for v in bbox]
    return item


def write_stac_item(path, item):
    """Write an Item as indented JSON (UTF-8)."""
    with open(path, "w", encoding="utf-8") as fh:
        json.dump(item, fh, indent=2, allow_nan=False)
        fh.write("\n")
