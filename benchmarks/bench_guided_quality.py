"""Guided magnification against the classical baselines and single-image geosr.

Wald's protocol (Wald, Ranchin & Mangolini 1997) through ``geosr assess
--guide`` (:func:`geosr.assess.protocol.assess_raster` with ``guide=``): the
reference is degraded by the scale, magnified back by every method, the
guided ones reading a guide on the reference's grid, and compared with the
reference over valid pixels.

Scenes (0 is fill in both): the Landsat 8 bands 2-4 scene of
``../shared/data`` (stacked into one 3-band reference) and ``RGB.byte.tif``;
each is skipped when absent (``--quick`` uses the vendored 256 x 256 crops of
``tests/data`` instead). Two set-ups per scene and scale:

* ``all``: one run on the 3-band reference, guide = mean of all bands;
* ``loo``: one run per band, the band alone as reference, guide = mean of
  the other two bands (the band itself never feeds its own guide).

Figures: the mean over bands of the per-band PSNR (dB) of GDAL bicubic, geosr's
single-image magnification (the shipped model), the high-pass and GSA
baselines and geosr's guided regression; the differences guided minus the
better baseline and guided minus single-image, measured in the same run;
ERGAS pooled over the bands; SAM (degrees, ``all`` only: the ``loo`` runs
see one band at a time); QNR of the guided output; the share of compared pixels where
the guided output falls back to bicubic interpolation (its guide footprint not wholly
valid, e.g. along a scene's fill border), and guided minus the better baseline over the
other pixels (the mean over runs of PSNR on them).

    .venv/bin/python benchmarks/bench_guided_quality.py [--quick] [--scales 2 3]
"""

from __future__ import annotations

import argparse
import logging
import math
import tempfile
import time
from pathlib import Path

import numpy as np
import rasterio

from geosr.assess.protocol import assess_raster

ROOT = Path(__file__).resolve().parents[1]
SHARED = ROOT.parent / "shared" / "data"
VENDORED = ROOT / "tests" / "data"

METHODS = ("bicubic", "geosr", "highpass", "substitution", "guided")


def _scenes(quick):
    """(name, [per-band arrays], profile) of every scene present."""
    if quick:
        sources = {"landsat8-crop": [VENDORED / f"landsat8-b{b}-crop.tif" for b in (2, 3, 4)],
                   "rgb-byte-crop": [VENDORED / "rgb-byte-crop.tif"]}
    else:
        sources = {"landsat8": [SHARED / f"landsat8-scene-b{b}.tif" for b in (2, 3, 4)],
                   "RGB.byte": [SHARED / "RGB.byte.tif"]}
    for name, paths in sources.items():
        if not all(p.exists() for p in paths):
            print(f"# {name}: skipped, {paths[0].parent} lacks it")
            continue
        bands = []
        for p in paths:
            with rasterio.open(p) as ds:
                bands += list(ds.read())
                profile = ds.profile
        yield name, np.stack(bands), profile


def _write(path, data, profile, dtype):
    prof = {"driver": "GTiff", "height": data.shape[1], "width": data.shape[2], "count": data.shape[0],
            "dtype": dtype, "crs": profile["crs"], "transform": profile["transform"], "nodata": 0}
    with rasterio.open(path, "w", **prof) as ds:
        ds.write(data.astype(dtype))
    return path


def _guide(data, which):
    """Mean of the bands ``which`` where every band is valid (non-zero), 0 elsewhere."""
    valid = (data > 0).all(axis=0)
    return np.where(valid, data[which].astype(np.float64).mean(axis=0), 0.0)[None]


def _run(ref, guide, scale, folder):
    return assess_raster(ref, folder, scale, guide=[guide])


def _setups(name, data, profile, scale, tmp):
    """{setup: [metrics of each run]} for the two set-ups."""
    dtype = str(data.dtype)
    runs = {}
    ref = _write(tmp / f"{name}-ref.tif", data, profile, dtype)
    g = _write(tmp / f"{name}-guide-all.tif", _guide(data, list(range(3))), profile, "float32")
    runs["all"] = [_run(ref, g, scale, tmp / f"{name}-all-x{scale}")]
    runs["loo"] = []
    for b in range(3):
        others = [i for i in range(3) if i != b]
        # the band's own zeros and its partners' zeros are fill
        one = np.where((data > 0).all(axis=0), data[b], 0)[None]
        ref_b = _write(tmp / f"{name}-ref-b{b}.tif", one, profile, dtype)
        g_b = _write(tmp / f"{name}-guide-b{b}.tif", _guide(data, others), profile, "float32")
        runs["loo"].append(_run(ref_b, g_b, scale, tmp / f"{name}-loo{b}-x{scale}"))
    return runs


def _summary(runs, setup):
    """Mean per-band PSNR, pooled ERGAS, SAM and guided QNR of a set-up's runs."""
    out = {}
    for m in METHODS:
        psnr = [band["psnr"] for r in runs for band in r[m]["bands"]]
        ergas = [band["ergas"] for r in runs for band in r[m]["bands"]]
        out[m] = {"psnr": float(np.mean(psnr)),
                  # ERGAS = 100/s sqrt(mean_b (RMSE_b / mu_b)^2): pool the per-band terms
                  "ergas": math.sqrt(float(np.mean(np.square(ergas)))),
                  "sam": runs[0][m]["overall"]["sam"] if setup == "all" else None}
    out["qnr"] = float(np.mean([r["no_reference"]["methods"]["guided"]["qnr"] for r in runs]))
    out["corr"] = float(np.min([c for r in runs for c in r["guide"]["correlation"]]))
    out["fallback"] = float(np.mean([r["guide"]["fallback_share"] for r in runs]))
    # guided minus the better baseline over the pixels where guided did not fall back
    foot = {m: np.mean([r["guide"]["footprint_psnr"][m] for r in runs]) for m in METHODS}
    out["foot_gain"] = float(foot["guided"] - max(foot["highpass"], foot["substitution"]))
    return out


def _fmt(v, nd=2):
    return "-" if v is None else f"{v:.{nd}f}"


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true", help="the vendored 256 x 256 crops")
    parser.add_argument("--scales", type=int, nargs="+", default=[2, 3])
    args = parser.parse_args()
    logging.disable(logging.INFO)
    head = ("| scene | setup | x | " + " | ".join(f"PSNR {m}" for m in METHODS)
            + " | guided - best baseline | guided - single | ERGAS guided / best baseline "
            "| SAM guided / best baseline | QNR guided | min corr | guided fallback | guided - best baseline off the fallback | s per run |")
    print(head)
    print("|" + "---|" * (head.count("|") - 1))
    with tempfile.TemporaryDirectory() as tmp_name:
        tmp = Path(tmp_name)
        for name, data, profile in _scenes(args.quick):
            for scale in args.scales:
                t0 = time.perf_counter()
                runs = _setups(name, data, profile, scale, tmp)
                seconds = (time.perf_counter() - t0) / 4
                for setup in ("all", "loo"):
                    s = _summary(runs[setup], setup)
                    best = max(("highpass", "substitution"), key=lambda m: s[m]["psnr"])
                    cells = [_fmt(s[m]["psnr"]) for m in METHODS]
                    sam = (f"{_fmt(s['guided']['sam'], 3)} / {_fmt(s[best]['sam'], 3)}"
                           if setup == "all" else "-")
                    print(f"| {name} | {setup} | {scale} | " + " | ".join(cells)
                          + f" | {s['guided']['psnr'] - s[best]['psnr']:+.2f} ({best})"
                          + f" | {s['guided']['psnr'] - s['geosr']['psnr']:+.2f}"
                          + f" | {_fmt(s['guided']['ergas'], 3)} / {_fmt(s[best]['ergas'], 3)}"
                          + f" | {sam} | {_fmt(s['qnr'], 4)} | {_fmt(s['corr'], 3)} | {100 * s['fallback']:.1f}% | {s['foot_gain']:+.2f} | {seconds:.0f} |",
                          flush=True)


if __name__ == "__main__":
    main()
