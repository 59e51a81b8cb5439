"""Make the small test rasters in this folder from the shared open test data.

Usage::

    python tests/data/make_crops.py [SHARED_DATA_DIR] [--out OUT_DIR]

``SHARED_DATA_DIR`` defaults to ``../shared/data`` beside the checkout and
``OUT_DIR`` to this script's folder. The originals are only read.

What it writes (licences and checksums are in ``SOURCES.md``):

- ``rgb-byte-crop.tif``: a 240 x 240 window of ``RGB.byte.tif`` whose left
  part lies outside the tilted scene footprint (nodata 0) and whose rest
  holds sea, coast, land and clouds.
- ``landsat8-b2-crop.tif``, ``-b3-``, ``-b4-``: the same 256 x 256 window of
  each ``landsat8-scene-b*.tif``, with 0 fill beyond the footprint's left
  edge and textured land (towns, fields, forest, a river) elsewhere.
- ``float_nan.tif``, ``rotated.tif``, ``all-nodata.tif``, ``corrupt.tif``:
  copied byte for byte.

A crop keeps the source's dtype, band count, CRS, nodata value (none for the
Landsat bands, whose fill is 0 without a declared nodata value), colour
interpretation, band descriptions, scales, offsets, units and dataset tags;
its transform is the window's transform (``rasterio.windows.transform``).
It is written tiled (128 x 128 blocks) with DEFLATE and the horizontal
predictor. The windows are fixed below, so a run with the same GDAL and zlib
gives the same bytes.
"""

from __future__ import annotations

import argparse
import shutil
import sys
from pathlib import Path

import numpy as np
import rasterio
from rasterio.windows import Window
from rasterio.windows import transform as window_transform

HERE = Path(__file__).resolve().parent
DEFAULT_SHARED = HERE.parent.parent.parent / "shared" / "data"

#: Output name -> (source name, window). Window(col_off, row_off, width, height).
RGB_WINDOW = Window(64, 160, 240, 240)
LANDSAT_WINDOW = Window(128, 512, 256, 256)
CROPS = {
    "rgb-byte-crop.tif": ("RGB.byte.tif", RGB_WINDOW),
    "landsat8-b2-crop.tif": ("landsat8-scene-b2.tif", LANDSAT_WINDOW),
    "landsat8-b3-crop.tif": ("landsat8-scene-b3.tif", LANDSAT_WINDOW),
    "landsat8-b4-crop.tif": ("landsat8-scene-b4.tif", LANDSAT_WINDOW),
}

#: Files copied unchanged.
VERBATIM = ("float_nan.tif", "rotated.tif", "all-nodata.tif", "corrupt.tif")

BLOCK = 128


def crop(src_path: Path, dst_path: Path, window: Window) -> None:
    """Write ``window`` of ``src_path`` to ``dst_path`` as a tiled DEFLATE GeoTIFF.

    Parameters
    ----------
    src_path, dst_path : Path
        Source raster (only read) and destination GeoTIFF (replaced).
    window : rasterio.windows.Window
        Integer window that lies wholly inside the source.
    """
    with rasterio.open(src_path) as src:
        full = Window(0, 0, src.width, src.height)
        if window.intersection(full) != window:
            raise ValueError(f"window {window} must lie inside {src_path.name}, got {full}")
        data = src.read(window=window)
        profile = {
            "driver": "GTiff",
            "width": int(window.width),
            "height": int(window.height),
            "count": src.count,
            "dtype": src.dtypes[0],
            "crs": src.crs,
            "transform": window_transform(window, src.transform),
            "nodata": src.nodata,
            "tiled": True,
            "blockxsize": BLOCK,
            "blockysize": BLOCK,
            "compress": "deflate",
            "predictor": 2,
            "interleave": "pixel" if src.count > 1 else "band",
        }
        colorinterp = src.colorinterp
        descriptions = src.descriptions
        scales, offsets, units = src.scales, src.offsets, src.units
        tags = src.tags()
        band_tags = [src.tags(i) for i in range(1, src.count + 1)]
    dst_path.unlink(missing_ok=True)
    with rasterio.open(dst_path, "w", **profile) as dst:
        dst.write(data)
        dst.colorinterp = colorinterp
        for i, desc in enumerate(descriptions, start=1):
            if desc:
                dst.set_band_description(i, desc)
        dst.scales = scales
        dst.offsets = offsets
        if any(units):
            dst.units = tuple(u or "" for u in units)
        dst.update_tags(**tags)
        for i, bt in enumerate(band_tags, start=1):
            if bt:
                dst.update_tags(i, **bt)


def check(path: Path, window: Window, src_path: Path) -> str:
    """Reopen a crop, compare it with its source window, return a summary line."""
    with rasterio.open(src_path) as src, rasterio.open(path) as out:
        assert out.shape == (window.height, window.width), out.shape
        assert out.count == src.count and out.dtypes == src.dtypes
        assert out.crs == src.crs and out.nodata == src.nodata
        assert out.colorinterp == src.colorinterp
        assert out.transform.almost_equals(window_transform(window, src.transform))
        assert out.block_shapes[0] == (BLOCK, BLOCK)
        data = out.read()
        assert np.array_equal(data, src.read(window=window))
        fill = src.nodata if src.nodata is not None else 0
        invalid = (data == fill).all(axis=0)
    frac = float(invalid.mean())
    assert 0.0 < frac < 0.5, f"{path.name}: fraction of fill pixels {frac:.3f}"
    return f"{path.name}: {data.shape}, fill {100 * frac:.1f} %, {path.stat().st_size} bytes"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("shared", nargs="?", type=Path, default=DEFAULT_SHARED,
                        help="folder holding the original rasters (default: %(default)s)")
    parser.add_argument("--out", type=Path, default=HERE,
                        help="folder to write into (default: %(default)s)")
    args = parser.parse_args(argv)
    if not args.shared.is_dir():
        parser.error(f"SHARED must be a folder of the original rasters, got {args.shared}")
    if args.out.exists() and args.out.resolve() == args.shared.resolve():
        # The verbatim copies would be written onto their own originals.
        parser.error(f"--out must be another folder than SHARED, got {args.out} for both")
    args.out.mkdir(parents=True, exist_ok=True)
    for name, (source, window) in CROPS.items():
        crop(args.shared / source, args.out / name, window)
        print(check(args.out / name, window, args.shared / source))
    for name in VERBATIM:
        shutil.copyfile(args.shared / name, args.out / name)
        print(f"{name}: copied, {(args.out / name).stat().st_size} bytes")
    return 0


if __name__ == "__main__":
    sys.exit(main())
