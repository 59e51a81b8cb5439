"""Magnify a raster on a dask.distributed cluster.

Scenario: a mapping team runs its scenes on a shared dask cluster. Here the
cluster is a LocalCluster on this machine (two worker processes with one
thread each, listening on 127.0.0.1 only); with a real cluster, pass its
address instead and make sure every worker sees the input and output paths.
geosr sends the blocks of the raster to the workers and writes the result
here; the small chunk size makes even the small bundled raster span several
blocks, so both workers get some.

Run from the repository root:

    python examples/cluster.py
    python examples/cluster.py my.tif --out out --address tcp://10.0.0.5:8786
"""

from __future__ import annotations

import rasterio

import geosr

from _common import output_folder, run, scene_arguments


def magnify_on(address, src, dst, scale):
    """Magnify ``src`` with the cluster at ``address`` doing the block work."""
    result = geosr.magnify_raster(src, dst, scale=scale, scheduler=address, chunk_size=128)
    print(f"wrote {result.dst} ({result.width} x {result.height}) in {result.blocks} blocks "
          f"on {result.scheduler}, {result.seconds:.1f} s")
    with rasterio.open(dst) as ds:
        print(f"CRS {ds.crs}, pixel size {ds.res[0]:g}, GEOSR_SYNTHESIZED = {ds.tags()['GEOSR_SYNTHESIZED']}")


def main(argv=None):
    parser = scene_arguments(__doc__)
    parser.add_argument("--address", default=None,
                        help="address of a running scheduler (default: start a LocalCluster)")
    args = parser.parse_args(argv)
    out = output_folder(args.out, "geosr-cluster-")
    dst = out / f"{args.src.stem}-x{args.scale}.tif"
    if args.address:
        magnify_on(args.address, args.src, dst, args.scale)
        return 0

    from dask.distributed import LocalCluster

    # Two worker processes, one thread each, on the loopback interface only;
    # no dashboard. Leaving the "with" block shuts the cluster down.
    with LocalCluster(n_workers=2, threads_per_worker=1, host="127.0.0.1",
                      dashboard_address=None, processes=True) as cluster:
        print(f"started a LocalCluster at {cluster.scheduler_address}")
        magnify_on(cluster.scheduler_address, args.src, dst, args.scale)
    print("cluster shut down")
    return 0


if __name__ == "__main__":  # required: the worker processes import this file
    run(main)
