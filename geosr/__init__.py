"""geosr: magnify georeferenced rasters with a learned sparse-representation prior.

The output's fine detail is synthesized by a statistical model, not measured.

Public names are imported on first use, so that ``geosr --help`` stays fast;
``geosr/__init__.pyi`` declares the same names for static tools, and a test
keeps the two in step.
"""

from importlib import import_module

from ._version import __version__
from .errors import GeosrError

#: Public name -> the module that defines it.
_ATTRIBUTES = {
    "CoupledDictionary": "geosr.core.model",
    "GuidedRegression": "geosr.core.guided",
    "sharpen_with_guide": "geosr.core.guided",
    "degrade": "geosr.core.resample",
    "upscale_bicubic": "geosr.core.resample",
    "default_model": "geosr.modelfile",
    "load_models": "geosr.modelfile",
    "save_models": "geosr.modelfile",
    "load_guided_model": "geosr.modelfile",
    "save_guided_model": "geosr.modelfile",
    "magnify_raster": "geosr.pipeline.magnify",
    "magnify_array": "geosr.pipeline.array",
    "magnify_many": "geosr.pipeline.batch",
    "BatchItem": "geosr.pipeline.batch",
    "train_from_rasters": "geosr.pipeline.train",
    "train_guided": "geosr.pipeline.guided",
    "assess_raster": "geosr.assess.protocol",
}
#: Public submodule name -> the module it is.
_SUBMODULES = {
    "errors": "geosr.errors",
    "metrics": "geosr.core.metrics",
    "sparse": "geosr.core.sparse",
    "xarray": "geosr.xarray",
}

__all__ = ["__version__", "GeosrError", *_ATTRIBUTES, *_SUBMODULES]


def __getattr__(name: str) -> object:
    if name in _ATTRIBUTES:
        value = getattr(import_module(_ATTRIBUTES[name]), name)
    elif name in _SUBMODULES:
        value = import_module(_SUBMODULES[name])
    else:
        raise AttributeError(f"module 'geosr' has no attribute {name!r}")
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
