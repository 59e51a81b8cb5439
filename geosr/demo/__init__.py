"""The demo scenario: an invented river valley, degraded, magnified and shown side by side.

:func:`run_demo` writes the 3 m "truth" (:func:`make_scene`), the 9 m input
made from it with :func:`geosr.core.resample.degrade` (:func:`degrade_scene`),
a panchromatic-like band measured on the truth's 3 m grid (the guide,
:func:`guide_scene`), the input magnified x3 by the shipped model and x3
guided by that band, and a PNG that shows the same detail crop by nearest
neighbour, bicubic, single-image geosr, guided geosr and the truth side by
side (:mod:`geosr.demo.quicklook`), with the PSNR of each against the truth.
"""

from .landcover import (
    BANDS,
    GUIDE_BAND,
    LANDCOVER,
    NODATA,
    PAN_WEIGHTS,
    REFLECTANCE_SCALE,
    SPECTRA,
    VEGETATION,
    WATER,
)
from .quicklook import CAPTION, detail_window, quicklook_figure, rmse, write_quicklook
from .run import METHODS, run_demo
from .scene import (
    CRS,
    PIXEL,
    SCALE,
    SIZE,
    DemoScene,
    degrade_scene,
    guide_scene,
    make_scene,
    read_scene,
    write_scene,
)

__all__ = [
    "BANDS",
    "CAPTION",
    "CRS",
    "GUIDE_BAND",
    "LANDCOVER",
    "METHODS",
    "NODATA",
    "PAN_WEIGHTS",
    "PIXEL",
    "REFLECTANCE_SCALE",
    "SCALE",
    "SIZE",
    "SPECTRA",
    "VEGETATION",
    "WATER",
    "DemoScene",
    "degrade_scene",
    "detail_window",
    "guide_scene",
    "make_scene",
    "quicklook_figure",
    "read_scene",
    "rmse",
    "run_demo",
    "write_quicklook",
    "write_scene",
]
