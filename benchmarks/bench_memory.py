"""Peak memory of magnify_raster for growing rasters at a fixed chunk size.

Each size runs in a fresh child process, which reports its peak RSS
(``resource.getrusage``) before and after the run. The reference is the
smallest raster measured in the same run: peak memory must not grow with the
scene, so the ratio of each peak to the smallest one should stay near 1.

    .venv/bin/python benchmarks/bench_memory.py [--quick]
"""

import argparse
import json
import os
import subprocess
import sys
import tempfile

import numpy as np

CHILD = r'''
import json, resource, sys, time
from geosr.model import default_model
from geosr.workflow import magnify_raster
model = default_model(2)
base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
t = time.perf_counter()
r = magnify_raster(sys.argv[1], sys.argv[2], model, chunk_size=int(sys.argv[3]), quiet=True, overwrite=True)
dt = time.perf_counter() - t
print(json.dumps({"before_kib": base, "peak_kib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss,
                  "seconds": dt, "out_mpx": r.width * r.height * r.count / 1e6}))
'''


def make_raster(path, side):
    """A uint16 tiled GeoTIFF of the given side, tiled from a scikit-image photo."""
    import rasterio
    from affine import Affine
    from skimage import data

    tile = data.camera().astype(np.uint16) * 40
    with rasterio.open(path, "w", driver="GTiff", width=side, height=side, count=1, dtype="uint16",
                       crs="EPSG:32618", transform=Affine(10, 0, 500000, 0, -10, 4500000),
                       tiled=True, compress="deflate") as ds:
        for r in range(0, side, 512):
            for c in range(0, side, 512):
                h, w = min(512, side - r), min(512, side - c)
                block = np.roll(tile, (r * 7 + c * 3) % 512, axis=(r // 512) % 2)[:h, :w]
                ds.write(block[None], window=((r, r + h), (c, c + w)))


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--chunk", type=int, default=512)
    args = parser.parse_args()
    sides = [256, 512, 1024] if args.quick else [512, 1024, 2048, 4096]
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for side in sides:
            src = os.path.join(tmp, f"src-{side}.tif")
            make_raster(src, side)
            out = subprocess.run([sys.executable, "-c", CHILD, src, os.path.join(tmp, "out.tif"), str(args.chunk)],
                                 capture_output=True, text=True, check=True)
            d = json.loads(out.stdout.strip().splitlines()[-1])
            d["side"] = side
            rows.append(d)
            print(f"{side:5d}^2 uint16 -> x2 {d['out_mpx']:7.2f} Mpx: peak RSS {d['peak_kib'] / 1024:7.1f} MiB "
                  f"(after loading {d['before_kib'] / 1024:6.1f} MiB), {d['seconds']:6.1f} s, "
                  f"{d['out_mpx'] / d['seconds']:5.2f} output Mpx/s", flush=True)
    ref = rows[0]["peak_kib"]
    for d in rows:
        print("RESULT " + json.dumps({
            "benchmark": "memory", "metric": f"peak_rss_{d['side']}px", "value": round(d["peak_kib"] / 1024, 1),
            "unit": "MiB", "reference": f"peak RSS of the {rows[0]['side']} px raster in the same run",
            "reference_value": round(ref / 1024, 1), "ratio": round(d["peak_kib"] / ref, 3),
            "notes": f"chunk {args.chunk}, x2, shipped model; ratio = peak / smallest peak (near 1: bounded)",
        }))
    sizes = np.log([d["out_mpx"] for d in rows])
    times = np.log([d["seconds"] for d in rows])
    exponent = float(np.polyfit(sizes[1:], times[1:], 1)[0]) if len(rows) > 2 else float("nan")
    print("RESULT " + json.dumps({"benchmark": "memory", "metric": "time_exponent", "value": round(exponent, 3),
                                  "unit": "", "notes": "fitted exponent of time against pixel count, sizes after the smallest"}))


if __name__ == "__main__":
    main()
