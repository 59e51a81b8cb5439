"""Guided magnification time and memory against GDAL's cubic resampling of the same target.

A guide raster of 2*N x 2*N pixels at 10 m (uint16, tiled, from the
scikit-image "camera" photo, see ``_common.make_raster``) and a target of
N x N at 20 m (the guide averaged 2 x 2 by GDAL) are written. The whole
``geosr magnify TARGET OUT --guide GUIDE`` run (learning on the scene in two
passes, then magnifying block by block, writing a tiled GeoTIFF) is timed
against what a user would run instead: GDAL cubic resampling of the target
to the guide's grid (rasterio ``read(out_shape=..., resampling=cubic)``)
plus a write with the same creation options. The target of the issue: at
most 15 times GDAL cubic for N = 4096. Peak memory (resident set size of a
child process) is measured at N and N/2 to show it stays flat in scene size.

    .venv/bin/python benchmarks/bench_guided_speed.py [--quick]
"""

import argparse
import os
import subprocess
import sys
import tempfile
import time

import rasterio
from affine import Affine
from rasterio.enums import Resampling

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _common import make_raster, result  # noqa: E402

_CHILD = """
import resource, sys, warnings
warnings.simplefilter("ignore")
from geosr.pipeline.magnify import magnify_raster
magnify_raster(sys.argv[1], sys.argv[2], guide=sys.argv[3], overwrite=True)
print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)
"""


def make_pair(folder, side):
    """Write the 10 m guide (2*side) and the 20 m target (side); return their paths."""
    guide = os.path.join(folder, f"guide-{side}.tif")
    target = os.path.join(folder, f"target-{side}.tif")
    make_raster(guide, 2 * side)
    with rasterio.open(guide) as ds:
        data = ds.read(out_shape=(1, side, side), resampling=Resampling.average)
        profile = dict(ds.profile)
    profile.update(width=side, height=side, transform=Affine(20, 0, 500000, 0, -20, 4500000))
    with rasterio.open(target, "w", **profile) as out:
        out.write(data)
    return target, guide


def gdal_cubic(target, dst, like):
    t0 = time.perf_counter()
    with rasterio.open(like) as ref:
        profile = ref.profile
    with rasterio.open(target) as ds:
        data = ds.read(out_shape=(ds.count, 2 * ds.height, 2 * ds.width), resampling=Resampling.cubic)
    with rasterio.open(dst, "w", **profile) as out:
        out.write(data)
    return time.perf_counter() - t0


def guided_run(target, dst, guide):
    """Seconds and peak RSS (MiB) of a guided run in a fresh child process."""
    t0 = time.perf_counter()
    out = subprocess.run([sys.executable, "-c", _CHILD, target, dst, guide], check=True,
                         capture_output=True, text=True)
    return time.perf_counter() - t0, int(out.stdout.split()[-1]) / 1024


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="N = 1024 instead of 4096")
    args = parser.parse_args()
    side = 1024 if args.quick else 4096
    with tempfile.TemporaryDirectory() as folder:
        rows = {}
        for n in (side // 2, side):
            target, guide = make_pair(folder, n)
            dst = os.path.join(folder, f"out-{n}.tif")
            seconds, rss = guided_run(target, dst, guide)
            cubic = gdal_cubic(target, os.path.join(folder, f"cubic-{n}.tif"), dst)
            rows[n] = (seconds, cubic, rss)
            print(f"N={n}: geosr guided {seconds:.1f} s, GDAL cubic {cubic:.2f} s, "
                  f"ratio {seconds / cubic:.1f} (target <= 15 at N=4096), peak RSS {rss:.0f} MiB")
        small, large = rows[side // 2], rows[side]
        print(f"peak RSS at N={side} / N={side // 2}: {large[2] / small[2]:.2f} "
              f"(flat memory: close to 1 while the scene grows 4 times)")
        result("guided_speed", n=side, seconds=large[0], gdal_cubic_seconds=large[1],
               ratio=large[0] / large[1], peak_rss_mib=large[2], rss_ratio=large[2] / small[2])


if __name__ == "__main__":
    main()
