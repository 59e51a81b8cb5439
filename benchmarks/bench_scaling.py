"""How magnification time grows with the scene, and with worker processes.

1. ``magnify_raster`` (shipped x2 model, threads scheduler, 256-pixel
   chunks so that every size has several blocks) on four raster sizes; the
   exponent of time against pixel count is fitted by least squares in log-log
   (1 means linear).
2. The same raster on a dask.distributed LocalCluster of two single-threaded
   worker processes against one; the reference is the one-worker time
   measured in the same run. Clusters are started before the timing.

    .venv/bin/python benchmarks/bench_scaling.py [--quick]
"""

import argparse
import os
import sys
import tempfile
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from geosr.modelfile import default_model  # noqa: E402
from geosr.pipeline.magnify import magnify_raster  # noqa: E402

from _common import make_raster, result  # noqa: E402


def timed(src, dst, model, **kw):
    t0 = time.perf_counter()
    magnify_raster(src, dst, model, overwrite=True, **kw)
    return time.perf_counter() - t0


def cluster_time(src, warm, dst, model, n_workers, chunk):
    from distributed import Client, LocalCluster

    with LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as cluster, Client(cluster) as client:
        timed(warm, dst, model, scheduler=client, chunk_size=64)  # warm every worker (compilation)
        return timed(src, dst, model, scheduler=client, chunk_size=chunk)


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true")
    args = parser.parse_args()
    sides = [256, 384, 512, 768] if args.quick else [512, 1024, 1536, 2048]
    model = default_model(2)
    model.magnify(np.zeros((40, 40)) + np.arange(40))  # compile outside the timings
    with tempfile.TemporaryDirectory() as tmp:
        dst = os.path.join(tmp, "out.tif")
        rows = []
        for side in sides:
            src = os.path.join(tmp, f"src-{side}.tif")
            make_raster(src, side)
            t = timed(src, dst, model, chunk_size=256)
            rows.append((4 * side * side / 1e6, t))
            print(f"{side:5d}^2 -> x2: {t:7.2f} s, {rows[-1][0] / t:5.2f} output Mpx/s", flush=True)
        mpx, secs = np.array(rows).T
        exponent = float(np.polyfit(np.log(mpx), np.log(secs), 1)[0])
        result("scaling", metric="time_exponent", value=round(exponent, 3), unit="",
               target="1.0 +/- 0.1 (time linear in pixel count)", meets_target=bool(abs(exponent - 1) <= 0.1),
               notes=f"least-squares slope of log time against log output pixels over sides {sides}, x2, "
                     "256-pixel chunks, threads scheduler")
        side = sides[-1]
        src = os.path.join(tmp, f"src-{side}.tif")
        chunk = 128 if args.quick else 256
        warm = os.path.join(tmp, "warm.tif")
        make_raster(warm, 256)
        one = cluster_time(src, warm, dst, model, 1, chunk)
        print(f"LocalCluster, 1 worker : {one:7.2f} s", flush=True)
        two = cluster_time(src, warm, dst, model, 2, chunk)
        print(f"LocalCluster, 2 workers: {two:7.2f} s", flush=True)
        result("scaling", metric="local_cluster_2_workers_speedup", value=round(two, 2), unit="s",
               reference="the same run on a LocalCluster of 1 single-threaded worker process",
               reference_value=round(one, 2), ratio=round(one / two, 3),
               target="at least 1.7 times faster with 2 workers", meets_target=bool(one / two >= 1.7),
               notes=f"{side} x {side} uint16 -> x2, {chunk}-pixel chunks; ratio = 1-worker time / 2-worker "
                     "time; clusters started and warmed on a small raster before timing; the machine is shared")


if __name__ == "__main__":
    main()
