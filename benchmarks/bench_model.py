"""Model training time and magnification throughput, against bicubic interpolation.

Fits the default-sized model (K-SVD, 1000 atoms, sparsity 3) on about 100,000
training pairs from scikit-image bundled photos, then magnifies a held-out
photo at x3 with both paths and reports output megapixels per second, with
geosr's own bicubic interpolation of the same image measured in the same run
as the reference.

    .venv/bin/python benchmarks/bench_model.py [--quick]
"""

import argparse
import json
import os
import sys
import time

import numpy as np
from skimage import color, data

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from geosr.core.model import CoupledDictionary  # noqa: E402
from geosr.core.resample import crop_to_multiple, degrade, upscale_bicubic  # noqa: E402

from _common import best_of  # noqa: E402


def result(**kw):
    print("RESULT " + json.dumps({"benchmark": "model", **kw}))


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true")
    args = parser.parse_args()
    samples = 20_000 if args.quick else 100_000
    atoms = 256 if args.quick else 1000
    n_iter = 5 if args.quick else 40
    photos = [data.camera(), data.brick(), data.gravel(), data.grass(),
              color.rgb2ycbcr(data.coffee())[..., 0], color.rgb2ycbcr(data.chelsea())[..., 0],
              color.rgb2ycbcr(data.rocket())[..., 0], color.rgb2ycbcr(data.hubble_deep_field())[..., 0]]
    hr = crop_to_multiple(color.rgb2ycbcr(data.astronaut())[..., 0], 3)
    lr = degrade(hr, 3).astype(np.float32)
    print(f"{'step':<34}{'seconds':>10}{'out MP/s':>12}")
    bic = best_of(lambda: upscale_bicubic(lr, 3), 3)
    mp = hr.size / 1e6
    print(f"{'bicubic interpolation (reference)':<34}{bic:>10.3f}{mp / bic:>12.1f}")
    for method in ("sparse", "anchored"):
        model = CoupledDictionary(scale=3, method=method, n_atoms=atoms, n_iter=n_iter,
                                  max_samples=samples, random_state=0)
        t0 = time.perf_counter()
        model.fit(photos)
        fit = time.perf_counter() - t0
        label = f"fit {method} ({model.training_['n_samples']} pairs)"
        print(f"{label:<34}{fit:>10.1f}")
        result(metric=f"fit_{method}_seconds", value=round(fit, 2), unit="s",
               notes=f"{model.training_['n_samples']} pairs, {atoms} atoms, {n_iter} K-SVD iterations",
               target="fit of the default model on about 100,000 pairs in under 60 s",
               meets_target=bool(fit < 60))
        model.magnify(lr[:64, :64])  # compile and warm up
        t = best_of(lambda m=model: m.magnify(lr), 2)
        print(f"{'magnify ' + method:<34}{t:>10.3f}{mp / t:>12.2f}")
        result(metric=f"magnify_{method}_mp_per_s", value=round(mp / t, 3), unit="output MP/s",
               reference="geosr bicubic interpolation of the same image", reference_value=round(mp / bic, 2),
               ratio=round(bic / t, 4), notes="ratio < 1: times slower than bicubic")


if __name__ == "__main__":
    main()
