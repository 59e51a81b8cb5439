"""Assess magnification on a reference raster, then read the report's metrics.json.

Scenario: before trusting geosr on a new kind of imagery, an analyst checks
it on a scene she already has at full resolution. Under Wald's protocol the
reference is degraded by the scale, magnified back by geosr and by classical
resampling (bicubic, Lanczos, nearest neighbour), and each result is
compared with the reference. The report folder holds metrics.json, a
markdown summary and figures; this script prints PSNR and SSIM per method.

Run from the repository root:

    python examples/assess_and_read_metrics.py
    python examples/assess_and_read_metrics.py my-reference.tif --out report --scale 3
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

import geosr

from _common import DATA, output_folder, run


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("reference", nargs="?", default=DATA / "rgb-byte-crop.tif", type=Path,
                        help="full-resolution reference raster (default: the bundled 3-band crop)")
    parser.add_argument("--out", type=Path, default=None,
                        help="folder to hold the report folder (default: a new temporary folder)")
    parser.add_argument("--scale", type=int, default=2)
    args = parser.parse_args(argv)
    out = output_folder(args.out, "geosr-assess-")
    report_dir = out / "report"

    # Without a model, the model shipped for this scale is assessed.
    geosr.assess_raster(args.reference, report_dir, args.scale)
    print(f"report written to {report_dir}: {', '.join(sorted(p.name for p in report_dir.iterdir()))}")

    # metrics.json is keyed by method; each entry has an "overall" object and
    # a "bands" list. PSNR is in dB; SSIM is 1 for a perfect match.
    metrics = json.loads((report_dir / "metrics.json").read_text())
    methods = [m for m in ("geosr", "bicubic", "lanczos", "nearest") if m in metrics]
    print(f"\n{'method':10} {'PSNR (dB)':>10} {'SSIM':>7}   per-band PSNR")
    for name in methods:
        overall = metrics[name]["overall"]
        bands = " ".join(f"{b['psnr']:.2f}" for b in metrics[name]["bands"])
        print(f"{name:10} {overall['psnr']:10.2f} {overall['ssim']:7.4f}   {bands}")
    best = max(methods, key=lambda m: metrics[m]["overall"]["psnr"])
    print(f"\nhighest PSNR: {best} (x{args.scale}, {metrics['protocol']['valid_pixels']} valid pixels)")
    return 0


if __name__ == "__main__":
    run(main)
