"""The parameters of a coupled-dictionary model: checked once, then passed around.

:func:`check_params` turns the raw constructor parameters of
:class:`geosr.core.model.CoupledDictionary` into a frozen :class:`ModelParams`
(or raises :class:`geosr.errors.ParameterError` with a message of the form
``"The 'x' parameter must be ..., got ..."``). The estimator calls it once at
each public entry point and hands the result to the module-level functions
that do the work, so no hot loop parses a parameter again.

:func:`header_params` and :func:`model_sha256` give the parameters as a model
file records them and the checksum of a model (arrays plus parameters).
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
from collections.abc import Mapping
from typing import Any

import numpy as np

from .._validation import check_float, check_int, check_scale
from ..enums import Degradation, Method
from ..errors import ParameterError
from .resample import _check_sigma

__all__ = ["ModelParams", "check_params", "header_params", "model_sha256", "PARAMETER_NAMES"]

#: The constructor parameters, in the constructor's order.
PARAMETER_NAMES = (
    "scale", "method", "n_atoms", "sparsity", "n_iter", "degradation", "sigma", "max_samples",
    "energy", "neighbours", "ridge", "rescaled_copies", "high_fit", "random_state",
)

#: Inclusive bounds of the integer parameters (None: unbounded above).
_INT_BOUNDS = {
    "n_atoms": (2, 100_000),
    "sparsity": (1, 64),
    "n_iter": (0, 1000),
    "max_samples": (10, None),
    "neighbours": (1, None),
    "rescaled_copies": (1, 64),
}

#: Bounds of the real parameters, open below and closed above.
_FLOAT_BOUNDS = {"energy": (0.0, 1.0), "ridge": (0.0, 1e6)}

#: Parameters added after format version 1, written to model files only when
#: they differ from these defaults (older files and checksums stay valid).
_LATER_PARAMS = {"high_fit": "patch"}


@dataclasses.dataclass(frozen=True)
class ModelParams:
    """Checked and normalised model parameters (see ``CoupledDictionary``).

    ``sigma`` is the Gaussian width in use: the given one, the default for
    the scale, or None for the other degradations. ``random_state`` is kept
    as given (it is turned into a generator where randomness is drawn).
    """

    scale: int
    method: Method
    n_atoms: int
    sparsity: int
    n_iter: int
    degradation: Degradation
    sigma: float | None
    max_samples: int
    energy: float
    neighbours: int
    ridge: float
    rescaled_copies: int
    high_fit: str
    random_state: Any


def check_params(params: Mapping[str, Any]) -> ModelParams:
    """Check every model parameter and return them normalised.

    Parameters
    ----------
    params : mapping
        The constructor parameters by name (``get_params(deep=False)``).

    Returns
    -------
    ModelParams

    Raises
    ------
    ParameterError
        The first parameter out of its range or of the wrong type.
    """
    checked: dict[str, Any] = {}
    for name in PARAMETER_NAMES:  # in the constructor's order: the first bad one is reported
        value = params[name]
        if name == "scale":
            value = check_scale(value)
        elif name in ("method", "degradation"):
            value = (Method if name == "method" else Degradation).parse(value, name)
        elif name == "sigma":
            value = _check_sigma(checked["scale"], checked["degradation"], value)
        elif name in _INT_BOUNDS:
            value = check_int(value, name, *_INT_BOUNDS[name])
        elif name in _FLOAT_BOUNDS:
            value = check_float(value, name, *_FLOAT_BOUNDS[name], low_open=True)
        elif name == "high_fit":
            value = _check_high_fit(value, checked["method"])
        checked[name] = value
    return ModelParams(**checked)


def _check_high_fit(high_fit: Any, method: Method) -> str:
    if high_fit not in ("patch", "image"):
        raise ParameterError(f"The 'high_fit' parameter must be 'patch' or 'image', got {high_fit!r}")
    if high_fit == "image" and method is not Method.SPARSE:
        raise ParameterError(
            "The 'high_fit' parameter 'image' applies to the sparse method only, got "
            f"method={str(method)!r}"
        )
    return str(high_fit)


def header_params(params: Mapping[str, Any]) -> dict[str, Any]:
    """The parameters as a model file's JSON header records them.

    Enums become their names; a ``random_state`` that is not an integer is
    recorded as None; parameters added after format version 1 are left out
    while they hold their default (so older files keep their checksums).
    """
    out = dict(params)
    for name, default in _LATER_PARAMS.items():
        if out.get(name) == default:
            del out[name]
    out = {k: (str(v) if isinstance(v, (Method, Degradation)) else v) for k, v in out.items()}
    if not isinstance(out.get("random_state"), (int, np.integer, type(None))):
        out["random_state"] = None
    elif out.get("random_state") is not None:
        out["random_state"] = int(out["random_state"])
    return out


def model_sha256(arrays: Mapping[str, np.ndarray], params: Mapping[str, Any]) -> str:
    """Checksum of a model's arrays and parameters (hand edits are detected)."""
    digest = hashlib.sha256()
    digest.update(json.dumps(params, sort_keys=True).encode())
    for name in sorted(arrays):
        a = np.ascontiguousarray(arrays[name])
        digest.update(name.encode())
        digest.update(str(a.dtype).encode())
        digest.update(str(a.shape).encode())
        digest.update(a.tobytes())
    return digest.hexdigest()
