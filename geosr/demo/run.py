"""``run_demo``: generate the valley, degrade it, magnify the coarse version x3 (alone and guided), draw a quick look."""

from __future__ import annotations

import logging
import os
import time
from collections.abc import Callable

import numpy as np

from ..errors import ModelError, ParameterError, RunError
from .landcover import REFLECTANCE_SCALE
from .quicklook import detail_window, write_quicklook
from .scene import (
    PIXEL,
    SCALE,
    SIZE,
    degrade_scene,
    fill_nodata,
    guide_scene,
    make_scene,
    read_scene,
    write_scene,
)

__all__ = ["METHODS", "run_demo"]

logger = logging.getLogger(__name__)

#: The estimates of the truth the demo compares, in the quick look's order.
METHODS = ("nearest", "bicubic", "single-image", "guided")


def _check_library(scale, model):
    """Fail early, in one line, when magnification is not available."""
    try:
        from ..pipeline.magnify import magnify_raster
    except ImportError as exc:
        raise RunError(
            f"The demo needs geosr.pipeline.magnify.magnify_raster, which this installation does not have ({exc})"
        ) from None
    try:
        from ..modelfile import default_model_path
    except ImportError:
        raise RunError(
            "The demo needs geosr.modelfile.default_model_path, which this installation does not have"
        ) from None
    path = default_model_path(scale)
    if not path.is_file():
        # the guided run keeps the shipped model for pixels without a valid guide
        why = "pass a model file with --model" if model is None else "its guided run needs it"
        raise ModelError(
            f"The demo needs the model shipped for x{scale} (geosr/models/{path.name}), "
            f"which this installation does not have; {why}"
        )
    return magnify_raster


def _demo_paths(outdir):
    """The output paths by role, in ``outdir`` (created if needed)."""
    outdir = os.fspath(outdir)
    if os.path.exists(outdir) and not os.path.isdir(outdir):
        raise ParameterError(f"The 'outdir' parameter must be a folder, got the file {outdir!r}")
    os.makedirs(outdir, exist_ok=True)
    return {
        "truth": os.path.join(outdir, "valley-truth-3m.tif"),
        "input": os.path.join(outdir, "valley-input-9m.tif"),
        "guide": os.path.join(outdir, f"valley-guide-{PIXEL:g}m.tif"),
        "output": os.path.join(outdir, f"valley-geosr-x{SCALE}.tif"),
        "guided": os.path.join(outdir, f"valley-geosr-guided-x{SCALE}.tif"),
        "quicklook": os.path.join(outdir, "valley-quicklook.png"),
    }


def _estimates(truth, coarse, paths):
    """Each method's estimate of the truth, float reflectance, and the pixels valid in all."""
    from ..core.resample import upscale_bicubic

    f = 1.0 / REFLECTANCE_SCALE
    single, single_valid = read_scene(paths["output"])
    guided, guided_valid = read_scene(paths["guided"])
    low = coarse.data.astype(np.float64)
    images = {
        "nearest": np.repeat(np.repeat(low, SCALE, axis=1), SCALE, axis=2) * f,
        # bicubic of the whole input, nodata filled first, so no zeros smear in
        "bicubic": upscale_bicubic(fill_nodata(low, coarse.valid), SCALE) * f,
        "single-image": single.astype(np.float64) * f,
        "guided": guided.astype(np.float64) * f,
    }
    return images, truth.valid & single_valid & guided_valid


def _psnr_table(truth, images, valid):
    """PSNR in dB of each estimate against the truth over ``valid`` (geosr.core.metrics.psnr)."""
    from ..core.metrics import psnr

    ref = truth.data.astype(np.float64) / REFLECTANCE_SCALE
    return {name: float(psnr(ref, image, valid=valid)) for name, image in images.items()}


def _write_comparison(path, truth, images, valid):
    """The quick look of the detail crop: nearest, bicubic, single-image, guided, truth."""
    win = detail_window(truth.data.shape, truth.landmarks)
    crop = (slice(None),) + win
    labels = {
        "nearest": f"nearest neighbour ({PIXEL * SCALE:g} m input)",
        "bicubic": "bicubic",
        "single-image": f"geosr x{SCALE} single-image (synthesized)",
        "guided": f"geosr x{SCALE} guided by {PIXEL:g} m pan",
    }
    ref = truth.data[crop].astype(np.float64) / REFLECTANCE_SCALE
    panels = [(labels[name], images[name][crop]) for name in METHODS]
    write_quicklook(
        path,
        [*panels, (f"truth ({PIXEL:g} m)", ref)],
        reference=ref,
        valid=valid[win],
        title=f"geosr demo: the same {win[0].stop - win[0].start} x "
        f"{win[1].stop - win[1].start} pixel detail, magnified x{SCALE} from {PIXEL * SCALE:g} m",
    )


def _write_inputs(paths, truth, coarse):
    """Write the truth, the demo input and the guide."""
    write_scene(paths["truth"], truth,
                "Demo truth: procedurally generated scene, no real place, no real data.")
    write_scene(paths["input"], coarse,
                f"Demo input: the demo truth degraded x{SCALE} (antialiased bicubic).")
    write_scene(paths["guide"], guide_scene(truth),
                f"Demo guide: a panchromatic-like band of the demo truth, measured at {PIXEL:g} m.")


def run_demo(
    outdir: str | os.PathLike,
    *,
    seed: int = 0,
    size: int = SIZE,
    model: object = None,
    progress: Callable[[int, int], None] | None = None,
    echo: Callable[[str], object] | None = None,
) -> dict:
    """Generate the demo scene, magnify its coarse version x3 alone and guided, write a quick look.

    Writes into ``outdir`` (created if needed; earlier demo files there are
    replaced): ``valley-truth-3m.tif`` (the generated scene),
    ``valley-input-9m.tif`` (degraded x3: the demo input),
    ``valley-guide-3m.tif`` (a panchromatic-like band measured on the truth's
    3 m grid), ``valley-geosr-x3.tif`` (the input magnified by geosr from
    itself alone), ``valley-geosr-guided-x3.tif`` (the input magnified with
    the guide, by a model learned on the scene) and ``valley-quicklook.png``.

    Parameters
    ----------
    outdir : str or os.PathLike
    seed : int
        Seed of the scene; the same seed gives the same files.
    size : int
        Truth grid side in pixels (multiple of 3).
    model : str, os.PathLike, CoupledDictionary or None
        The model of the single-image run; None uses the model shipped for
        x3. The guided run learns its own on the scene.
    progress : callable, optional
        Progress callback of the magnifications (see ``magnify_raster``).
    echo : callable, optional
        Called with a progress line for each step; default: this module's
        logger at INFO level.

    Returns
    -------
    dict
        Paths by role: ``"truth"``, ``"input"``, ``"guide"``, ``"output"``,
        ``"guided"``, ``"quicklook"``; ``"psnr"``, the PSNR in dB against
        the truth of each of :data:`METHODS` (pooled over the bands and the
        pixels valid in every file, peak the truth's range:
        :func:`geosr.core.metrics.psnr`); and ``"seconds"``, the time taken.
    """
    say = echo or logger.info
    start = time.perf_counter()
    magnify_raster = _check_library(SCALE, model)
    paths = _demo_paths(outdir)
    say(f"generating the invented valley ({size} x {size} at {PIXEL:g} m, seed {seed})")
    truth = make_scene(size, seed)
    coarse = degrade_scene(truth, SCALE)
    _write_inputs(paths, truth, coarse)
    rows, cols = coarse.data.shape[1:]
    say(f"magnifying the {cols} x {rows} input x{SCALE}")
    magnify_raster(paths["input"], paths["output"], model, scale=SCALE, overwrite=True,
                   progress=progress)
    say(f"magnifying the {cols} x {rows} input x{SCALE} guided by the {PIXEL:g} m band "
        "(learning on the scene)")
    magnify_raster(paths["input"], paths["guided"], scale=SCALE, guide=paths["guide"], overwrite=True,
                   progress=progress)
    images, valid = _estimates(truth, coarse, paths)
    result: dict = dict(paths)
    result["psnr"] = _psnr_table(truth, images, valid)
    _write_comparison(paths["quicklook"], truth, images, valid)
    result["seconds"] = time.perf_counter() - start
    return result
