"""Reading one block with its halo and magnifying it: the unit of work.

Every task opens its own rasterio handle (GDAL handles are not thread-safe),
reads the block plus its halo, extends the halo symmetrically where it
leaves the raster, hands each band to its model's ``magnify_block`` and
converts the result to the output pixel type. Only the finished block goes
back to the writer, so memory is bounded by the block size.
"""

from __future__ import annotations

import dataclasses
import warnings

import numpy as np
import rasterio
from rasterio.errors import NotGeoreferencedWarning, RasterioError

from ..core.spectral import guard_spectra
from ..errors import InputError
from .masks import MaskMode, nearest_magnify, to_output_dtype
from .windows import Block, halo_read, pad_symmetric

try:  # GDAL errors surface as these when rasterio does not wrap them
    from rasterio._err import CPLE_BaseError
except ImportError:  # pragma: no cover - older rasterio
    CPLE_BaseError = RasterioError

__all__ = [
    "BlockPlan",
    "BlockResult",
    "ResidualStats",
    "read_block",
    "magnify_one_block",
    "magnify_block_values",
    "block_result",
    "block_values",
    "work_dtype",
    "spectral_guard_applies",
    "READ_ERRORS",
]

#: Exceptions that mean "GDAL could not read this window".
READ_ERRORS = (RasterioError, CPLE_BaseError, OSError)


@dataclasses.dataclass(frozen=True)
class BlockPlan:
    """Everything a block task needs except the block and the models.

    Attributes
    ----------
    path : str
        Source raster (absolute, or a GDAL path the workers can open).
    height, width : int
        Source size in pixels.
    bands : tuple of int
        Source bands to read, 1-based, in output order.
    roles : tuple of int
        For each band the index of its model in the model list, or -1 to
        magnify it by nearest neighbour (alpha and categorical bands).
    halo : int
        Context per side in source pixels (at least every model's radius).
    scale : int
    dtype : str
        Output pixel type.
    mode : MaskMode
    nodata : float or None
    masked : bool
        Whether the source has mask bands worth reading.
    consistency, ensemble : bool
    spectral_guard : bool
        Apply :func:`geosr.core.spectral.guard_spectra` across the magnified
        (not alpha) bands when there are at least two.
    read_retries : int
        Extra attempts (each with a fresh handle) when GDAL fails to read.
    """

    path: str
    height: int
    width: int
    bands: tuple
    roles: tuple
    halo: int
    scale: int
    dtype: str
    mode: MaskMode
    nodata: object
    masked: bool
    consistency: bool = False
    ensemble: bool = False
    spectral_guard: bool = False
    read_retries: int = 2


@dataclasses.dataclass
class BlockResult:
    """A finished block.

    Attributes
    ----------
    block : Block
    data : ndarray, shape (bands, scale*height, scale*width), output dtype
    mask : ndarray of uint8, shape (scale*height, scale*width), or None
        0 for invalid, 255 for valid; only for ``MaskMode.MASK``.
    n_valid : int
        Valid output pixels over the magnified (not alpha) bands.
    residual : ResidualStats or None
        With the consistency option: the block's share of the residual.
    n_fallback : int
        Output pixels magnified by a fallback method (guided runs: where the
        guide had no valid pixel).
    """

    block: Block
    data: np.ndarray
    mask: object
    n_valid: int
    residual: object = None
    n_fallback: int = 0


@dataclasses.dataclass
class ResidualStats:
    """Running sums of the consistency residual ``degrade(output) - input``.

    One entry per output band (zeros for alpha bands), over valid low-res
    pixels, measured on the magnified values before rounding to the output
    type. Blocks combine with ``+``.

    Attributes
    ----------
    sum_squares, max_abs, count : ndarray, shape (bands,)
    low, high : ndarray, shape (bands,)
        Smallest and largest valid input value (the band's range).
    """

    sum_squares: np.ndarray
    max_abs: np.ndarray
    count: np.ndarray
    low: np.ndarray
    high: np.ndarray

    @classmethod
    def empty(cls, bands):
        zeros = np.zeros(bands)
        return cls(zeros.copy(), zeros.copy(), zeros.copy(), np.full(bands, np.inf), np.full(bands, -np.inf))

    def add_band(self, i, residual, source, valid):
        """Account for band ``i`` of a block: residual and source on its cells."""
        r = np.asarray(residual, dtype=np.float64)[valid]
        if r.size == 0:
            return
        v = np.asarray(source, dtype=np.float64)[valid]
        self.sum_squares[i] += float(np.dot(r, r))
        self.max_abs[i] = max(self.max_abs[i], float(np.abs(r).max()))
        self.count[i] += r.size
        self.low[i] = min(self.low[i], float(v.min()))
        self.high[i] = max(self.high[i], float(v.max()))

    def __add__(self, other):
        return ResidualStats(
            self.sum_squares + other.sum_squares,
            np.maximum(self.max_abs, other.max_abs),
            self.count + other.count,
            np.minimum(self.low, other.low),
            np.maximum(self.high, other.high),
        )

    def rms(self):
        """RMS per band (NaN where a band has no valid pixel)."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.count > 0, np.sqrt(self.sum_squares / np.maximum(self.count, 1)), np.nan)

    def value_range(self):
        """``high - low`` per band (0 where a band has no valid pixel)."""
        return np.where(self.count > 0, self.high - self.low, 0.0)


def spectral_guard_applies(requested, models, n_magnified, consistency=False):
    """Whether a run applies the cross-band spectral guard.

    Only with two or more magnified (not alpha) bands, only with models
    that give the interpolation their detail is added to
    (``interpolate_block``), and never with the consistency option: the
    guard would move the output away from what back-projection made
    consistent with the measured pixels, and those take precedence.
    """
    return bool(requested) and not consistency and n_magnified >= 2 and all(
        hasattr(m, "interpolate_block") for m in models
    )


def read_block(path, bands, block, halo, height, width, *, masked=True, retries=2):
    """Read a block and its halo; extend the halo symmetrically outside the raster.

    Parameters
    ----------
    path : str
    bands : sequence of int
        1-based band indexes.
    block : Block
    halo : int
    height, width : int
        Size of the raster.
    masked : bool
        Read GDAL's mask bands (nodata, per-dataset mask, alpha).
    retries : int
        Extra attempts with a fresh handle after a read error.

    Returns
    -------
    data : ndarray, shape (len(bands), block.height + 2*halo, block.width + 2*halo)
        The source pixel type.
    valid : ndarray of bool, same shape
        Measured pixels: mask band non-zero and, for floats, finite.

    Raises
    ------
    InputError
        When GDAL cannot read the window after every attempt.
    """
    window, pads = halo_read(block, halo, height, width)
    last = None
    for _ in range(int(retries) + 1):
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", NotGeoreferencedWarning)
                with rasterio.open(path, "r") as ds:
                    data = ds.read(list(bands), window=window)
                    masks = ds.read_masks(list(bands), window=window) if masked else None
            break
        except READ_ERRORS as exc:
            last = exc
    else:
        r0, c0 = int(window.row_off), int(window.col_off)
        raise InputError(
            f"The source raster {path!r} must be readable, got a read error in rows "
            f"{r0}-{r0 + int(window.height) - 1}, columns {c0}-{c0 + int(window.width) - 1} "
            f"(damaged or truncated file?): {last}"
        ) from None
    valid = masks > 0 if masks is not None else np.ones(data.shape, dtype=bool)
    if data.dtype.kind == "f":
        valid &= np.isfinite(data)
    return pad_symmetric(data, pads), pad_symmetric(valid, pads)


def block_values(plan, block, models, dtype):
    """Magnified values of every band of a block and where they are valid.

    Returns ``values`` of ``dtype`` (alpha bands hold their source values
    replicated) and ``ok``, both of shape (bands, s*height, s*width), and
    the block's :class:`ResidualStats` with the consistency option (else
    None).
    """
    s, h = plan.scale, plan.halo
    data, valid = read_block(plan.path, plan.bands, block, h, plan.height, plan.width,
                             masked=plan.masked, retries=plan.read_retries)
    inner = (slice(h, h + block.height), slice(h, h + block.width))
    shape = (len(plan.bands), s * block.height, s * block.width)
    values = np.zeros(shape, dtype=dtype)
    ok = np.zeros(shape, dtype=bool)
    magnified = [i for i, role in enumerate(plan.roles) if role >= 0]
    guard = plan.spectral_guard and len(magnified) >= 2
    bases = np.zeros((len(magnified),) + shape[1:], dtype=dtype) if guard else None
    stats = ResidualStats.empty(len(plan.bands)) if plan.consistency else None
    for i, role in enumerate(plan.roles):
        v_in = valid[i][inner]
        if role < 0:
            values[i] = nearest_magnify(data[i][inner], s)
            ok[i] = nearest_magnify(v_in, s)
            continue
        if not v_in.any():
            continue
        v = None if valid[i].all() else valid[i]
        if plan.consistency:
            values[i], residual = models[role].magnify_block(
                data[i], h, v, consistency=True, ensemble=plan.ensemble, return_residual=True
            )
            stats.add_band(i, residual, data[i][inner], v_in)
        else:
            values[i] = models[role].magnify_block(data[i], h, v, ensemble=plan.ensemble)
        ok[i] = nearest_magnify(v_in, s) & np.isfinite(values[i])
        if guard:
            bases[magnified.index(i)] = models[role].interpolate_block(
                data[i], h, v, consistency=plan.consistency)
    if guard:
        # Pointwise across bands, so blocks and the whole image agree exactly.
        values[magnified] = guard_spectra(values[magnified], bases, ok[magnified].all(axis=0))
    return values, ok, stats


def magnify_one_block(plan, block, models):
    """Read, magnify and convert one block to the output pixel type.

    Parameters
    ----------
    plan : BlockPlan
    block : Block
    models : sequence of model objects
        Objects with ``magnify_block(block, halo, valid, *, consistency,
        ensemble)``, indexed by ``plan.roles``.

    Returns
    -------
    BlockResult
    """
    values, ok, stats = block_values(plan, block, models, work_dtype(plan))
    return block_result(plan, block, values, ok, stats)


def work_dtype(plan):
    """The float type blocks are computed in: float32 for float32 outputs, else float64."""
    return np.float32 if np.dtype(plan.dtype) == np.float32 else np.float64


def block_result(plan, block, values, ok, stats=None, n_fallback=0):
    """Convert magnified block values to the output pixel type, with its mask.

    Parameters
    ----------
    plan : BlockPlan
    block : Block
    values : ndarray, shape (bands, scale*height, scale*width)
        Float values of every output band (alpha bands hold their values).
    ok : ndarray of bool, same shape
        Where the values are valid.
    stats : ResidualStats, optional
    n_fallback : int
        Output pixels magnified by a fallback method (reported in the result).

    Returns
    -------
    BlockResult
    """
    out_dtype = np.dtype(plan.dtype)
    nodata = plan.nodata if plan.mode is MaskMode.NODATA else None
    out = np.empty(values.shape, dtype=out_dtype)
    all_ok = np.ones(values.shape[1:], dtype=bool)
    n_valid = 0
    for i, role in enumerate(plan.roles):
        if role < 0:
            # Copied values (alpha, categories) are never moved; their invalid pixels take nodata.
            out[i] = values[i].astype(out_dtype)
            if nodata is not None:
                out[i][~ok[i]] = out_dtype.type(nodata)
            all_ok &= ok[i]
            continue
        out[i], band_ok = to_output_dtype(values[i], ok[i], out_dtype, nodata)
        all_ok &= band_ok
        n_valid += int(band_ok.sum())
    mask = None
    if plan.mode is MaskMode.MASK:
        mask = np.where(all_ok, 255, 0).astype(np.uint8)
    return BlockResult(block, out, mask, n_valid, stats, n_fallback)


def magnify_block_values(plan, block, models):
    """Read and magnify one block; float values, NaN where invalid.

    Parameters
    ----------
    plan : BlockPlan
        ``plan.dtype`` is the float type of the result.
    block : Block
    models : sequence of model objects

    Returns
    -------
    ndarray, shape (bands, scale*height, scale*width)
    """
    values, ok, _ = block_values(plan, block, models, np.dtype(plan.dtype))
    values[~ok] = np.nan
    return values
