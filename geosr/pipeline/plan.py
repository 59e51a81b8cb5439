"""The planning step shared by magnify, magnify_array, assess and training.

Before any pixel is computed a run settles four things, in this order:

1. which bands take part and in which role (:func:`split_bands`: magnified
   by a model, or alpha or categorical (palette, 1-bit) and magnified by
   nearest neighbour);
2. which models serve them (:func:`resolve_models`: one shared model or one
   per magnified band, from an object, a list of them, a model file, or the
   model shipped for the scale and the requested method, anchored when none
   is requested; checked against the requested scale and method);
3. the context every block needs (the largest ``context_radius`` of the
   models) and the block grid (:func:`plan_blocks`), frozen in a
   :class:`MagnifyPlan` that holds the :class:`~geosr.raster.blocks.BlockPlan`
   each task receives;
4. for self-training, the model parameters (:func:`self_training_params`).

Self-training defaults (:data:`SELF_TRAIN_DEFAULTS`) differ between the
commands on purpose, and the difference is kept so that default runs give the
same outputs as before: ``magnify --self-train`` (and ``train``) read the
scene window by window and learn the model's own defaults from up to 100 000
pairs, the model an analyst would train by hand; ``assess --self-train``
learns, in memory, from the degraded reference of every band, a small
anchored model (256 atoms, no K-SVD iteration, 30 000 pairs) so that an
assessment stays a quick check.
"""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Sequence
from typing import Any

from .._validation import check_scale
from ..enums import Method
from ..errors import ModelError, ParameterError
from ..raster.blocks import BlockPlan, spectral_guard_applies
from ..raster.io import SourceInfo, check_bands
from ..raster.masks import MaskMode, mask_mode
from ..raster.windows import Block, block_grid, check_chunk_size

__all__ = [
    "BandSplit",
    "MagnifyPlan",
    "ModelChoice",
    "SELF_TRAIN_DEFAULTS",
    "is_model",
    "model_method",
    "model_sha",
    "plan_blocks",
    "resolve_models",
    "self_training_params",
    "split_bands",
]

#: What a model object offers the pipeline (CoupledDictionary does, and so
#: may any object following its contract).
MODEL_ATTRIBUTES = ("scale", "magnify", "magnify_block", "context_radius")

#: Self-training parameters by command, over CoupledDictionary's defaults
#: (see the module docstring for why they differ).
SELF_TRAIN_DEFAULTS: dict[str, dict[str, Any]] = {
    "magnify": {"max_samples": 100_000, "random_state": 0},
    "assess": {
        "method": "anchored",
        "n_atoms": 256,
        "n_iter": 0,
        "neighbours": 1024,
        "max_samples": 30_000,
        "random_state": 0,
    },
}


@dataclasses.dataclass(frozen=True)
class BandSplit:
    """The bands of a run and their roles.

    Attributes
    ----------
    selected : tuple of int
        1-based source bands in output order.
    magnified : tuple of int
        The selected bands that are neither alpha nor categorical: each is
        magnified by a model.
    alpha : tuple of int
        The selected alpha bands: magnified by nearest neighbour.
    categorical : tuple of int
        The selected palette (colour-table) and 1-bit bands: magnified by
        nearest neighbour, which keeps every value one of the source's
        categories.
    """

    selected: tuple[int, ...]
    magnified: tuple[int, ...]
    alpha: tuple[int, ...]
    categorical: tuple[int, ...] = ()

    def roles(self, n_models: int) -> tuple[int, ...]:
        """For each selected band the index of its model, or -1 for nearest neighbour."""
        shared = n_models == 1
        return tuple(
            (0 if shared else self.magnified.index(b)) if b in self.magnified else -1
            for b in self.selected
        )


def split_bands(info: SourceInfo, bands: Any = None) -> BandSplit:
    """Check a band selection against a source and split it by role.

    Parameters
    ----------
    info : SourceInfo
    bands : sequence of int or str, optional
        1-based bands in output order (``"1,2,3"`` works too); default every
        band.

    Returns
    -------
    BandSplit

    Raises
    ------
    ParameterError
        A bad selection, or one with only alpha bands.
    """
    selected = check_bands(bands, info.count)
    alpha = tuple(b for b in selected if info.is_alpha(b))
    categorical = tuple(b for b in selected if not info.is_alpha(b) and info.is_categorical(b))
    magnified = tuple(b for b in selected if b not in alpha and b not in categorical)
    if not magnified and not categorical:
        raise ParameterError(
            f"The 'bands' parameter must select at least one band that is not alpha, got bands "
            f"{', '.join(map(str, selected))}"
        )
    return BandSplit(selected, magnified, alpha, categorical)


# ------------------------------------------------------------------- models
def is_model(obj: Any) -> bool:
    """Whether ``obj`` follows the model contract (:data:`MODEL_ATTRIBUTES`)."""
    return all(hasattr(obj, a) for a in MODEL_ATTRIBUTES)


def model_method(model: Any) -> str:
    """The method name a model reports (``"unknown"`` when it has none)."""
    return str(getattr(model, "method", "unknown"))


def model_sha(model: Any) -> str:
    """The sha256 of a model's parameters (``"unknown"`` when it has none)."""
    sha = getattr(model, "sha256_", None)
    return str(sha) if sha else "unknown"


@dataclasses.dataclass(frozen=True)
class ModelChoice:
    """The models of a run.

    Attributes
    ----------
    models : tuple
        One shared model, or one per magnified band in band order.
    scale : int
        Their common scale.
    source : str
        Where they came from, in words (for reports).
    """

    models: tuple[Any, ...]
    scale: int
    source: str


def _load(model: Any, scale: int | None, method: Any = None) -> tuple[list[Any], str]:
    """A model argument as a list of model objects and a description.

    Without a model, the model shipped for ``scale`` and ``method``
    (anchored when no method is requested).
    """
    if model is None:
        if scale is None:
            raise ParameterError("The 'scale' parameter must be given when no model is, got None")
        from ..modelfile import SHIPPED_METHODS, default_model

        shipped = SHIPPED_METHODS[0] if method is None else str(Method.parse(method, "method"))
        return [default_model(scale, shipped)], f"shipped {shipped} model for x{scale}"
    if isinstance(model, (str, os.PathLike)):
        from ..modelfile import load_models

        return list(load_models(model)), os.path.basename(os.fspath(model))
    if is_model(model):
        return [model], "model given in memory"
    if isinstance(model, (list, tuple)) and model and all(is_model(m) for m in model):
        return list(model), "per-band models given in memory"
    raise ParameterError(
        "The 'model' parameter must be a model, a list of per-band models or a model file "
        f"path, got {type(model).__name__}"
    )


def check_models(
    models: Sequence[Any],
    scale: int | None,
    method: Any,
    bands: Sequence[int],
    role: str = "magnified",
) -> int:
    """Check models against the requested scale and method and the band count.

    Returns the models' common scale; raises :class:`ModelError` otherwise.
    """
    scales = {int(m.scale) for m in models}
    if len(scales) != 1:
        raise ModelError(f"The models must share one scale, got scales {sorted(scales)}")
    model_scale = scales.pop()
    if scale is not None and model_scale != scale:
        raise ModelError(
            f"The model must be for the requested scale {scale}, got a model for scale {model_scale}"
        )
    if method is not None:
        methods = {model_method(m) for m in models}
        if methods != {str(method)}:
            raise ModelError(
                f"The model must use the requested method {str(method)!r}, got "
                f"{', '.join(sorted(map(repr, methods)))}"
            )
    if len(models) not in (1, len(bands)):
        raise ModelError(
            f"The model must be one shared model or one per {role} band ({len(bands)}: bands "
            f"{', '.join(map(str, bands))}), got {len(models)} per-band models"
        )
    return model_scale


def resolve_models(
    model: Any,
    *,
    scale: int | None = None,
    method: Any = None,
    bands: Sequence[int],
    role: str = "magnified",
) -> ModelChoice:
    """The models a run uses, checked.

    Parameters
    ----------
    model : CoupledDictionary, list of them, str, os.PathLike or None
        One shared model, one per band, a model file, or None for the model
        shipped for ``scale`` and ``method``.
    scale : int, optional
        Required scale (needed when ``model`` is None).
    method : str or Method, optional
        Required method; with no ``model`` it picks the shipped model
        (anchored when not given).
    bands : sequence of int
        The bands the models serve (one model each, or one shared).
    role : str
        What the bands are, in the error message ("magnified", "assessed").

    Returns
    -------
    ModelChoice

    Raises
    ------
    ParameterError
        ``model`` is not a model, a list of models or a path; or no scale.
    ModelError
        The models do not fit the scale, method or band count, or the file
        is damaged.
    """
    models, source = _load(model, scale, method)
    found = check_models(models, scale, method, bands, role)
    return ModelChoice(tuple(models), found, source)


def self_training_params(command: str, training: dict[str, Any] | None, method: Any) -> dict[str, Any]:
    """Model parameters for self-training: the command's defaults, then ``training``.

    Parameters
    ----------
    command : {"magnify", "assess"}
    training : dict, optional
        Parameters given by the caller; they win over the defaults.
    method : str or Method, optional
        The requested method; wins over both.
    """
    params = dict(SELF_TRAIN_DEFAULTS[command])
    params.update(training or {})
    if method is not None:
        params["method"] = str(Method.parse(method, "method"))
    return params


# ------------------------------------------------------------------- blocks
@dataclasses.dataclass(frozen=True)
class MagnifyPlan:
    """Everything settled before a magnification runs.

    Attributes
    ----------
    info : SourceInfo
    bands : BandSplit
    models : tuple
        Indexed by ``block_plan.roles``.
    scale, halo, chunk : int
        Magnification, context per side and block side, in source pixels.
    block_plan : BlockPlan
        What every block task receives.
    blocks : tuple of Block
        The block grid, row-major.
    """

    info: SourceInfo
    bands: BandSplit
    models: tuple[Any, ...]
    scale: int
    halo: int
    chunk: int
    block_plan: BlockPlan
    blocks: tuple[Block, ...]

    @property
    def roles(self) -> tuple[int, ...]:
        return self.block_plan.roles

    @property
    def spectral_guard(self) -> bool:
        return self.block_plan.spectral_guard


def plan_blocks(
    info: SourceInfo,
    bands: BandSplit,
    models: Sequence[Any],
    scale: int,
    *,
    dtype: str,
    chunk_size: Any,
    consistency: bool = False,
    ensemble: bool = False,
    spectral_guard: bool = True,
    retries: int = 2,
) -> MagnifyPlan:
    """The block plan of a magnification.

    Parameters
    ----------
    info : SourceInfo
    bands : BandSplit
    models : sequence of model objects
        One shared, or one per magnified band.
    scale : int
    dtype : str
        Pixel type of the block results.
    chunk_size : int
        Block side in source pixels; must be at least the halo.
    consistency, ensemble, spectral_guard : bool
    retries : int
        Extra read attempts per block.

    Returns
    -------
    MagnifyPlan
    """
    masked = any(info.may_be_masked(b) for b in bands.magnified)
    halo = max(int(m.context_radius(consistency=consistency, masked=masked)) for m in models)
    chunk = check_chunk_size(chunk_size, halo)
    mode, nodata = mask_mode(info, bands.selected, bands.alpha)
    block_plan = BlockPlan(
        path=info.path,
        height=info.height,
        width=info.width,
        bands=bands.selected,
        roles=bands.roles(len(models)),
        halo=halo,
        scale=check_scale(scale),
        dtype=dtype,
        mode=mode,
        nodata=nodata,
        masked=masked or mode is not MaskMode.NONE,
        consistency=consistency,
        ensemble=ensemble,
        spectral_guard=spectral_guard_applies(spectral_guard, models, len(bands.magnified), consistency),
        read_retries=retries,
    )
    blocks = tuple(block_grid(info.height, info.width, chunk))
    return MagnifyPlan(info, bands, tuple(models), scale, halo, chunk, block_plan, blocks)
