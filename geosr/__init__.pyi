# Static view of geosr's public API (geosr/__init__.py loads these on first use).
from . import errors as errors
from ._version import __version__ as __version__
from .assess.protocol import assess_raster as assess_raster
from .core import metrics as metrics
from .core import sparse as sparse
from .core.model import CoupledDictionary as CoupledDictionary
from .core.resample import degrade as degrade
from .core.resample import upscale_bicubic as upscale_bicubic
from .errors import GeosrError as GeosrError
from .modelfile import default_model as default_model
from .modelfile import load_models as load_models
from .modelfile import save_models as save_models
from .pipeline.array import magnify_array as magnify_array
from .pipeline.magnify import magnify_raster as magnify_raster
from .pipeline.train import train_from_rasters as train_from_rasters

__all__ = [
    "__version__",
    "GeosrError",
    "CoupledDictionary",
    "degrade",
    "upscale_bicubic",
    "default_model",
    "load_models",
    "save_models",
    "magnify_raster",
    "magnify_array",
    "train_from_rasters",
    "assess_raster",
    "errors",
    "metrics",
    "sparse",
]
