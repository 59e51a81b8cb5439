"""Quality gains over bicubic interpolation for every method and option, and the speed ratio.

Wald's protocol (Wald, Ranchin & Mangolini 1997): degrade a reference by the
scale with the models' degradation (antialiased bicubic), magnify it back,
compare with the reference. Two kinds of reference:

* held-out photos bundled with scikit-image (astronaut, coins; never used to
  train the shipped models), luminance as ``skimage.color.rgb2ycbcr``
  computes it, PSNR with a border of ``scale`` pixels shaved (the standard
  benchmark protocol, common practice), computed by ``skimage.metrics``;
* the Landsat scene ``../shared/data/RGB.byte.tif`` (skipped when absent),
  each band on its own, PSNR over valid pixels pooled over the bands, data
  range 255.

Methods: the shipped anchored models (A+) with and without the geometric
self-ensemble and measurement consistency, and the sparse path trained here
on the shipped models' training photos, with the patch-level and the
image-level high-res dictionary. The reference of every gain is geosr's
bicubic interpolation of the same low-res image (the bicubic of the
standard protocol). The speed ratio times the anchored and the sparse path
magnifying the same image at the same scale in this run.

    .venv/bin/python benchmarks/bench_quality.py [--quick]
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

import numpy as np
from skimage import color, data
from skimage.metrics import peak_signal_noise_ratio

from geosr.core.model import CoupledDictionary
from geosr.core.resample import crop_to_multiple, degrade, upscale_bicubic
from geosr.modelfile import default_model

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "scripts"))
from train_default_models import TRAINING_PHOTOS, load_photo  # noqa: E402

LANDSAT = ROOT.parent / "shared" / "data" / "RGB.byte.tif"

#: Columns of the table: (label, model kind, magnify options).
VARIANTS = [
    ("sparse", "sparse-patch", {}),
    ("sparse, image-level D_h", "sparse-image", {}),
    ("anchored", "anchored", {}),
    ("anchored + ensemble", "anchored", {"ensemble": True}),
    ("anchored + consistency", "anchored", {"consistency": True}),
    ("anchored + both", "anchored", {"ensemble": True, "consistency": True}),
]


def result(**kw):
    print("RESULT " + json.dumps({"benchmark": "quality", **kw}), flush=True)


def luminance(rgb):
    return color.rgb2ycbcr(rgb)[..., 0]


def held_out_photos():
    # scikit-image bundled photos left out of TRAINING_PHOTOS.
    return {"astronaut": luminance(data.astronaut()), "coins": data.coins().astype(np.float64)}


def landsat_bands():
    """The Landsat bands and their valid masks, or None without the shared data."""
    if not LANDSAT.is_file():
        return None
    import rasterio

    with rasterio.open(LANDSAT) as ds:
        bands = ds.read().astype(np.float64)
        masks = ds.read_masks() > 0
    return bands, masks


def photo_psnr(ref, est, scale):
    b = scale
    return peak_signal_noise_ratio(ref[b:-b, b:-b], np.clip(est, 0, 255)[b:-b, b:-b], data_range=255)


def landsat_psnr(refs, ests, masks):
    err = np.concatenate([(np.clip(e, 0, 255) - r)[m] for r, e, m in zip(refs, ests, masks)])
    return 10 * np.log10(255.0**2 / np.mean(err**2))


def train_sparse(scale, high_fit, quick):
    photos = [load_photo(n) for n in TRAINING_PHOTOS[: 4 if quick else None]]
    model = CoupledDictionary(
        scale=scale, method="sparse", n_atoms=128 if quick else 512, n_iter=3 if quick else 20,
        max_samples=10_000 if quick else 100_000, high_fit=high_fit, random_state=0,
    )
    t0 = time.perf_counter()
    model.fit(photos)
    return model, time.perf_counter() - t0


def scenes(scale, quick):
    """(name, magnify(model, options) -> psnr, bicubic psnr) for each reference."""
    out = []
    for name, img in held_out_photos().items():
        hr = crop_to_multiple(img, scale)
        if quick:
            hr = hr[: 40 * scale, : 40 * scale]
        lr = degrade(hr, scale)

        def run(model, opts, hr=hr, lr=lr):
            return photo_psnr(hr, model.magnify(lr, **opts), scale)

        out.append((name, run, photo_psnr(hr, upscale_bicubic(lr, scale), scale)))
    bands = landsat_bands()
    if bands is not None:
        refs, lrs, hr_masks, lr_masks = [], [], [], []
        for band, mask in zip(*bands):
            hr = crop_to_multiple(band, scale)
            m = crop_to_multiple(mask, scale)
            if quick:
                hr, m = hr[200 : 200 + 40 * scale, 200 : 200 + 40 * scale], m[200 : 200 + 40 * scale, 200 : 200 + 40 * scale]
            # A low-res pixel is valid when its whole block is.
            lm = m.reshape(m.shape[0] // scale, scale, m.shape[1] // scale, scale).all(axis=(1, 3))
            refs.append(hr)
            lrs.append(degrade(np.where(m, hr, 0.0), scale))
            lr_masks.append(lm)
            hr_masks.append(np.repeat(np.repeat(lm, scale, 0), scale, 1))

        def run(model, opts):
            ests = [model.magnify(lr, valid=lm, **opts) for lr, lm in zip(lrs, lr_masks)]
            return landsat_psnr(refs, ests, hr_masks)

        bic = [upscale_bicubic(lr, scale) for lr in lrs]
        out.append(("landsat", run, landsat_psnr(refs, bic, hr_masks)))
    return out


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--scales", type=int, nargs="+", default=[2, 3, 4])
    args = parser.parse_args()
    table = {}
    for scale in args.scales:
        models = {"anchored": default_model(scale)}
        for kind in ("patch", "image"):
            models[f"sparse-{kind}"], seconds = train_sparse(scale, kind, args.quick)
            print(f"x{scale}: trained sparse ({kind}-level D_h) in {seconds:.1f} s", flush=True)
        for name, run, bicubic in scenes(scale, args.quick):
            row = table.setdefault((name, scale), {"bicubic": bicubic})
            for label, kind, opts in VARIANTS:
                value = run(models[kind], opts)
                row[label] = value
                result(metric=f"PSNR gain over bicubic, {name}, x{scale}, {label}",
                       value=round(value - bicubic, 3), unit="dB",
                       reference="geosr bicubic interpolation (standard protocol)",
                       reference_value=round(bicubic, 3),
                       notes=f"PSNR {value:.2f} dB")
        if scale == 3:
            speed(models, args.quick)
    labels = [label for label, _, _ in VARIANTS]
    print()
    print("| reference | scale | bicubic PSNR (dB) | " + " | ".join(f"{lab} gain" for lab in labels) + " |")
    print("|---" * (3 + len(labels)) + "|")
    for (name, scale), row in table.items():
        cells = " | ".join(f"{row[lab] - row['bicubic']:+.2f}" for lab in labels)
        print(f"| {name} | x{scale} | {row['bicubic']:.2f} | {cells} |")


def speed(models, quick):
    """Anchored against sparse magnifying the same held-out photo at x3."""
    hr = crop_to_multiple(luminance(data.astronaut()), 3)
    if quick:
        hr = hr[:120, :120]
    lr = degrade(hr, 3)
    times = {}
    for kind in ("anchored", "sparse-patch"):
        models[kind].magnify(lr[:30, :30])  # compile and warm up
        best = float("inf")
        for _ in range(3):
            t0 = time.perf_counter()
            models[kind].magnify(lr)
            best = min(best, time.perf_counter() - t0)
        times[kind] = best
    ratio = times["sparse-patch"] / times["anchored"]
    result(metric="anchored magnification time, astronaut x3", value=round(times["anchored"], 3),
           unit="s", reference="sparse path on the same image and scale",
           reference_value=round(times["sparse-patch"], 3), ratio=round(ratio, 2),
           target="anchored at least 5 times faster than sparse", meets_target=bool(ratio >= 5))


if __name__ == "__main__":
    main()
