"""Helpers shared by the benchmark scripts (not a benchmark itself)."""

import json
import subprocess
import time
from pathlib import Path

import numpy as np


def result(benchmark, **fields):
    """Print one RESULT line (see run_all.py for the keys)."""
    print("RESULT " + json.dumps({"benchmark": benchmark, **fields}), flush=True)


def make_raster(path, side, tile_side=512):
    """A uint16 tiled GeoTIFF of the given side, tiled from a scikit-image photo.

    The scikit-image "camera" photo (512 x 512, bundled with the package) is
    scaled to a 16-bit range and rolled differently in every tile so that
    tiles are not identical.
    """
    import rasterio
    from affine import Affine
    from skimage import data

    tile = data.camera().astype(np.uint16) * 40
    with rasterio.open(path, "w", driver="GTiff", width=side, height=side, count=1, dtype="uint16",
                       crs="EPSG:32618", transform=Affine(10, 0, 500000, 0, -10, 4500000),
                       tiled=True, compress="deflate") as ds:
        for r in range(0, side, tile_side):
            for c in range(0, side, tile_side):
                h, w = min(tile_side, side - r), min(tile_side, side - c)
                block = np.roll(tile, (r * 7 + c * 3) % 512, axis=(r // 512) % 2)[:h, :w]
                ds.write(block[None], window=((r, r + h), (c, c + w)))


def training_photos():
    """Grey photos bundled with scikit-image, for the models trained in benchmarks."""
    from skimage import color, data

    return [data.camera(), data.brick(), data.gravel(), data.grass(),
            color.rgb2ycbcr(data.coffee())[..., 0], color.rgb2ycbcr(data.chelsea())[..., 0],
            color.rgb2ycbcr(data.rocket())[..., 0]]


def best_of(fn, repeat):
    """The shortest of ``repeat`` wall-clock timings of ``fn()``, in seconds."""
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


#: The commit whose shipped anchored models were the previous ones (512 anchors).
OLD_MODELS_REF = "fab1e1c"

ROOT = Path(__file__).resolve().parents[1]


def extract_old_models(ref, scales, folder):
    """Write the anchored models shipped at git ``ref`` into ``folder``: {scale: path}, and reasons."""
    paths, reasons = {}, []
    for scale in scales:
        for name in (f"default-x{scale}.npz", f"anchored-x{scale}.npz"):
            try:
                proc = subprocess.run(["git", "-C", str(ROOT), "show", f"{ref}:geosr/models/{name}"],
                                      capture_output=True, check=False)
            except OSError as exc:
                return {}, [f"git is unavailable ({exc})"]
            if proc.returncode == 0:
                path = Path(folder) / name
                path.write_bytes(proc.stdout)
                paths[scale] = path
                break
        else:
            err = proc.stderr.decode(errors="replace").strip().splitlines()
            reasons.append(f"x{scale}: git show {ref}:geosr/models/default-x{scale}.npz failed"
                           + (f" ({err[0]})" if err else ""))
    return paths, reasons
