"""Train a model on reference rasters, save it, then magnify another raster with it.

Scenario: a field office keeps an archive of single-band scenes of one
farming district. Its blue and green bands serve as references: geosr learns
from them what fine detail looks like in this landscape (each reference is
degraded by the scale and the model learns to undo that), and the model then
magnifies the red band x2. The model is kept small (few atoms, few training
pairs) so that the example runs in seconds; real models use the defaults.

The bundled crops store 0 where the scene has no data but declare no nodata
value, so the script first writes copies that declare it: geosr then neither
learns from the fill nor lets it bleed into valid pixels.

Run from the repository root:

    python examples/train_then_magnify.py
    python examples/train_then_magnify.py --references a.tif b.tif --target c.tif --out out
"""

from __future__ import annotations

import argparse
from pathlib import Path

import rasterio

import geosr

from _common import DATA, output_folder, run


def declare_fill_as_nodata(src, folder, fill=0):
    """Copy ``src`` into ``folder`` with ``fill`` declared as its nodata value."""
    dst = Path(folder) / Path(src).name
    if dst.exists():  # two inputs of one name: never write over the first copy
        raise SystemExit(f"error: two inputs are named {dst.name!r}; rename one")
    with rasterio.open(src) as ds:
        profile = ds.profile
        profile.update(nodata=fill)
        with rasterio.open(dst, "w", **profile) as out:
            out.write(ds.read())
    return dst


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--references", nargs="+", type=Path,
                        default=[DATA / "landsat8-b2-crop.tif", DATA / "landsat8-b3-crop.tif"],
                        help="high-res reference rasters to learn from")
    parser.add_argument("--target", type=Path, default=DATA / "landsat8-b4-crop.tif",
                        help="raster to magnify with the trained model")
    parser.add_argument("--out", type=Path, default=None,
                        help="output folder (default: a new temporary folder)")
    parser.add_argument("--scale", type=int, default=2)
    args = parser.parse_args(argv)
    out = output_folder(args.out, "geosr-train-")
    inputs = out / "inputs"
    inputs.mkdir(exist_ok=True)
    references = [declare_fill_as_nodata(p, inputs) for p in args.references]
    target = declare_fill_as_nodata(args.target, inputs)

    # Learn one model shared by every band of the references (shared=True),
    # with the fast anchored method, and save it as a model file.
    model_path = out / f"district-x{args.scale}.npz"
    models = geosr.train_from_rasters(
        references, args.scale, shared=True, method="anchored",
        n_atoms=64, n_iter=0, neighbours=256, max_samples=5_000,
        random_state=0, output=model_path,
    )
    model = models[0]
    print(f"trained {model.method} model x{model.scale} with {model.n_atoms} atoms "
          f"on {len(references)} reference(s); saved to {model_path}")

    # Magnify with the saved model: the file records its scale and method.
    dst = out / f"{args.target.stem}-x{args.scale}.tif"
    result = geosr.magnify_raster(target, dst, model=model_path)
    print(f"wrote {result.dst}: {result.width} x {result.height}, model {result.model_sha256[:12]}...")

    # The declared fill stays nodata: the output mask is the source mask
    # magnified by nearest neighbour, so the share of nodata pixels is kept.
    with rasterio.open(target) as src, rasterio.open(dst) as mag:
        fill_in = (src.dataset_mask() == 0).mean()
        fill_out = (mag.dataset_mask() == 0).mean()
        print(f"nodata share: {fill_in:.2%} of the source, {fill_out:.2%} of the output")
        print(f"GEOSR_SYNTHESIZED = {mag.tags()['GEOSR_SYNTHESIZED']}")
    return 0


if __name__ == "__main__":
    run(main)
