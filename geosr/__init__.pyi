# Static view of geosr's public API (geosr/__init__.py loads these on first use).
from . import errors as errors
from . import xarray as xarray
from ._version import __version__ as __version__
from .assess.protocol import assess_raster as assess_raster
from .core import metrics as metrics
from .core import sparse as sparse
from .core.guided import GuidedRegression as GuidedRegression
from .core.guided import sharpen_with_guide as sharpen_with_guide
from .core.model import CoupledDictionary as CoupledDictionary
from .core.resample import degrade as degrade
from .core.resample import upscale_bicubic as upscale_bicubic
from .errors import GeosrError as GeosrError
from .modelfile import default_model as default_model
from .modelfile import load_guided_model as load_guided_model
from .modelfile import load_models as load_models
from .modelfile import save_guided_model as save_guided_model
from .modelfile import save_models as save_models
from .pipeline.array import magnify_array as magnify_array
from .pipeline.batch import BatchItem as BatchItem
from .pipeline.batch import magnify_many as magnify_many
from .pipeline.guided import train_guided as train_guided
from .pipeline.magnify import magnify_raster as magnify_raster
from .pipeline.train import train_from_rasters as train_from_rasters

__all__ = [
    "__version__",
    "GeosrError",
    "CoupledDictionary",
    "GuidedRegression",
    "sharpen_with_guide",
    "degrade",
    "upscale_bicubic",
    "default_model",
    "load_models",
    "save_models",
    "load_guided_model",
    "save_guided_model",
    "magnify_raster",
    "magnify_array",
    "magnify_many",
    "BatchItem",
    "train_from_rasters",
    "train_guided",
    "assess_raster",
    "errors",
    "metrics",
    "sparse",
    "xarray",
]
