"""Achieved floating-point rate of the coding and projection steps.

The reference is this machine's single-precision matrix-multiply rate:
numpy ``@`` on two 4096 x 4096 float32 matrices (best of three, all BLAS
threads), measured in the same run. Each step runs on the features of a
real image (the scikit-image "camera" photo scaled to 16 bits and tiled,
through the shipped x3 model's feature operator) in two threads over the
two halves, as the block scheduler runs them. FLOP counts are the useful
arithmetic of each step (multiply and add counted separately):

- anchor search: ``2 n d k`` (correlations of n features of length d with k atoms);
- anchored projection: ``2 n p d`` (a p x d regression per patch);
- sparse coding (OMP, L atoms, 1000-atom dictionary): ``2 n d k`` for the
  correlations plus ``2 n k t`` for the Gram update of iteration t = 1..L.

    .venv/bin/python benchmarks/bench_flops.py [--quick]
"""

import argparse
import os
import sys
from concurrent.futures import ThreadPoolExecutor

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from geosr.core.anchored import apply_projections, nearest_anchors  # noqa: E402
from geosr.core.features import FEATURE_RADIUS, WINDOW_CENTRE, lowres_windows  # noqa: E402
from geosr.core.sparse import omp_codes  # noqa: E402
from geosr.modelfile import default_model  # noqa: E402

from _common import best_of, result  # noqa: E402


def in_two_threads(fn, *arrays):
    """Run fn on the two halves of the arrays' first axis in two threads."""
    half = len(arrays[0]) // 2
    parts = [[a[:half] for a in arrays], [a[half:] for a in arrays]]
    with ThreadPoolExecutor(2) as pool:
        list(pool.map(lambda args: fn(*args), parts))


def image_features(model, side):
    from skimage import data

    img = np.tile(data.camera().astype(np.float64) * 40, (side // 512 + 1, side // 512 + 1))[:side, :side]
    padded = np.pad(img, FEATURE_RADIUS, mode="symmetric")
    windows = lowres_windows(padded)
    windows = windows - windows[:, WINDOW_CENTRE : WINDOW_CENTRE + 1]
    return np.ascontiguousarray(windows @ model.feature_kernel_.astype(np.float64).T)


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--quick", action="store_true")
    args = parser.parse_args()
    n_side = 1024 if args.quick else 4096
    a = np.random.default_rng(0).standard_normal((n_side, n_side)).astype(np.float32)
    b = np.random.default_rng(1).standard_normal((n_side, n_side)).astype(np.float32)
    t_mm = best_of(lambda: a @ b, 3)
    ref = 2.0 * n_side**3 / t_mm / 1e9
    print(f"numpy float32 {n_side}^2 matmul: {ref:8.1f} GFLOP/s", flush=True)

    model = default_model(3)
    features = image_features(model, 256 if args.quick else 512)
    n, d = features.shape
    k = model.dictionary_low_.shape[1]
    p = model.projections_.shape[1]
    nearest_anchors(features[:8], model.dictionary_low_)  # compile
    t_anchor = best_of(lambda: in_two_threads(lambda f: nearest_anchors(f, model.dictionary_low_), features), 3)
    anchors = nearest_anchors(features, model.dictionary_low_)
    t_proj = best_of(lambda: in_two_threads(lambda f, a_: apply_projections(f, a_, model.projections_),
                                            features, anchors), 3)
    rng = np.random.default_rng(2)
    atoms = rng.standard_normal((d, 1000)).astype(np.float32)
    atoms /= np.linalg.norm(atoms, axis=0)
    f32 = features.astype(np.float32)
    sparsity = 3
    omp_codes(atoms, f32[:64].T, sparsity)  # compile
    t_omp = best_of(lambda: omp_codes(atoms, f32.T, sparsity), 3)
    steps = [
        ("anchor_search", t_anchor, 2.0 * n * d * k, f"{n} features of {d}, {k} anchors; float32 correlations, "
                                                     "near ties refined in float64"),
        ("anchored_projection", t_proj, 2.0 * n * p * d, f"{n} patches of {p} from {d} features, float64 "
                                                         "grouped BLAS products (1 BLAS thread per task)"),
        ("sparse_coding_omp", t_omp, 2.0 * n * d * 1000 + 2.0 * n * 1000 * sum(range(1, sparsity + 1)),
         f"{n} features, random unit-norm {d} x 1000 dictionary, L = {sparsity}, float32 batch OMP"),
    ]
    for name, t, flops, note in steps:
        rate = flops / t / 1e9
        print(f"{name:22s} {t:7.3f} s {rate:8.1f} GFLOP/s  {rate / ref:6.3f} of matmul", flush=True)
        result("flops", metric=f"{name}_gflops", value=round(rate, 2), unit="GFLOP/s",
               reference=f"numpy float32 {n_side} x {n_side} matmul on this machine", reference_value=round(ref, 1),
               ratio=round(rate / ref, 4), notes=note + "; ratio = fraction of the matmul rate (physical limit)")


if __name__ == "__main__":
    main()
