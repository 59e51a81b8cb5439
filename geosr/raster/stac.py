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
import math
import os
import warnings
from pathlib import Path

from .._version import __version__
from ..cautions import CAUTION
from ..errors import GeoreferencingWarning
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


def _footprint(crs, transform, width, height, gcps):
    """Geometry, bbox and ground sample distance; None where they cannot be had.

    A GCP-referenced raster (identity transform) is placed by the affine
    transform fitted to its GCPs (``rasterio.transform.from_gcps``). A
    footprint that cannot be computed is None with a warning: the sidecar
    never fails the run (STAC allows a null geometry).
    """
    if gcps:
        from rasterio.transform import from_gcps

        transform = from_gcps(list(gcps))
    try:
        geometry, bbox = wgs84_footprint(crs, transform, width, height)
        gsd = ground_sample_distance(crs, transform, width, height)
    except Exception as exc:  # noqa: BLE001 - a sidecar problem never discards the raster
        geometry, bbox, gsd = None, None, None
        reason = f"{type(exc).__name__}: {exc}"
    else:
        reason = "its CRS has no way to WGS84 longitude and latitude, or no pixel lies on the earth"
    values = [v for v in (bbox or []) + list(gsd or [])]
    if not all(math.isfinite(v) for v in values):
        geometry, bbox, gsd = None, None, None
        reason = "part of it does not lie on the earth"
    if crs is not None and geometry is None:
        warnings.warn(f"The STAC sidecar has a null geometry: {reason}", GeoreferencingWarning,
                      stacklevel=4)
    return geometry, bbox, gsd


def stac_item(*, dst, src, width, height, count, crs, transform, scale, method,
              model_sha256, created, cog=False, band_names=None, source_name=None, sources=(),
              gcps=None):
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
    gcps : sequence of rasterio.control.GroundControlPoint, optional
        The output's GCPs (in its pixel coordinates) when it is referenced by
        GCPs only; ``crs`` is then theirs. The footprint is placed by the
        affine transform fitted to them and ``proj:transform`` is left out.

    Returns
    -------
    dict
        A GeoJSON Feature. Without a CRS, or when the footprint cannot be
        computed (a warning says why), ``geometry`` is null and ``bbox``
        absent (STAC allows a null geometry).
    """
    dst = Path(os.path.abspath(dst))
    base = str(dst.parent)
    geometry, bbox, gsd = _footprint(crs, transform, width, height, gcps)
    try:
        summary = crs_summary(crs)
    except Exception:  # noqa: BLE001 - a CRS pyproj cannot describe is left out
        summary = None
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
    }
    if not gcps:
        props["proj:transform"] = [transform.a, transform.b, transform.c, transform.d, transform.e, transform.f]
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
    if bbox is not None and geometry is not None:
        item["bbox"] = [float(v) for v in bbox]
    return item


def write_stac_item(path, item):
    """Write an Item as indented JSON (UTF-8); strict JSON (no NaN or infinity), checked before the file opens."""
    text = json.dumps(item, indent=2, allow_nan=False)
    with open(path, "w", encoding="utf-8") as fh:
        fh.write(text + "\n")
