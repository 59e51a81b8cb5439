"""Gain and cost of a second anchored stage trained on the first stage's output.

Method: the cascade of anchored regressions of Timofte, Rothe & Van Gool
(2016, "Seven ways to improve example-based single image super resolution",
CVPR): a second A+ stage (Timofte, De Smet & Van Gool 2014) sees the high-res
estimate of the first and predicts what is still missing.

* Stage 1 is geosr's anchored model (:class:`geosr.core.model.CoupledDictionary`,
  1024 anchors, 300,000 pairs, neighbourhoods of 2048, ridge 0.1, 12 rescaled
  copies) trained on the eight flips and rotations of eleven natural-scene
  photos bundled with scikit-image and matplotlib (:data:`TRAINING`).
* Stage 2 is built here and left outside the package. Its feature of a
  low-res cell is read from the stage-1 estimate: the first and second
  derivative filters of geosr's features (taps ``spacing`` high-res pixels
  apart, ``spacing = scale`` by default, as in the first stage) sampled over
  the ``3s x 3s`` patch around the cell, reduced by uncentred PCA keeping
  99.9 % of the energy (``--energy``); at run time the projection is folded
  into one linear map of the estimate's window around the cell. Anchors: K-SVD on those features
  (:func:`geosr.core.sparse.ksvd`, 1024 atoms, sparsity 3, 10 iterations).
  Regressions: A+ (:func:`geosr.core.anchored.fit_projections`, 2048
  neighbours, ridge 0.1) from the feature to the residual patch ``truth -
  stage-1 estimate``. At run time the predicted patches are overlap-averaged
  (:func:`geosr.core.features.overlap_average`) and added to the estimate.
* Stage 2's training pairs come from stage 1's output on the training photos
  only (the eight flips and rotations, each at the scales ``0.98**k`` for
  ``k`` in :data:`STAGE2_COPIES`), at most 300,000 pairs.

Evaluation: held-out photos bundled with scikit-image (astronaut luminance as
``skimage.color.rgb2ycbcr`` computes it, coins), never used in training;
degraded with geosr's antialiased bicubic, PSNR with a border of ``scale``
pixels shaved, data range 255 (``skimage.metrics.peak_signal_noise_ratio``,
the standard protocol; common practice). Gains are over geosr's bicubic
interpolation of the same low-res image. Times: best of five wall-clock
runs of stage 1 alone, of both stages, and of the shipped default model of the
scale, on the same low-res image.

    .venv/bin/python benchmarks/bench_cascade.py [--scales 3] [--cache DIR] [--spacing N] [--energy E]

``--cache DIR`` keeps the trained stages (``.npz``) between runs; a cached
stage 1 is used only when its parameters match.
"""

from __future__ import annotations

import argparse
import math
import time
from pathlib import Path

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from scipy.ndimage import correlate1d
from skimage import color, data
from skimage.metrics import peak_signal_noise_ratio

from geosr.core.anchored import apply_projections, fit_projections, nearest_anchors
from geosr.core.features import detail_patches, overlap_average, pca_basis
from geosr.core.model import CoupledDictionary
from geosr.core.resample import crop_to_multiple, degrade, rescale, upscale_bicubic
from geosr.core.sparse import ksvd
from geosr.modelfile import default_model

from _common import best_of, result

#: Training photos: natural scenes bundled with scikit-image, plus matplotlib's
#: sample photo of Grace Hopper and the left view of scikit-image's stereo pair.
TRAINING = ["camera", "chelsea", "coffee", "rocket", "brick", "gravel", "grass", "clock",
            "moon", "motorcycle", "hopper"]

#: Stage 1: geosr's anchored model at the experiment's budget.
STAGE1 = dict(method="anchored", n_atoms=1024, sparsity=3, n_iter=10, max_samples=300_000,
              neighbours=2048, ridge=0.1, rescaled_copies=12, random_state=0)

#: Stage 2's budget, the same as stage 1's.
STAGE2 = dict(n_atoms=1024, sparsity=3, n_iter=10, max_samples=300_000, neighbours=2048,
              ridge=0.1, energy=0.999)

#: Rescaled copies 0.98**k of every training image that stage 2 learns from.
STAGE2_COPIES = (0, 3, 6, 9)

#: Relative feature norm under which a training patch counts as flat (as in stage 1).
FLAT_FRACTION = 0.02


def load(name):
    """A training photo as float64 luminance."""
    if name == "motorcycle":
        img = data.stereo_motorcycle()[0]
    elif name == "hopper":
        import matplotlib.cbook as cbook
        import matplotlib.image as mimage

        img = mimage.imread(cbook.get_sample_data("grace_hopper.jpg"))
    else:
        img = getattr(data, name)()
    if img.ndim == 3:
        img = color.rgb2ycbcr(img[..., :3])[..., 0]
    return img.astype(np.float64)


def dihedral(img):
    """The eight flips and rotations of an image."""
    flipped = img[:, ::-1]
    return [np.ascontiguousarray(np.rot90(a, k)) for a in (img, flipped) for k in range(4)]


def held_out():
    return {"astronaut": color.rgb2ycbcr(data.astronaut())[..., 0],
            "coins": data.coins().astype(np.float64)}


def training_images():
    return [d for name in TRAINING for d in dihedral(load(name))]


# ------------------------------------------------------------------ stage 1
def stage1_model(scale, images, cache):
    """Stage 1, trained (or read from the cache when its parameters match)."""
    model = CoupledDictionary(scale=scale, **STAGE1)
    path = None if cache is None else Path(cache) / f"cascade-stage1-x{scale}.npz"
    if path is not None and path.is_file():
        cached = CoupledDictionary.load(path)
        if cached.get_params() == model.get_params():
            print(f"x{scale}: stage 1 read from {path}", flush=True)
            return cached, None
    t0 = time.perf_counter()
    model.fit(images)
    seconds = time.perf_counter() - t0
    print(f"x{scale}: stage 1 trained in {seconds:.1f} s", flush=True)
    if path is not None:
        model.save(path)
    return model, seconds


# ------------------------------------------------------------------ stage 2
def derivative_taps(spacing):
    """First and second derivative filters with taps ``spacing`` pixels apart."""
    gap = [0.0] * (spacing - 1)
    return [np.array([1.0, *gap, -1.0]), np.array([0.5, *gap, -1.0, *gap, 0.5])]


def estimate_features(est, scale, spacing):
    """Raw features of every patch centre ``-1 .. h`` x ``-1 .. w`` of a high-res estimate.

    Returns an array (h + 2, w + 2, 4 * (3s)**2): the four derivative maps
    (first and second, along columns and rows) over the centre's patch.
    """
    s = scale
    h, w = est.shape[0] // s, est.shape[1] // s
    reach = spacing
    padded = np.pad(est.astype(np.float32), 2 * s + reach, mode="symmetric")
    maps = [correlate1d(padded, taps, axis=axis, mode="nearest")[reach:-reach, reach:-reach]
            for taps in derivative_taps(spacing) for axis in (1, 0)]
    # Map row 0 is high-res row -2s: the patch of centre c starts at map row s * (c + 1).
    view = sliding_window_view(np.stack(maps), (3 * s, 3 * s), axis=(1, 2))[:, ::s, ::s]
    return np.ascontiguousarray(view.transpose(1, 2, 0, 3, 4)).reshape(h + 2, w + 2, -1)


def window_kernel(basis, scale, spacing):
    """The PCA-projected feature as a linear map of the estimate's window around a centre.

    The window is ``3s + 2 * spacing`` high-res pixels wide (the patch and the
    derivative reach); returns ``basis.T @ raw`` where ``raw`` maps the
    flattened window to the raw feature of :func:`estimate_features`.
    """
    s, r = scale, spacing
    side = 3 * s + 2 * r
    impulses = np.eye(side * side, dtype=np.float64).reshape(side * side, side, side)
    maps = [correlate1d(impulses, taps, axis=axis, mode="constant")[:, r:-r, r:-r]
            for taps in derivative_taps(spacing) for axis in (2, 1)]
    raw = np.concatenate([m.reshape(side * side, -1) for m in maps], axis=1)  # (window, raw)
    return (raw @ basis.astype(np.float64)).T.astype(np.float32)  # (d, window)


def window_features(est, kernel, scale, spacing):
    """Projected features of every patch centre ``-1 .. h`` x ``-1 .. w``: windows times the kernel."""
    s, r = scale, spacing
    h, w = est.shape[0] // s, est.shape[1] // s
    padded = np.pad(est.astype(np.float32), 2 * s + r, mode="symmetric")
    side = 3 * s + 2 * r
    windows = sliding_window_view(padded, (side, side))[::s, ::s]  # (h + 2, w + 2, side, side)
    return windows.reshape((h + 2) * (w + 2), side * side) @ kernel.T, (h + 2, w + 2)


def stage2_pairs(stage1, images, scale, spacing, rng):
    """Raw features and residual patches from stage 1's output on the training images."""
    s = scale
    n_copies = len(images) * len(STAGE2_COPIES)
    budget = int(math.ceil(1.5 * STAGE2["max_samples"] / n_copies))
    feats, details = [], []
    for img in images:
        for k in STAGE2_COPIES:
            hr = crop_to_multiple(img if k == 0 else rescale(img, 0.98**k), s)
            hr = (hr / hr.std()).astype(np.float32)  # references of any range weigh alike
            est = stage1.magnify(degrade(hr, s).astype(np.float32))
            raw = estimate_features(est, s, spacing)
            h, w = hr.shape[0] // s, hr.shape[1] // s
            ci, cj = np.meshgrid(np.arange(1, h - 1), np.arange(1, w - 1), indexing="ij")
            ci, cj = ci.ravel(), cj.ravel()
            if len(ci) > 3 * budget:
                pick = np.sort(rng.choice(len(ci), size=3 * budget, replace=False))
                ci, cj = ci[pick], cj[pick]
            f = raw[ci + 1, cj + 1]
            norms = np.linalg.norm(f, axis=1)
            keep = np.flatnonzero(norms > FLAT_FRACTION * norms.mean())[:budget]
            feats.append(f[keep])
            details.append(detail_patches(hr - est, s, ci[keep], cj[keep]).astype(np.float32))
    feats, details = np.concatenate(feats), np.concatenate(details)
    if len(feats) > STAGE2["max_samples"]:
        keep = np.sort(rng.choice(len(feats), size=STAGE2["max_samples"], replace=False))
        feats, details = feats[keep], details[keep]
    return feats, details


def fit_stage2(stage1, images, scale, spacing, energy, seed=0):
    """Stage 2's arrays: PCA basis, anchors and A+ regressions."""
    rng = np.random.default_rng(seed)
    raw, details = stage2_pairs(stage1, images, scale, spacing, rng)
    r64 = raw.astype(np.float64)
    basis, _ = pca_basis(r64.T @ r64, energy)
    basis = basis.astype(np.float32)
    feats = raw @ basis
    dictionary, _ = ksvd(feats.T, STAGE2["n_atoms"], STAGE2["sparsity"], STAGE2["n_iter"],
                         random_state=rng)
    dictionary = np.asarray(dictionary, dtype=np.float32)
    projections = fit_projections(dictionary, feats, details, STAGE2["neighbours"], STAGE2["ridge"])
    return {"basis": basis, "dictionary": dictionary, "projections": projections,
            "spacing": np.int64(spacing), "n_samples": np.int64(len(raw))}


def stage2_detail(stage2, est, scale):
    """Stage 2's overlap-averaged correction of a stage-1 estimate."""
    spacing = int(stage2["spacing"])
    kernel = window_kernel(stage2["basis"], scale, spacing)  # cheap; a shipped model would store it
    feats, (hp, wp) = window_features(est, kernel, scale, spacing)
    patches = apply_projections(feats, nearest_anchors(feats, stage2["dictionary"]),
                                stage2["projections"])
    return overlap_average(patches.reshape(hp, wp, -1), scale)


def cascade_magnify(stage1, stage2, lr, scale):
    est = stage1.magnify(lr)
    return est + stage2_detail(stage2, est, scale)


def stage2_model(stage1, images, scale, spacing, energy, cache):
    """Stage 2, trained (or read from the cache) and its training time (None when read)."""
    path = None if cache is None else Path(cache) / f"cascade-stage2-x{scale}-d{spacing}-e{energy}.npz"
    if path is not None and path.is_file():
        print(f"x{scale}: stage 2 read from {path}", flush=True)
        with np.load(path) as f:
            return dict(f), None
    t0 = time.perf_counter()
    stage2 = fit_stage2(stage1, images, scale, spacing, energy)
    seconds = time.perf_counter() - t0
    print(f"x{scale}: stage 2 trained in {seconds:.1f} s on {int(stage2['n_samples'])} pairs, "
          f"{stage2['basis'].shape[1]} features", flush=True)
    if path is not None:
        np.savez(path, **stage2)
    return stage2, seconds


# --------------------------------------------------------------- measuring
def psnr(ref, est, scale):
    b = slice(scale, -scale)
    return peak_signal_noise_ratio(ref[b, b], np.clip(est, 0, 255)[b, b], data_range=255)


def measure(scale, stage1, stage2, variant):
    """RESULT lines for each held-out photo; returns the table rows."""
    shipped = default_model(scale)
    rows = []
    for name, img in held_out().items():
        hr = crop_to_multiple(img, scale)
        lr = degrade(hr, scale).astype(np.float32)
        bicubic = psnr(hr, upscale_bicubic(lr, scale), scale)
        one = psnr(hr, stage1.magnify(lr), scale)
        two = psnr(hr, cascade_magnify(stage1, stage2, lr, scale), scale)
        t1 = best_of(lambda lr=lr: stage1.magnify(lr), 5)
        t2 = best_of(lambda lr=lr: cascade_magnify(stage1, stage2, lr, scale), 5)
        t0 = best_of(lambda lr=lr: shipped.magnify(lr), 5)
        rows.append((name, scale, bicubic, one - bicubic, two - bicubic, t0, t1, t2))
        ref = dict(reference="geosr bicubic interpolation (standard protocol)",
                   reference_value=round(bicubic, 3))
        result("cascade", metric=f"PSNR gain over bicubic, {name}, x{scale}, stage 1",
               value=round(one - bicubic, 3), unit="dB", notes=f"PSNR {one:.2f} dB", **ref)
        result("cascade", metric=f"PSNR gain over bicubic, {name}, x{scale}, stages 1 + 2",
               value=round(two - bicubic, 3), unit="dB",
               notes=f"PSNR {two:.2f} dB; stage 2 adds {two - one:+.3f} dB; {variant}",
               **ref)
        result("cascade", metric=f"magnification time, {name}, x{scale}, stages 1 + 2",
               value=round(t2, 3), unit="s", reference="stage 1 alone, same image",
               reference_value=round(t1, 3), ratio=round(t2 / t1, 2),
               notes=f"low-res {lr.shape[0]} x {lr.shape[1]}, best of 5; {variant}")
        result("cascade", metric=f"magnification time, {name}, x{scale}, stages 1 + 2 vs shipped model",
               value=round(t2, 3), unit="s", reference="shipped default model, same image",
               reference_value=round(t0, 3), ratio=round(t2 / t0, 2))
    return rows


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scales", type=int, nargs="+", default=[3])
    parser.add_argument("--cache", help="directory keeping the trained stages between runs")
    parser.add_argument("--spacing", type=int, help="derivative tap spacing of stage 2 (default: scale)")
    parser.add_argument("--energy", type=float, default=STAGE2["energy"],
                        help="PCA energy kept by stage 2's features")
    args = parser.parse_args()
    images = training_images()
    rows = []
    for scale in args.scales:
        spacing = args.spacing or scale
        stage1, t_fit1 = stage1_model(scale, images, args.cache)
        stage2, t_fit2 = stage2_model(stage1, images, scale, spacing, args.energy, args.cache)
        if t_fit2 is not None:
            result("cascade", metric=f"stage 2 training time, x{scale}", value=round(t_fit2, 1),
                   unit="s", reference="stage 1 training time",
                   reference_value=None if t_fit1 is None else round(t_fit1, 1),
                   notes=f"{int(stage2['n_samples'])} pairs, {stage2['basis'].shape[1]} features")
        rows += measure(scale, stage1, stage2, f"spacing {spacing}, {stage2['basis'].shape[1]} features")
    print()
    print("| photo | scale | bicubic PSNR (dB) | stage 1 gain | stages 1 + 2 gain | "
          "time shipped / stage 1 / stages 1 + 2 (s) |")
    print("|---|---|---|---|---|---|")
    for name, scale, bicubic, g1, g2, t0, t1, t2 in rows:
        print(f"| {name} | x{scale} | {bicubic:.2f} | {g1:+.3f} | {g2:+.3f} | "
              f"{t0:.3f} / {t1:.3f} / {t2:.3f} |")


if __name__ == "__main__":
    main()
