"""geosr: magnify georeferenced rasters with a learned sparse-representation prior.

The output's fine detail is synthesized by a statistical model, not measured.
Public names are loaded on first use, so that ``geosr --help`` stays fast.
"""

from importlib import import_module

from ._version import __version__
from .errors import GeosrError

#: Public name -> module that defines it.
_LAZY = {
    "CoupledDictionary": "geosr.model",
    "default_model": "geosr.model",
    "load_models": "geosr.model",
    "save_models": "geosr.model",
    "degrade": "geosr.resample",
    "upscale_bicubic": "geosr.resample",
    "magnify_raster": "geosr.workflow",
    "train_from_rasters": "geosr.workflow",
    "magnify_array": "geosr.workflow",
    "assess_raster": "geosr.assess",
}
_SUBMODULES = {"errors", "metrics", "sparse", "model", "resample", "patches", "workflow", "assess"}

__all__ = ["__version__", "GeosrError", *_LAZY, "errors", "metrics", "sparse"]


def __getattr__(name):
    if name in _LAZY:
        value = getattr(import_module(_LAZY[name]), name)
    elif name in _SUBMODULES:
        value = import_module(f"geosr.{name}")
    else:
        raise AttributeError(f"module 'geosr' has no attribute {name!r}")
    globals()[name] = value
    return value


def __dir__():
    return sorted(set(globals()) | set(__all__))
