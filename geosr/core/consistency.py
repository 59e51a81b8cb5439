"""Measurement consistency: back-projection of the degradation residual.

With the consistency option, the magnified window is corrected so that
degrading it gives back the input: a fixed number of iterative
back-projection steps (Irani & Peleg 1991) for the bicubic and Gaussian
degradations, one exact block-mean correction for ``"area"``. Every step
reads a known margin around what it corrects, so the context a window needs
(:func:`consistency_reach`) is fixed and chunked output stays exact.
"""

from __future__ import annotations

import math

import numpy as np

from ..enums import Degradation
from .params import ModelParams
from .resample import UPSCALE_MARGIN, degradation_margin, degrade_valid, upscale_valid

__all__ = ["CONSISTENCY_STEPS", "consistency_reach", "make_consistent"]

#: Back-projection steps of the consistency option (a fixed count keeps the
#: context radius, and so chunked output, exact).
CONSISTENCY_STEPS = 8


def _reach_cells(params: ModelParams) -> int:
    """Low-res cells on each side that the degradation of one cell reads."""
    left, right = degradation_margin(params.scale, params.degradation, params.sigma)
    return math.ceil(max(left, right) / params.scale)


def consistency_reach(params: ModelParams) -> int:
    """Low-res pixels of extra context per side that the consistency steps read."""
    if params.degradation is Degradation.AREA:
        return 0
    # Each step reads the degradation support and the interpolation margin
    # around what it corrects; the last ring measures the final residual.
    cells = _reach_cells(params)
    return CONSISTENCY_STEPS * (UPSCALE_MARGIN + cells) + cells


def make_consistent(params: ModelParams, out: np.ndarray, lr: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Back-project the degradation residual (see :data:`CONSISTENCY_STEPS`).

    Parameters
    ----------
    params : ModelParams
    out : ndarray, shape (s*(h + 2c), s*(w + 2c))
        The magnified window plus :func:`consistency_reach` ``c`` cells of
        margin on each side.
    lr : ndarray, shape (h + 2c, w + 2c)
        The input over the same cells.

    Returns
    -------
    out : ndarray, shape (s*h, s*w)
        The corrected window.
    residual : ndarray, shape (h, w)
        Its final residual ``degrade(out) - lr`` on the window's cells.
    """
    s = params.scale
    deg, sigma = params.degradation, params.sigma
    if deg is Degradation.AREA:
        # Exact: adding each cell's error to its s x s block fixes its mean.
        resid = lr - out.reshape(lr.shape[0], s, lr.shape[1], s).mean(axis=(1, 3))
        out = out + np.repeat(np.repeat(resid, s, axis=0), s, axis=1)
        return out, out.reshape(lr.shape[0], s, lr.shape[1], s).mean(axis=(1, 3)) - lr
    mc = _reach_cells(params)
    m = UPSCALE_MARGIN
    per_step = m + mc

    def error(out, lr):
        # degrade(out) - lr on the cells whose degradation support out covers.
        return degrade_valid(out, s, deg, sigma, s * mc) - lr[mc : lr.shape[0] - mc, mc : lr.shape[1] - mc]

    for _ in range(CONSISTENCY_STEPS):
        # Each step shrinks the covered area by the support it reads.
        corr = upscale_valid(-error(out, lr), s, m)
        out = out[s * per_step : out.shape[0] - s * per_step, s * per_step : out.shape[1] - s * per_step] + corr
        lr = lr[per_step : lr.shape[0] - per_step, per_step : lr.shape[1] - per_step]
    return out[s * mc : out.shape[0] - s * mc, s * mc : out.shape[1] - s * mc], error(out, lr)
