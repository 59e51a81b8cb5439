"""Magnification time of a whole raster against GDAL's cubic resampling of it.

A 4096 x 4096 uint16 GeoTIFF is magnified x3 by ``geosr.magnify_raster``
(default chunks and scheduler) with the shipped anchored and sparse models,
and with the previous shipped anchored model (512 anchors, extracted from git
at ``_common.OLD_MODELS_REF``; left out when git is unavailable) so that the
new default's time is also a ratio to the old one's, measured in this run. The reference is what a
user would run instead: rasterio ``read(out_shape=..., resampling=cubic)``
of the same raster to the same grid plus a write of the result as a tiled
GeoTIFF with the creation options geosr used. Both sides are timed from
opening the source to a closed output file (reading, features, coding,
reassembly, writing).

    .venv/bin/python benchmarks/bench_throughput.py [--quick]
"""

import argparse
import os
import sys
import tempfile
import time

import numpy as np
import rasterio
from rasterio.enums import Resampling

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from geosr.modelfile import default_model, load_models  # noqa: E402
from geosr.pipeline.magnify import magnify_raster  # noqa: E402

from _common import OLD_MODELS_REF, extract_old_models, make_raster, result, training_photos  # noqa: E402

SCALE = 3


def gdal_cubic(src, dst, like):
    """Cubic resampling by GDAL (through rasterio) plus a tiled write like ``like``'s."""
    t0 = time.perf_counter()
    with rasterio.open(like) as ref:
        profile = ref.profile
    with rasterio.open(src) as ds:
        data = ds.read(out_shape=(ds.count, ds.height * SCALE, ds.width * SCALE), resampling=Resampling.cubic)
    with rasterio.open(dst, "w", **profile) as out:
        out.write(data)
    return time.perf_counter() - t0


def geosr_run(src, dst, model):
    t0 = time.perf_counter()
    magnify_raster(src, dst, model, overwrite=True)
    return time.perf_counter() - t0


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true")
    args = parser.parse_args()
    side = 1024 if args.quick else 4096
    models = {"anchored": default_model(SCALE, "anchored"), "sparse": default_model(SCALE, "sparse")}
    targets = {"anchored": 10.0, "sparse": 40.0}
    with tempfile.TemporaryDirectory() as tmp:
        old, reasons = extract_old_models(OLD_MODELS_REF, [SCALE], tmp)
        for reason in reasons:
            print(f"previous anchored model left out: {reason}", flush=True)
        if SCALE in old:
            models["previous anchored"] = load_models(old[SCALE])[0]
        # Compile the kernels outside the timings.
        warm = np.asarray(training_photos()[0][:48, :48], dtype=np.float64)
        for model in models.values():
            model.magnify(warm)
        src = os.path.join(tmp, "src.tif")
        make_raster(src, side)
        out = os.path.join(tmp, "out.tif")
        ref_out = os.path.join(tmp, "ref.tif")
        times = {}
        for name, model in models.items():
            times[name] = geosr_run(src, out, model)
            print(f"geosr {name:8s} {times[name]:8.1f} s", flush=True)
            if name == "anchored":
                # The reference right after, with the same output layout.
                ref = gdal_cubic(src, ref_out, out)
                print(f"GDAL cubic + tiled write {ref:8.1f} s", flush=True)
        ref2 = gdal_cubic(src, ref_out, out)
        ref = min(ref, ref2)
        mpx = (side * SCALE) ** 2 / 1e6
        for name, t in times.items():
            if name == "previous anchored":
                continue
            ratio = t / ref
            result("throughput", metric=f"magnify_{name}_x{SCALE}_seconds", value=round(t, 2), unit="s",
                   reference="rasterio read(out_shape, Resampling.cubic) + tiled GeoTIFF write, same raster",
                   reference_value=round(ref, 2), ratio=round(ratio, 2),
                   target=f"at most {targets[name]:g} times GDAL's time", meets_target=bool(ratio <= targets[name]),
                   notes=f"{side} x {side} uint16 -> x{SCALE} ({mpx:.0f} output Mpx, {mpx / t:.2f} Mpx/s); "
                         "ratio = geosr time / GDAL time (lower is better); default chunks, threads scheduler")
        if "previous anchored" in times:
            ratio = times["anchored"] / times["previous anchored"]
            result("throughput", metric=f"magnify_anchored_x{SCALE}_seconds_vs_previous_model",
                   value=round(times["anchored"], 2), unit="s",
                   reference=f"previous shipped anchored model (git {OLD_MODELS_REF}), same raster, this run",
                   reference_value=round(times["previous anchored"], 2), ratio=round(ratio, 2),
                   target="at most 1.5 times the previous model's time", meets_target=bool(ratio <= 1.5),
                   notes="ratio = new time / previous time (lower is better)")


if __name__ == "__main__":
    main()
