"""Model files: save and load coupled dictionaries, the models shipped in the package.

A model file is an ``.npz`` archive of the learned arrays plus a JSON header
(format version, geosr version, parameters, training provenance and a sha256
of each model). It is never unpickled.
"""

from __future__ import annotations

import contextlib
import copy
import json
import os
import stat
import tempfile
import warnings
import zipfile
from collections.abc import Sequence
from importlib import resources
from typing import TYPE_CHECKING, Any

import numpy as np

from . import _version
from ._validation import check_scale
from .cautions import CAUTION
from .core.features import FEATURE_RADIUS
from .core.guided import GuidedRegression
from .core.model import CoupledDictionary
from .core.params import check_params, header_params, model_sha256
from .enums import Method
from .errors import DestinationError, ModelError, ParameterError

if TYPE_CHECKING:
    from importlib.resources.abc import Traversable

__all__ = [
    "FORMAT_VERSION",
    "GUIDED_FORMAT",
    "SHIPPED_METHODS",
    "SHIPPED_SCALES",
    "guided_model_sha256",
    "half_precision",
    "load_guided_model",
    "save_guided_model",
    "default_model",
    "default_model_path",
    "load_models",
    "model_card",
    "read_header",
    "save_models",
]

#: Version of the model file layout; bumped when the layout changes.
FORMAT_VERSION = 1

#: The ``format`` of a guided model file (see :func:`save_guided_model`).
GUIDED_FORMAT = "geosr-guided-model"


_ARRAY_NAMES = {
    "sparse": ("feature_kernel", "pca_eigenvalues", "dictionary_low", "dictionary_high"),
    "anchored": ("feature_kernel", "pca_eigenvalues", "dictionary_low", "projections"),
}



def save_models(
    path: str | os.PathLike,
    models: Sequence[CoupledDictionary],
    band_names: Sequence[str] | None = None,
    *,
    overwrite: bool = True,
) -> None:
    """Write one shared model or one model per band to an ``.npz`` file.

    The file holds the learned arrays and a JSON header with the format
    version, the geosr version, every parameter, the training provenance and
    a sha256 of each model's arrays. It is written to a temporary file and
    renamed into place.

    Parameters
    ----------
    path : str or os.PathLike
    models : sequence of CoupledDictionary
        All fitted, all at one scale.
    band_names : sequence of str, optional
        One name per model, kept in the header.
    overwrite : bool
        Replace an existing file; without it an existing ``path`` is refused
        (DestinationError), atomically.
    """
    models = list(models)
    if not models:
        raise ParameterError("The 'models' parameter must hold at least one model, got none")
    scales = {check_scale(m.scale) for m in models}
    if len(scales) != 1:
        raise ParameterError(f"The models must share one scale, got scales {sorted(scales)}")
    if band_names is not None and len(band_names) != len(models):
        raise ParameterError(
            f"The 'band_names' parameter must name each of the {len(models)} models, "
            f"got {len(band_names)} names"
        )
    arrays: dict[str, Any] = {}
    entries = []
    for n, model in enumerate(models):
        for name, value in model._arrays().items():
            arrays[f"m{n}_{name}"] = _compact(value)
        entry = model._header()
        entry["band_name"] = None if band_names is None else str(band_names[n])
        entries.append(entry)
    header = {
        "format": "geosr-model",
        "format_version": FORMAT_VERSION,
        "geosr_version": _version.__version__,
        "scale": scales.pop(),
        "models": entries,
    }
    _write_npz(path, arrays, header, overwrite)


def _compact(values: np.ndarray) -> np.ndarray:
    """``values`` as float16 when that holds them exactly (the file is smaller), else unchanged.

    Loading converts every array back to float32, so the checksum, made
    over the float32 values, is the same either way.
    """
    if values.dtype != np.float32 or values.size == 0:
        return values
    with np.errstate(over="ignore"):
        half = values.astype(np.float16)
    return half if np.array_equal(half.astype(np.float32), values) else values


def half_precision(model: CoupledDictionary, names: Sequence[str] = ("projections", "dictionary_high")) -> CoupledDictionary:
    """A copy of a fitted model with some arrays rounded to float16 precision.

    Model files store such arrays as float16 (half the bytes); in memory
    they stay float32. The checksum is recomputed for the rounded values.

    Parameters
    ----------
    model : CoupledDictionary
        Fitted.
    names : sequence of str
        Model-file names of the arrays to round (absent ones are skipped):
        ``feature_kernel``, ``pca_eigenvalues``, ``dictionary_low``,
        ``dictionary_high``, ``projections``.

    Returns
    -------
    CoupledDictionary

    Raises
    ------
    ParameterError
        A name is not a model array, or a value is too large for float16.
    """
    arrays = model._arrays()
    unknown = set(names) - set(_ARRAY_NAMES["sparse"]) - set(_ARRAY_NAMES["anchored"])
    if unknown:
        raise ParameterError(f"The 'names' parameter must name model arrays, got {sorted(unknown)}")
    out = copy.deepcopy(model)
    for name in names:
        if name not in arrays:
            continue
        with np.errstate(over="ignore"):
            half = arrays[name].astype(np.float16)
        if not np.isfinite(half).all():
            raise ParameterError(f"The model array {name!r} must fit in float16, got values beyond 65504")
        setattr(out, name + "_", half.astype(np.float32))
    out.sha256_ = model_sha256(out._arrays(), header_params(out.get_params()))
    return out


def _write_npz(path, arrays, header, overwrite=True):
    """Write arrays and a JSON header to a temporary file, then move it into place.

    Without ``overwrite`` the move refuses an existing file atomically (a
    hard link of the temporary, which fails when the name exists), so two
    runs writing one model file never silently replace each other.
    """
    arrays = dict(arrays)
    arrays["header"] = np.array(json.dumps(header, sort_keys=True))
    path = os.fspath(path)
    folder = os.path.dirname(os.path.abspath(path))
    fd, tmp = tempfile.mkstemp(prefix=".geosr-model-", suffix=".npz", dir=folder)
    try:
        with os.fdopen(fd, "wb") as fh:
            np.savez_compressed(fh, **arrays)
        # mkstemp makes the file private; give it the permissions of a normal file.
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)
        if overwrite:
            os.replace(tmp, path)
        else:
            _publish_new(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def _publish_new(tmp, path):
    """Move ``tmp`` to ``path`` only if ``path`` does not exist (atomic where links work)."""
    try:
        os.link(tmp, path)
    except FileExistsError:
        raise DestinationError(
            f"The model file {path!r} must not exist already, got a file that appeared while this "
            "run was writing (another run writing the same file?); use --overwrite to replace it"
        ) from None
    except OSError:  # no hard links on this file system: reserve the name, then rename
        try:
            os.close(os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o666))
        except FileExistsError:
            raise DestinationError(
                f"The model file {path!r} must not exist already, got an existing file; "
                "use --overwrite to replace it"
            ) from None
        os.replace(tmp, path)
        return
    os.unlink(tmp)


def load_models(path: str | os.PathLike) -> list[CoupledDictionary]:
    """Read a model file written by :func:`save_models`.

    Never unpickles; checks the format version, the shapes, finiteness and
    the sha256 of every model, and warns when the file was written by
    another geosr version.

    Parameters
    ----------
    path : str or os.PathLike

    Returns
    -------
    list of CoupledDictionary
        One shared model, or one per band.

    Raises
    ------
    ModelError
        A missing, damaged, edited or newer file.
    """
    path = os.fspath(path)
    where = f"The model file {path!r}"
    header, arrays = _read_npz(path, where)
    if header.get("format") == GUIDED_FORMAT:
        raise ModelError(f"{where} holds a guided model; give it with a guide (--guide), got none")
    if header.get("format") != "geosr-model":
        raise ModelError(f"{where} must be a geosr model, got another kind of file")
    _check_version(header, where)
    entries = header.get("models")
    if not isinstance(entries, list) or not entries:
        raise ModelError(f"{where} must list at least one model, got none")
    models = []
    for n, entry in enumerate(entries):
        try:
            models.append(_model_from_entry(entry, n, arrays))
        except ModelError as exc:
            raise ModelError(f"{where}: {exc}") from None
        except (ParameterError, KeyError, TypeError, ValueError) as exc:
            raise ModelError(f"{where} must hold valid model parameters, got {exc}") from None
    return models


#: The first bytes of a zip archive (an ``.npz`` is one): a local file header,
#: or the end-of-central-directory record of an empty archive (PKWARE APPNOTE 4.3).
_ZIP_MAGIC = (b"PK\x03\x04", b"PK\x05\x06")


def _check_regular_file(path, where):
    """Refuse a missing path, a folder, a pipe or a device before opening it.

    Opening a named pipe for reading blocks until a writer comes, and a
    device may never end: only a regular file (after symlinks) is read.
    """
    try:
        mode = os.stat(path).st_mode
    except FileNotFoundError:
        raise ModelError(f"{where} must exist, got no such file") from None
    except OSError as exc:
        raise ModelError(f"{where} must be a readable file, got: {exc.strerror or exc}") from None
    if stat.S_ISDIR(mode):
        raise ModelError(f"{where} must be a file, got a directory")
    if not stat.S_ISREG(mode):
        kind = ("a named pipe" if stat.S_ISFIFO(mode) else "a socket" if stat.S_ISSOCK(mode)
                else "a device" if stat.S_ISCHR(mode) or stat.S_ISBLK(mode) else "not a regular file")
        raise ModelError(f"{where} must be a regular file, got {kind}")


def _unreadable(where, exc):
    """geosr's own words for a file numpy cannot read (numpy's may advise allow_pickle)."""
    text = str(exc)
    if "pickle" in text.lower() or "object arrays" in text.lower():
        reason = "it holds Python objects, which geosr never loads"
    elif isinstance(exc, (zipfile.BadZipFile, EOFError)) or "zip" in text.lower():
        reason = "a damaged or truncated .npz archive"
    else:
        reason = f"{type(exc).__name__}"
    return ModelError(f"{where} must be a geosr .npz model, got an unreadable file ({reason})")


def _read_npz(path, where):
    """The JSON header and the arrays of a model file; never unpickles."""
    _check_regular_file(path, where)
    try:
        with open(path, "rb") as fh:
            magic = fh.read(4)
    except OSError as exc:
        raise ModelError(f"{where} must be a readable file, got: {exc.strerror or exc}") from None
    if magic not in _ZIP_MAGIC:
        what = "an empty file" if not magic else "a file that is not an .npz (zip) archive"
        raise ModelError(f"{where} must be a geosr .npz model, got an unreadable file ({what})")
    try:
        with np.load(path, allow_pickle=False) as npz:
            arrays = {k: npz[k] for k in npz.files}
    except Exception as exc:  # zip, npy or object-array errors all mean an unusable file
        raise _unreadable(where, exc) from None
    try:
        header = json.loads(str(arrays.pop("header")))
    except Exception:
        raise ModelError(f"{where} must carry a geosr JSON header, got none or a damaged one") from None
    if not isinstance(header, dict):
        raise ModelError(f"{where} must be a geosr model, got another kind of file")
    return header, arrays


def _check_version(header, where):
    """Refuse a newer format; warn when another geosr version wrote the file."""
    version = header.get("format_version")
    if not isinstance(version, int) or version > FORMAT_VERSION or version < 1:
        raise ModelError(
            f"{where} must have format version 1 to {FORMAT_VERSION}, got {version!r}; "
            "it was written by a newer geosr"
        )
    if header.get("geosr_version") != _version.__version__:
        warnings.warn(
            f"{where} was written by geosr {header.get('geosr_version')}, "
            f"this is geosr {_version.__version__}",
            UserWarning,
            stacklevel=3,
        )


def _model_from_entry(entry, n, arrays):
    params = dict(entry["params"])
    known = set(CoupledDictionary().get_params())
    unknown = set(params) - known
    if unknown:
        raise ModelError(f"model {n} must have known parameters, got {sorted(unknown)}")
    model = CoupledDictionary(**params)
    p = check_params(model.get_params(deep=False))
    names = _ARRAY_NAMES[str(p.method)]
    got = {}
    for name in names:
        key = f"m{n}_{name}"
        if key not in arrays:
            raise ModelError(f"model {n} must have the array {name!r}, got none")
        a = arrays[key]
        if a.dtype.kind != "f" or not np.isfinite(a).all():
            raise ModelError(f"model {n} array {name!r} must hold finite floats, got {a.dtype} with non-finite values")
        got[name] = a.astype(np.float32, copy=False)
    if model_sha256(got, header_params(model.get_params())) != entry.get("sha256"):
        raise ModelError(f"model {n} arrays must match the checksum in the header, got different bytes")
    s = p.scale
    window = (2 * FEATURE_RADIUS + 1) ** 2
    d = got["feature_kernel"].shape[0] if got["feature_kernel"].ndim == 2 else -1
    k = got["dictionary_low"].shape[1] if got["dictionary_low"].ndim == 2 else -1
    expected = {
        "feature_kernel": (d, window),
        "pca_eigenvalues": (d,),
        "dictionary_low": (d, k),
        "dictionary_high": ((3 * s) ** 2, k),
        "projections": (k, (3 * s) ** 2, d),
    }
    for name in names:
        if got[name].shape != expected[name] or d < 1 or k < 1:
            raise ModelError(
                f"model {n} array {name!r} must have shape {expected[name]}, got {got[name].shape}"
            )
    model.feature_kernel_ = got["feature_kernel"]
    model.pca_eigenvalues_ = got["pca_eigenvalues"]
    model.dictionary_low_ = got["dictionary_low"]
    if "dictionary_high" in got:
        model.dictionary_high_ = got["dictionary_high"]
    else:
        model.projections_ = got["projections"]
    model.training_ = dict(entry.get("training") or {})
    model.sha256_ = entry["sha256"]
    model.band_name_ = entry.get("band_name")
    return model


#: The methods with models shipped in the package, the default first.
SHIPPED_METHODS = ("anchored", "sparse")

#: The scales with models shipped in the package.
SHIPPED_SCALES = (2, 3, 4)


def default_model_path(scale: int, method: str | Method = "anchored") -> Traversable:
    """Path of the model shipped in the package for a scale factor and a method.

    Parameters
    ----------
    scale : int
        From 2 to 8 (models are shipped for 2, 3 and 4).
    method : {"anchored", "sparse"} or Method
        The method of the model (both are shipped).

    Returns
    -------
    importlib.resources.abc.Traversable
        ``geosr/models/<method>-x<scale>.npz``; it may not exist (see
        :func:`default_model`).

    Raises
    ------
    ParameterError
        A bad scale or method.
    """
    scale = check_scale(scale)
    method = Method.parse(method, "method")
    return resources.files("geosr") / "models" / f"{method}-x{scale}.npz"


def default_model(scale: int, method: str | Method = "anchored") -> CoupledDictionary:
    """The model shipped in the package for ``scale`` (2, 3 or 4) and ``method``.

    Parameters
    ----------
    scale : int
    method : {"anchored", "sparse"} or Method
        The method of the model (both are shipped).

    Returns
    -------
    CoupledDictionary

    Raises
    ------
    ParameterError
        A bad scale or method.
    ModelError
        No model is shipped for that scale, its file is missing, or it holds
        a model of another method.
    """
    path = default_model_path(scale, method)
    scale, method = check_scale(scale), Method.parse(method, "method")
    if not path.is_file():
        if scale in SHIPPED_SCALES:
            raise ModelError(
                f"The shipped {method} model for x{scale} must be installed with geosr, got no file at "
                f"{path}; reinstall geosr or pass a model file"
            )
        raise ModelError(
            f"The 'scale' parameter must be one with a shipped model (2, 3 or 4), got {scale}; "
            "train a model with 'geosr train' for other scales"
        )
    model = CoupledDictionary.load(str(path))
    if str(model.method) != str(method):
        raise ModelError(
            f"The shipped model file {path} must hold a {method} model, got one of method "
            f"{str(model.method)!r}; reinstall geosr"
        )
    return model


def read_header(path: str | os.PathLike) -> dict[str, Any]:
    """The JSON header of a model file (format, versions, models), or {} if unreadable.

    Read with ``allow_pickle=False``; no check is made (:func:`load_models`
    makes them).
    """
    try:
        if not os.path.isfile(path):  # never open a pipe or a device
            return {}
        with np.load(path, allow_pickle=False) as npz:
            header = json.loads(str(npz["header"]))
    except Exception:  # noqa: BLE001 - any unreadable file has no header to show
        return {}
    return header if isinstance(header, dict) else {}


def model_card(
    path: str | os.PathLike, models: Sequence[CoupledDictionary] | None = None
) -> dict[str, Any]:
    """The model card of a model file as a JSON-ready dict.

    Parameters
    ----------
    path : str or os.PathLike
        The model file.
    models : list of CoupledDictionary, optional
        What :func:`load_models` returned for it (read from ``path`` when
        not given).

    Returns
    -------
    dict
        ``file``, ``size_bytes``, ``written_by`` and ``format_version``
        (from the file's header), ``read_by`` (this geosr), ``scale``,
        ``shared`` (one model for every band), ``models`` (per model: index,
        band name, scale, method, parameters, training provenance, sha256)
        and ``caution``.
    """
    header = read_header(path)
    if models is None and header.get("format") == GUIDED_FORMAT:
        return _guided_card(path, header, load_guided_model(path))
    if models is None:
        models = load_models(path)
    entries = []
    for n, m in enumerate(models):
        params = m.get_params()
        params = {k: (str(v) if hasattr(v, "value") else v) for k, v in params.items()}
        entries.append(
            {
                "index": n,
                "band_name": getattr(m, "band_name_", None),
                "scale": int(params["scale"]),
                "method": str(params.get("method")),
                "parameters": params,
                "training": dict(getattr(m, "training_", {}) or {}),
                "sha256": getattr(m, "sha256_", None),
            }
        )
    return {
        "file": os.fspath(path),
        "size_bytes": os.path.getsize(path) if os.path.exists(path) else None,
        "written_by": header.get("geosr_version"),
        "format_version": header.get("format_version"),
        "read_by": _version.__version__,
        "scale": entries[0]["scale"] if entries else None,
        "shared": len(entries) == 1,
        "models": entries,
        "caution": CAUTION,
    }


def guided_model_sha256(model: GuidedRegression) -> str:
    """Checksum of a fitted guided model's arrays and parameters."""
    return model_sha256(model.to_arrays(), _guided_params(model))


def _guided_params(model):
    return {k: (str(v) if hasattr(v, "value") else v) for k, v in model.get_params().items()}


def save_guided_model(
    path: str | os.PathLike,
    model: GuidedRegression,
    band_names: Sequence[str] | None = None,
    training: dict[str, Any] | None = None,
    *,
    overwrite: bool = True,
) -> None:
    """Write a fitted guided model to an ``.npz`` file (arrays and a JSON header).

    Parameters
    ----------
    path : str or os.PathLike
    model : GuidedRegression
        Fitted (by :func:`geosr.pipeline.train.train_guided` or ``fit``).
    band_names : sequence of str, optional
        One name per target band, kept in the header.
    training : dict, optional
        Provenance (source and guide files with their sha256 and bands).
    overwrite : bool
        Replace an existing file (see :func:`save_models`).
    """
    if not isinstance(model, GuidedRegression) or not hasattr(model, "coef_"):
        raise ParameterError("The 'model' parameter must be a fitted GuidedRegression")
    if band_names is not None and len(band_names) != model.n_targets_:
        raise ParameterError(
            f"The 'band_names' parameter must name each of the {model.n_targets_} bands, "
            f"got {len(band_names)} names"
        )
    header = {
        "format": GUIDED_FORMAT,
        "format_version": FORMAT_VERSION,
        "geosr_version": _version.__version__,
        "scale": int(model.scale),
        "params": _guided_params(model),
        "sha256": guided_model_sha256(model),
        "band_names": None if band_names is None else [str(n) for n in band_names],
        "training": dict(training or {}),
    }
    _write_npz(path, model.to_arrays(), header, overwrite)


def load_guided_model(path: str | os.PathLike) -> GuidedRegression:
    """Read a guided model file written by :func:`save_guided_model`.

    Never unpickles; checks the format, the version and the checksum.

    Raises
    ------
    ModelError
        A missing, damaged, edited or newer file, or a single-image model.
    """
    path = os.fspath(path)
    where = f"The guided model file {path!r}"
    header, arrays = _read_npz(path, where)
    if header.get("format") == "geosr-model":
        raise ModelError(f"{where} must be a guided model (from 'geosr train --guide'), got a single-image model")
    if header.get("format") != GUIDED_FORMAT:
        raise ModelError(f"{where} must be a geosr guided model, got another kind of file")
    _check_version(header, where)
    for name, a in arrays.items():
        if a.dtype.kind not in "fiu" or not np.isfinite(a).all():
            raise ModelError(f"{where} array {name!r} must hold finite numbers, got {a.dtype} or non-finite values")
    try:
        model = GuidedRegression.from_arrays(dict(header["params"]), arrays)
    except (ModelError, ParameterError, KeyError, TypeError, ValueError) as exc:
        raise ModelError(f"{where} must hold a valid guided model, got {exc}") from None
    if guided_model_sha256(model) != header.get("sha256"):
        raise ModelError(f"{where} arrays must match the checksum in the header, got different bytes")
    model.sha256_ = header["sha256"]
    model.band_names_ = header.get("band_names")
    model.training_ = dict(header.get("training") or {})
    return model


def _guided_card(path, header, model):
    """The model card of a guided model file: one entry per band it sharpens."""
    params = _guided_params(model)
    training = dict(getattr(model, "training_", {}) or {})
    names = getattr(model, "band_names_", None) or [None] * model.n_targets_
    entries = []
    for n in range(model.n_targets_):
        band = {"guide correlation": round(float(model.correlation_[n]), 4),
                "training samples": int(model.n_samples_[n])}
        if n == 0:
            band.update({k: v for k, v in training.items() if k != "correlation"})
        entries.append({
            "index": n, "band_name": names[n], "scale": int(model.scale), "method": "guided",
            "parameters": params, "training": band, "sha256": model.sha256_,
        })
    return {
        "file": os.fspath(path),
        "size_bytes": os.path.getsize(path),
        "written_by": header.get("geosr_version"),
        "format_version": header.get("format_version"),
        "read_by": _version.__version__,
        "scale": int(model.scale),
        "shared": False,
        "models": entries,
        "caution": CAUTION,
    }
