"""Helpers shared by the tests: photo crops, checksums, a bicubic stand-in model.

Imported by the test modules as ``from helpers import ...`` (``tests`` is on
pytest's ``pythonpath``); fixtures live in ``conftest.py``.
"""

from __future__ import annotations

import hashlib
import os
from pathlib import Path
from xml.sax.saxutils import escape

import numpy as np

#: The open test rasters vendored with the project (see data/SOURCES.md).
TEST_DATA = Path(__file__).resolve().parent / "data"
SHARED_DATA = Path(__file__).resolve().parent.parent.parent / "shared" / "data"


def sha256_of(path):
    """Hex sha256 of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def camera(rows, cols, row0=120, col0=80):
    """A crop of scikit-image's bundled camera photo as float64 (0..255)."""
    from skimage import data

    img = data.camera().astype(np.float64)
    return img[row0 : row0 + rows, col0 : col0 + cols]


def list_dir(path):
    """Names in a folder, sorted (to check that no temporary is left)."""
    return sorted(os.listdir(path))


class BicubicContractModel:
    """Follows the core's model contract with plain bicubic interpolation.

    Built only from ``geosr.core.resample`` (``upscale_valid``) and
    ``geosr.core.nodata.fill_invalid`` when present, so that the raster pipeline
    can be checked against GDAL's cubic resampling: the output is what a
    pure interpolator gives, with no synthesized detail.
    """

    method = "bicubic-contract"
    FILL = 2

    def __init__(self, scale):
        self.scale = scale
        self.sha256_ = hashlib.sha256(f"bicubic-x{scale}".encode()).hexdigest()

    def context_radius(self, consistency=False, masked=False):
        return 2 + (self.FILL if masked else 0)

    def _fill(self, x, valid):
        out = np.where(valid, x, 0.0)
        known = valid.copy()
        for _ in range(self.FILL):
            w = known.astype(out.dtype)
            p, q = np.pad(out * w, 1), np.pad(w, 1)
            total = sum(p[i : i + out.shape[0], j : j + out.shape[1]] for i in range(3) for j in range(3))
            count = sum(q[i : i + out.shape[0], j : j + out.shape[1]] for i in range(3) for j in range(3))
            grow = ~known & (count > 0)
            out = np.where(grow, total / np.where(count > 0, count, 1), out)
            known |= grow
        return out

    def magnify_block(self, block, halo, valid=None, *, consistency=False, ensemble=False):
        from geosr.core.resample import upscale_valid

        x = np.asarray(block, dtype=np.float32 if block.dtype == np.float32 else np.float64)
        v = np.isfinite(x) if valid is None else (np.asarray(valid, bool) & np.isfinite(x))
        masked = not v.all()
        if masked:
            x = self._fill(x, v).astype(x.dtype)
        crop = halo - 2
        x = x[crop : x.shape[0] - crop, crop : x.shape[1] - crop]
        return upscale_valid(x, self.scale, 2)

    def magnify(self, image, valid=None, *, consistency=False, ensemble=False):
        image = np.asarray(image)
        v = np.isfinite(image) if valid is None else np.asarray(valid, bool) & np.isfinite(image)
        r = self.context_radius(masked=not v.all())
        out = self.magnify_block(np.pad(image, r, mode="symmetric"), r, np.pad(v, r, mode="symmetric"))
        hr = np.repeat(np.repeat(v, self.scale, 0), self.scale, 1)
        out[~hr] = np.nan
        return out


def write_vrt(vrt, member):
    """A GDAL VRT at ``vrt`` that reads every band of the raster ``member`` (relative to the VRT)."""
    import rasterio

    with rasterio.open(member) as ds:
        gt = ", ".join(repr(v) for v in ds.transform.to_gdal())
        srs = ds.crs.to_wkt() if ds.crs else ""
        bands = "".join(
            f'<VRTRasterBand dataType="{_GDAL_TYPES[ds.dtypes[b - 1]]}" band="{b}"><SimpleSource>'
            f'<SourceFilename relativeToVRT="1">{os.path.relpath(member, os.path.dirname(vrt))}'
            f"</SourceFilename><SourceBand>{b}</SourceBand></SimpleSource></VRTRasterBand>"
            for b in ds.indexes
        )
        text = (f'<VRTDataset rasterXSize="{ds.width}" rasterYSize="{ds.height}">'
                f"<SRS>{escape(srs)}</SRS><GeoTransform>{gt}</GeoTransform>{bands}</VRTDataset>")
    Path(vrt).write_text(text)
    return Path(vrt)


def add_sidecars(path):
    """Give the GeoTIFF ``path`` an external mask (.msk), overviews (.ovr) and a .aux.xml."""
    import rasterio
    from rasterio.enums import Resampling

    with rasterio.Env(GDAL_TIFF_INTERNAL_MASK=False):
        with rasterio.open(path, "r+") as ds:
            ds.write_mask(np.full((ds.height, ds.width), 255, np.uint8))
    with rasterio.Env(TIFF_USE_OVR=True), rasterio.open(path, "r+") as ds:
        ds.build_overviews([2], Resampling.nearest)
    Path(str(path) + ".aux.xml").write_text('<PAMDataset><Metadata><MDI key="NOTE">x</MDI></Metadata></PAMDataset>')
    return [Path(str(path) + s) for s in (".msk", ".ovr", ".aux.xml")]


_GDAL_TYPES = {"uint8": "Byte", "int8": "Int8", "uint16": "UInt16", "int16": "Int16", "uint32": "UInt32",
               "int32": "Int32", "float32": "Float32", "float64": "Float64"}


def vrt_with_band_nodata(member, vrt, values):
    """A VRT at ``vrt`` over the raster ``member`` whose bands declare their own nodata ``values``."""
    import rasterio.shutil

    rasterio.shutil.copy(member, vrt, driver="VRT")
    text = Path(vrt).read_text()
    for band, value in enumerate(values, start=1):
        tag = f'band="{band}">'
        text = text.replace(tag, f"{tag}\n    <NoDataValue>{value}</NoDataValue>", 1)
    Path(vrt).write_text(text)
    return vrt
