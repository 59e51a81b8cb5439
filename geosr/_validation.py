"""Shared input checks, limits and small utilities of geosr.

One home for the parameter checks and helpers that used to be written out in
several modules. Every check raises :class:`geosr.errors.ParameterError` with
a message of the form ``"The 'x' parameter must be <what>, got <value>"``.

This module imports nothing heavy at import time: numpy is imported inside
the functions that need it (and never for the limits), so that the command
line can read :data:`SCALE_MIN`, :data:`SCALE_MAX` and :data:`MIN_CHUNK`
without slowing ``geosr --help`` down. Numbers are recognised through the
:mod:`numbers` ABCs, which numpy's scalar types are registered with
(``numpy.integer`` is :class:`numbers.Integral`, ``numpy.floating`` is
:class:`numbers.Real`; ``numpy.bool_`` is neither).
"""

from __future__ import annotations

import math
import os
import sys
from numbers import Integral, Real
from typing import TYPE_CHECKING, Any

from .errors import ParameterError

if TYPE_CHECKING:  # annotations only; numpy is imported lazily at run time
    import numpy as np

__all__ = [
    "SCALE_MIN",
    "SCALE_MAX",
    "MIN_CHUNK",
    "MAX_BAND",
    "check_int",
    "check_float",
    "check_bool",
    "check_scale",
    "check_random_state",
    "working_dtype",
    "crop_to_multiple",
    "cropped_shape",
    "cpu_count",
]

#: Smallest integer magnification factor the core accepts.
SCALE_MIN = 2
#: Largest integer magnification factor the core accepts.
SCALE_MAX = 8
#: Smallest block side in source pixels (common practice: below this the
#: halo read costs more than the block itself).
MIN_CHUNK = 16

#: Highest band number a band list may name: 65536, GDAL's default cap on the
#: band count of a dataset (its GDAL_MAX_BAND_COUNT setting; from memory).
#: A range is checked against it before it is expanded, so "1-1000000" is
#: refused at once instead of building a million-entry list.
MAX_BAND = 65536


def _is_bool(value: Any) -> bool:
    """True for ``bool`` and ``numpy.bool_`` (without importing numpy)."""
    if isinstance(value, bool):
        return True
    numpy = sys.modules.get("numpy")
    return numpy is not None and isinstance(value, numpy.bool_)


def _int_range(low: int | None, high: int | None) -> str:
    if low is not None and high is not None:
        return f" from {low} to {high}"
    if low is not None:
        return f" of at least {low}"
    if high is not None:
        return f" of at most {high}"
    return ""


def check_int(
    value: Any,
    name: str,
    low: int | None = None,
    high: int | None = None,
    *,
    integral_float: bool = False,
    what: str | None = None,
) -> int:
    """Validate an integer parameter and return it as a Python ``int``.

    Parameters
    ----------
    value : object
        The value to check. ``int`` and numpy integer scalars are accepted;
        ``bool`` and ``numpy.bool_`` are refused, as are strings.
    name : str
        The parameter name used in the error message.
    low, high : int, optional
        Inclusive bounds; ``None`` leaves that side open.
    integral_float : bool, default False
        Also accept floats (Python or numpy) with an integral value, such as
        ``3.0``; non-integral floats are refused either way.
    what : str, optional
        An explanation appended in parentheses to the range message, e.g.
        ``"at most n_features = 30"``.

    Returns
    -------
    int

    Raises
    ------
    ParameterError
        ``"The 'x' parameter must be an integer[ from L to H | of at least L |
        of at most H][ (what)], got <value>"``. For a value of the wrong type
        the message shows ``repr(value)``; for one out of range, the integer.
    """
    bound = _int_range(low, high)
    extra = f" ({what})" if what else ""
    if _is_bool(value) or not isinstance(value, Integral):
        if (
            integral_float
            and not _is_bool(value)
            and isinstance(value, Real)
            and math.isfinite(float(value))
            and float(value).is_integer()
        ):
            value = math.floor(value)  # integral already: floor is exact for any Real
        else:
            raise ParameterError(
                f"The {name!r} parameter must be an integer{bound}{extra}, got {value!r}"
            )
    number = int(value)
    if (low is not None and number < low) or (high is not None and number > high):
        raise ParameterError(
            f"The {name!r} parameter must be an integer{bound}{extra}, got {number!r}"
        )
    return number


def check_float(
    value: Any,
    name: str,
    low: float | None = None,
    high: float | None = None,
    *,
    low_open: bool = False,
    high_open: bool = False,
) -> float:
    """Validate a finite real parameter and return it as a Python ``float``.

    Parameters
    ----------
    value : object
        The value to check: ``int``, ``float`` or a numpy integer or
        floating scalar (any :class:`numbers.Real`). ``bool``,
        ``numpy.bool_``, strings, NaN and infinities are refused.
    name : str
        The parameter name used in the error message.
    low, high : float, optional
        Bounds; ``None`` leaves that side open.
    low_open, high_open : bool, default False
        Exclude the bound itself (``value > low``, ``value < high``).

    Returns
    -------
    float

    Raises
    ------
    ParameterError
        ``"The 'x' parameter must be a number greater than L and at most H,
        got <repr(value)>"`` (with ``at least``/``less than`` for closed and
        open bounds, and ``a finite number ...`` when a side is unbounded).
    """
    parts = []
    if low is not None:
        parts.append(f"{'greater than' if low_open else 'at least'} {low}")
    if high is not None:
        parts.append(f"{'less than' if high_open else 'at most'} {high}")
    # With both bounds finiteness goes without saying (the historic wording).
    noun = "a number" if low is not None and high is not None else "a finite number"
    what = " ".join([noun, " and ".join(parts)]) if parts else noun
    ok = not _is_bool(value) and isinstance(value, Real)
    number = float(value) if ok else math.nan
    ok = math.isfinite(number)
    if ok and low is not None:
        ok = number > low if low_open else number >= low
    if ok and high is not None:
        ok = number < high if high_open else number <= high
    if not ok:
        raise ParameterError(f"The {name!r} parameter must be {what}, got {value!r}")
    return number


def check_bool(value: Any, name: str) -> bool:
    """Validate a flag and return it as a Python ``bool``.

    Parameters
    ----------
    value : object
        ``True``, ``False`` or a ``numpy.bool_``. Integers such as ``0`` and
        ``1`` are refused.
    name : str
        The parameter name used in the error message.

    Returns
    -------
    bool

    Raises
    ------
    ParameterError
        ``"The 'x' parameter must be True or False, got <repr(value)>"``.
    """
    if not _is_bool(value):
        raise ParameterError(f"The {name!r} parameter must be True or False, got {value!r}")
    return bool(value)


def check_scale(scale: Any, name: str = "scale") -> int:
    """Validate an integer scale factor from :data:`SCALE_MIN` to :data:`SCALE_MAX`.

    Parameters
    ----------
    scale : object
        An ``int``, a numpy integer, or a float with an integral value
        (``3.0``). ``bool``, strings and non-integral floats are refused.
    name : str, default "scale"
        The parameter name used in the error message.

    Returns
    -------
    int

    Raises
    ------
    ParameterError
        ``"The 'scale' parameter must be an integer from 2 to 8, got <value>"``.
    """
    return check_int(scale, name, SCALE_MIN, SCALE_MAX, integral_float=True)


def check_random_state(random_state: Any, name: str = "random_state") -> np.random.Generator:
    """Turn a ``random_state`` parameter into a :class:`numpy.random.Generator`.

    Parameters
    ----------
    random_state : None, int, numpy.random.Generator, numpy.random.RandomState,
        numpy.random.SeedSequence or numpy.random.BitGenerator
        ``None`` gives fresh OS entropy; a non-negative integer (Python or
        numpy, not ``bool``) seeds ``numpy.random.default_rng``; a Generator
        is returned as is (its state is shared, not copied); a RandomState
        seeds a new Generator with four 31-bit integers drawn from it (so
        it advances the RandomState); a SeedSequence or BitGenerator is
        passed to ``default_rng``.
    name : str, default "random_state"
        The parameter name used in the error message.

    Returns
    -------
    numpy.random.Generator

    Raises
    ------
    ParameterError
        A negative integer, or a value of any other type.
    """
    import numpy as np

    if random_state is None:
        return np.random.default_rng()
    if isinstance(random_state, Integral) and not _is_bool(random_state):
        if int(random_state) < 0:
            raise ParameterError(
                f"The {name!r} parameter must be a non-negative integer, got {random_state!r}"
            )
        return np.random.default_rng(int(random_state))
    if isinstance(random_state, np.random.Generator):
        return random_state
    if isinstance(random_state, np.random.RandomState):
        return np.random.default_rng(random_state.randint(0, 2**31 - 1, size=4))
    if isinstance(random_state, (np.random.SeedSequence, np.random.BitGenerator)):
        return np.random.default_rng(random_state)
    raise ParameterError(
        f"The {name!r} parameter must be None, an integer, a numpy Generator or RandomState, "
        f"got {random_state!r}"
    )


def working_dtype(*arrays: Any) -> np.dtype:
    """The floating dtype to compute in: float32 if every input is float32.

    Parameters
    ----------
    *arrays : array_like or dtype
        At least one. Each is an array (its ``dtype`` is used), a dtype or
        something ``numpy.dtype`` understands as one (``"float32"``,
        ``numpy.float32``), or an array-like (converted with
        ``numpy.asarray``).

    Returns
    -------
    numpy.dtype
        ``float32`` when all inputs are float32, ``float64`` otherwise
        (integers, float16, float64, complex, ...).

    Raises
    ------
    TypeError
        No input.
    """
    import numpy as np

    if not arrays:
        raise TypeError("working_dtype() needs at least one array or dtype")
    f32 = np.dtype(np.float32)
    for a in arrays:
        if isinstance(a, (np.dtype, str, type)):
            dtype = np.dtype(a)
        elif hasattr(a, "dtype"):
            dtype = np.dtype(a.dtype)
        else:
            dtype = np.asarray(a).dtype
        if dtype != f32:
            return np.dtype(np.float64)
    return f32


def cropped_shape(height: int, width: int, scale: Any) -> tuple[int, int]:
    """A raster size cropped down to multiples of the scale.

    Parameters
    ----------
    height, width : int
        Size in pixels.
    scale : int
        Checked with :func:`check_scale`.

    Returns
    -------
    tuple of int
        ``(height - height % scale, width - width % scale)``.
    """
    s = check_scale(scale)
    return height - height % s, width - width % s


def crop_to_multiple(image: Any, scale: Any) -> np.ndarray:
    """Crop the last two axes to a multiple of ``scale`` (bottom and right).

    Parameters
    ----------
    image : array_like, shape (..., rows, cols)
        Leading axes (bands) are kept.
    scale : int
        Checked with :func:`check_scale`.

    Returns
    -------
    numpy.ndarray
        A view of ``numpy.asarray(image)`` of shape
        ``(..., rows - rows % scale, cols - cols % scale)``.
    """
    import numpy as np

    scale = check_scale(scale)
    image = np.asarray(image)
    rows, cols = cropped_shape(image.shape[-2], image.shape[-1], scale)
    return image[..., :rows, :cols]


def cpu_count() -> int:
    """The number of CPUs this process may use, at least 1.

    The CPU affinity set where the platform has one
    (``os.sched_getaffinity``), else ``os.cpu_count()``.

    Returns
    -------
    int
    """
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):
        return max(1, os.cpu_count() or 1)
