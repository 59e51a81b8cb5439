"""geosr: magnify georeferenced rasters with a learned sparse-representation prior.

The output's fine detail is synthesized by a statistical model, not measured.
"""

from . import errors, metrics, sparse
from ._version import __version__
from .errors import GeosrError
from .model import CoupledDictionary, default_model, load_models, save_models
from .resample import degrade, upscale_bicubic
from .workflow import magnify_raster, train_from_rasters

__all__ = [
    "__version__",
    "CoupledDictionary",
    "GeosrError",
    "default_model",
    "degrade",
    "errors",
    "load_models",
    "magnify_raster",
    "metrics",
    "save_models",
    "sparse",
    "train_from_rasters",
    "upscale_bicubic",
]
