"""Train the default models shipped in geosr/models/ (x2, x3, x4).

Training data: photos bundled with scikit-image (see the README's credits for
each file's licence), as 8-bit luminance. ``astronaut`` and ``coins`` are
left out: the test suite uses them as held-out images. Run from the
repository root:

    .venv/bin/python scripts/train_default_models.py [--scales 2 3 4]
"""

import argparse
import time
from pathlib import Path

import numpy as np
from skimage import color, data

from geosr.core.model import CoupledDictionary

#: scikit-image bundled photos used for training (name -> loader).
TRAINING_PHOTOS = [
    "camera", "chelsea", "coffee", "rocket", "brick", "gravel", "grass",
    "hubble_deep_field", "immunohistochemistry", "clock", "cell", "retina",
]


def load_photo(name):
    img = getattr(data, name)()
    if img.ndim == 3:
        img = color.rgb2ycbcr(img[..., :3])[..., 0]
    return img.astype(np.float64)


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scales", type=int, nargs="+", default=[2, 3, 4])
    parser.add_argument("--out", default=str(Path(__file__).resolve().parents[1] / "geosr" / "models"))
    args = parser.parse_args()
    photos = [load_photo(n) for n in TRAINING_PHOTOS]
    for scale in args.scales:
        model = CoupledDictionary(
            scale=scale, method="anchored", n_atoms=512, sparsity=3, n_iter=20,
            max_samples=100_000, neighbours=2048, ridge=0.1, rescaled_copies=12, random_state=0,
        )
        t0 = time.perf_counter()
        model.fit(photos)
        model.training_["sources"] = "scikit-image bundled photos: " + ", ".join(TRAINING_PHOTOS)
        path = Path(args.out) / f"default-x{scale}.npz"
        model.save(path)
        print(f"x{scale}: {model.training_['n_samples']} pairs, {model.feature_kernel_.shape[0]} features, "
              f"fit {time.perf_counter() - t0:.1f} s, {path.stat().st_size / 1e6:.1f} MB -> {path}")


if __name__ == "__main__":
    main()
