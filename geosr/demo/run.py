"""``run_demo``: generate the valley, degrade it, magnify the coarse version x3, draw a quick look."""

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
    make_scene,
    read_scene,
    write_scene,
)

__all__ = ["run_demo"]

logger = logging.getLogger(__name__)


def _check_library(scale, model):
    """Fail early, in one line, when magnification is not available."""
    try:
        from ..pipeline.magnify import magnify_raster
    except ImportError as exc:
        raise RunError(
            f"The demo needs geosr.pipeline.magnify.magnify_raster, which this installation does not have ({exc})"
        ) from None
    if model is None:
        try:
            from ..modelfile import default_model_path
        except ImportError:
            raise RunError(
                "The demo needs geosr.modelfile.default_model_path, which this installation does not have"
            ) from None
        path = default_model_path(scale)
        if not path.is_file():
            raise ModelError(
                f"The demo needs the model shipped for x{scale} (geosr/models/{path.name}), "
                "which this installation does not have; pass a model file with --model"
            )
    return magnify_raster


def _demo_paths(outdir):
    """The four output paths by role, in ``outdir`` (created if needed)."""
    outdir = os.fspath(outdir)
    if os.path.exists(outdir) and not os.path.isdir(outdir):
        raise ParameterError(f"The 'outdir' parameter must be a folder, got the file {outdir!r}")
    os.makedirs(outdir, exist_ok=True)
    return {
        "truth": os.path.join(outdir, "valley-truth-3m.tif"),
        "input": os.path.join(outdir, "valley-input-9m.tif"),
        "output": os.path.join(outdir, f"valley-geosr-x{SCALE}.tif"),
        "quicklook": os.path.join(outdir, "valley-quicklook.png"),
    }


def _write_comparison(path, truth, coarse, output_path):
    """The quick look of the detail crop: nearest neighbour, bicubic, geosr, truth."""
    from ..core.resample import upscale_bicubic

    out, out_valid = read_scene(output_path)
    win = detail_window(truth.data.shape, truth.landmarks)
    lwin = tuple(slice(s.start // SCALE, s.stop // SCALE) for s in win)
    f = 1.0 / REFLECTANCE_SCALE
    low = coarse.data[(slice(None),) + lwin].astype(np.float64) * f
    nearest = np.repeat(np.repeat(low, SCALE, axis=1), SCALE, axis=2)
    # bicubic of the whole input, then cropped, so the crop has real context
    filled = fill_nodata(coarse.data.astype(np.float64), coarse.valid)
    bicubic = upscale_bicubic(filled, SCALE)[(slice(None),) + win] * f
    geosr = out[(slice(None),) + win].astype(np.float64) * f
    ref = truth.data[(slice(None),) + win].astype(np.float64) * f
    valid = truth.valid[win] & out_valid[win]
    write_quicklook(
        path,
        [
            (f"nearest neighbour ({PIXEL * SCALE:g} m input)", nearest),
            ("bicubic", bicubic),
            (f"geosr x{SCALE} (synthesized detail)", geosr),
            (f"truth ({PIXEL:g} m)", ref),
        ],
        reference=ref,
        valid=valid,
        title=f"geosr demo: the same {win[0].stop - win[0].start} x "
        f"{win[1].stop - win[1].start} pixel detail, magnified x{SCALE} from {PIXEL * SCALE:g} m",
    )


def run_demo(
    outdir: str | os.PathLike,
    *,
    seed: int = 0,
    size: int = SIZE,
    model: object = None,
    progress: Callable[[int, int], None] | None = None,
    echo: Callable[[str], object] | None = None,
) -> dict:
    """Generate the demo scene, magnify its coarse version x3, write a quick look.

    Writes into ``outdir`` (created if needed; earlier demo files there are
    replaced): ``valley-truth-3m.tif`` (the generated scene),
    ``valley-input-9m.tif`` (degraded x3: the demo input),
    ``valley-geosr-x3.tif`` (the input magnified by geosr) and
    ``valley-quicklook.png``.

    Parameters
    ----------
    outdir : str or os.PathLike
    seed : int
        Seed of the scene; the same seed gives the same files.
    size : int
        Truth grid side in pixels (multiple of 3).
    model : str, os.PathLike, CoupledDictionary or None
        The model to magnify with; None uses the model shipped for x3.
    progress : callable, optional
        Progress callback of the magnification (see ``magnify_raster``).
    echo : callable, optional
        Called with a progress line for each step; default: this module's
        logger at INFO level.

    Returns
    -------
    dict
        Paths by role: ``"truth"``, ``"input"``, ``"output"``, ``"quicklook"``,
        and ``"seconds"``, the time taken.
    """
    say = echo or logger.info
    start = time.perf_counter()
    magnify_raster = _check_library(SCALE, model)
    paths = _demo_paths(outdir)
    say(f"generating the invented valley ({size} x {size} at {PIXEL:g} m, seed {seed})")
    truth = make_scene(size, seed)
    coarse = degrade_scene(truth, SCALE)
    write_scene(paths["truth"], truth,
                "Demo truth: procedurally generated scene, no real place, no real data.")
    write_scene(paths["input"], coarse,
                f"Demo input: the demo truth degraded x{SCALE} (antialiased bicubic).")
    say(f"magnifying the {coarse.data.shape[2]} x {coarse.data.shape[1]} input x{SCALE}")
    magnify_raster(paths["input"], paths["output"], model, scale=SCALE, overwrite=True,
                   progress=progress)
    _write_comparison(paths["quicklook"], truth, coarse, paths["output"])
    paths["seconds"] = time.perf_counter() - start
    return paths
