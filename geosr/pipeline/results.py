"""What a magnification reports: its result and the consistency residuals."""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from pathlib import Path

from ..raster.blocks import ResidualStats

__all__ = [
    "CONSISTENCY_TOLERANCE",
    "ConsistencyResidual",
    "MagnifyResult",
    "consistency_residuals",
    "consistency_tags",
]


@dataclasses.dataclass(frozen=True)
class MagnifyResult:
    """What :func:`magnify_raster` wrote.

    Attributes
    ----------
    dst : pathlib.Path
    stac : pathlib.Path or None
    width, height, count : int
        Output size and band count.
    scale : int
    method : str
    model_sha256 : str
        One checksum, or a comma-separated list for per-band models.
    blocks : int
        Blocks computed.
    halo : int
        Source pixels of context per side each block carried.
    chunk_size : int
    seconds : float
    scheduler : str
    consistency : tuple of ConsistencyResidual or None
        With the consistency option: the residual of each output band.
    guide : tuple of str
        Guided runs: the guide files (empty otherwise).
    guide_correlation : tuple of float
        Guided runs: per magnified band, the correlation the model found
        between the band and its guide.
    fallback_fraction : float or None
        Guided runs: the share of output pixels magnified without the guide
        (where it had no valid pixel).
    """

    dst: Path
    stac: Path | None
    width: int
    height: int
    count: int
    scale: int
    method: str
    model_sha256: str
    blocks: int
    halo: int
    chunk_size: int
    seconds: float
    scheduler: str
    consistency: tuple[ConsistencyResidual, ...] | None = None
    guide: tuple[str, ...] = ()
    guide_correlation: tuple[float, ...] = ()
    fallback_fraction: float | None = None


#: The stated tolerance of the consistency option: RMS of degrade(output) -
#: input as a fraction of the band's valid range.
CONSISTENCY_TOLERANCE = 0.005


@dataclasses.dataclass(frozen=True)
class ConsistencyResidual:
    """How far degrading one magnified band is from its source.

    Attributes
    ----------
    band : int
        1-based output band.
    rms, max : float
        RMS and largest absolute value of ``degrade(output) - input`` over
        the valid source pixels, in the band's units, before rounding to
        the output type (None for alpha bands and empty bands).
    percent : float
        ``rms`` as a percentage of the band's valid range (0 for a constant
        band with zero residual).
    within_tolerance : bool
        ``percent <= 100 * CONSISTENCY_TOLERANCE``.
    """

    band: int
    rms: float | None
    max: float | None
    percent: float | None
    within_tolerance: bool


def consistency_residuals(stats: ResidualStats, roles: Sequence[int]) -> tuple[ConsistencyResidual, ...]:
    """Per-band :class:`ConsistencyResidual` from the summed block statistics."""
    rms, span = stats.rms(), stats.value_range()
    found = []
    for i, role in enumerate(roles):
        if role < 0 or stats.count[i] == 0:
            found.append(ConsistencyResidual(i + 1, None, None, None, True))
            continue
        percent = 100.0 * rms[i] / span[i] if span[i] > 0 else (0.0 if rms[i] == 0 else float("inf"))
        found.append(ConsistencyResidual(
            i + 1, float(rms[i]), float(stats.max_abs[i]), float(percent),
            bool(percent <= 100 * CONSISTENCY_TOLERANCE),
        ))
    return tuple(found)


def consistency_tags(
    residuals: Sequence[ConsistencyResidual],
) -> tuple[dict[str, str], list[dict[str, str]]]:
    """Dataset tags and per-band tags that state the residual and the tolerance."""
    measured = [r for r in residuals if r.rms is not None]
    tags = {
        "GEOSR_CONSISTENCY_TOLERANCE": f"RMS of degrade(output) - input at most "
                                       f"{100 * CONSISTENCY_TOLERANCE:g} % of each band's valid range",
        "GEOSR_CONSISTENCY_MET": "yes" if all(r.within_tolerance for r in measured) else "no",
    }
    band_tags = []
    for r in residuals:
        band_tags.append({} if r.rms is None else {
            "GEOSR_CONSISTENCY_RMS": f"{r.rms:.6g}",
            "GEOSR_CONSISTENCY_MAX": f"{r.max:.6g}",
            "GEOSR_CONSISTENCY_RMS_PERCENT": f"{r.percent:.4g}",
        })
    return tags, band_tags
