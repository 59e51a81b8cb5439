"""The demo's quick look: the same detail crop side by side, true colour and colour infrared.

Figures are built on :class:`matplotlib.figure.Figure` with the Agg canvas
attached, never through pyplot, so no global backend state is touched.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from typing import TYPE_CHECKING

import numpy as np

from ..errors import InputError
from .scene import SCALE

if TYPE_CHECKING:
    from matplotlib.figure import Figure

__all__ = ["CAPTION", "detail_window", "quicklook_figure", "rmse", "write_quicklook"]

CAPTION = (
    "Demo scene: procedurally generated, no real place and no real data. "
    "The fine detail of both geosr panels is synthesized by a statistical model, not measured; "
    "the guided panel's is estimated from a finer measured band by a model fitted to this scene."
)

#: Rows of the figure: label and the (red, green, blue) display bands.
_ROWS = {
    "rgb": "true colour (red, green, blue)",
    "cir": "colour infrared (NIR, red, green)",
}


def detail_window(scene_shape: tuple, landmarks: dict, size: int = 192, scale: int = SCALE) -> tuple[slice, slice]:
    """The detail crop of the quick look on the truth grid.

    Centred between the bridge and the nearest farmstead, clipped to the
    grid, aligned to the coarse pixels.

    Returns
    -------
    tuple of slice
        (rows, cols) slices of length ``size`` (a multiple of ``scale``).
    """
    rows, cols = scene_shape[-2:]
    size = min(size - size % scale, rows - rows % scale, cols - cols % scale)
    pts = [landmarks[k] for k in ("bridge", "farm") if k in landmarks]
    cy, cx = np.mean(pts, axis=0) if pts else (rows / 2, cols / 2)
    r0 = int(np.clip(cy - size / 2, 0, rows - size)) // scale * scale
    c0 = int(np.clip(cx - size / 2, 0, cols - size)) // scale * scale
    return slice(r0, r0 + size), slice(c0, c0 + size)


def _stretch(reference, bands, valid):
    """Per-band 2-98 % linear stretch limits of the reference (common practice)."""
    lo, hi = [], []
    for b in bands:
        vals = reference[b][valid] if valid is not None and valid.any() else reference[b].ravel()
        vals = vals[np.isfinite(vals)]
        if vals.size == 0:
            lo.append(0.0)
            hi.append(1.0)
            continue
        p2, p98 = np.percentile(vals, (2, 98))
        lo.append(p2)
        hi.append(p98 if p98 > p2 else p2 + 1e-6)
    return np.array(lo), np.array(hi)


def _composite(image, bands, lo, hi):
    rgb = np.stack([image[b] for b in bands], axis=-1).astype(np.float64)
    rgb = (rgb - lo) / (hi - lo)
    return np.clip(np.nan_to_num(rgb, nan=0.0), 0.0, 1.0)


def rmse(reference: np.ndarray, estimate: np.ndarray, valid: np.ndarray | None = None) -> float:
    """Root mean square difference over valid pixels of all bands.

    Parameters
    ----------
    reference, estimate : ndarray, shape (bands, rows, cols)
    valid : ndarray of bool, shape (rows, cols), optional
    """
    diff = np.asarray(estimate, np.float64) - np.asarray(reference, np.float64)
    if valid is not None:
        diff = diff[:, valid]
    return float(np.sqrt(np.mean(diff**2))) if diff.size else float("nan")


def _check_panels(panels):
    if not panels:
        raise InputError("The 'panels' parameter must hold at least one (label, image) pair, got none")
    shape = np.shape(panels[0][1])
    for label, image in panels:
        if np.ndim(image) != 3 or np.shape(image) != shape or shape[0] < 4:
            raise InputError(
                f"Every quick-look panel must be an array of shape (4, rows, cols) like the "
                f"first, {shape}, got {np.shape(image)} for {label!r}"
            )


def _draw_panel(column, label, image, ref, valid, rows, limits):
    """Draw one panel (both rows of one column of axes)."""
    image = np.asarray(image, np.float64)
    if np.array_equal(image, ref):
        head = f"{label}\nreference"
    else:
        head = f"{label}\nRMSE {rmse(ref, image, valid):.4f}"
    for i, (_, bands) in enumerate(rows):
        ax = column[i]
        ax.imshow(_composite(image, bands, *limits[bands]), interpolation="nearest")
        ax.set_xticks([])
        ax.set_yticks([])
        if i == 0:
            ax.set_title(head, fontsize=11)


def quicklook_figure(
    panels: Sequence[tuple[str, np.ndarray]],
    *,
    reference: np.ndarray | None = None,
    valid: np.ndarray | None = None,
    caption: str = CAPTION,
    title: str | None = None,
    rgb: tuple[int, int, int] = (2, 1, 0),
    cir: tuple[int, int, int] = (3, 2, 1),
) -> Figure:
    """The quick-look figure: one column per panel, true colour and colour infrared.

    Parameters
    ----------
    panels : sequence of (str, ndarray)
        Label and image, each of shape (4, rows, cols), reflectance floats
        (blue, green, red, NIR), all of one shape.
    reference : ndarray, shape (4, rows, cols), optional
        The image the stretch is taken from (and the RMSE is measured
        against); default the last panel.
    valid : ndarray of bool, shape (rows, cols), optional
        Pixels used for the stretch and the RMSE.
    caption : str
        Printed under the panels.

    Returns
    -------
    matplotlib.figure.Figure
        With an Agg canvas, not attached to pyplot; save it with ``fig.savefig``.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    _check_panels(panels)
    ref = np.asarray(reference if reference is not None else panels[-1][1], np.float64)
    ncol = len(panels)
    fig = Figure(figsize=(4.0 * ncol, 9.0), dpi=100)
    FigureCanvasAgg(fig)
    rows = ((_ROWS["rgb"], rgb), (_ROWS["cir"], cir))
    limits = {bands: _stretch(ref, bands, valid) for _, bands in rows}
    axes = fig.subplots(2, ncol, squeeze=False)
    for j, (label, image) in enumerate(panels):
        _draw_panel(axes[:, j], label, image, ref, valid, rows, limits)
    for i, (row_label, _) in enumerate(rows):
        axes[i][0].set_ylabel(row_label, fontsize=10)
    if title:
        fig.suptitle(title, fontsize=13)
    fig.text(0.5, 0.015, caption, ha="center", va="bottom", fontsize=9.5, wrap=True)
    fig.subplots_adjust(left=0.04, right=0.99, top=0.88 if title else 0.92, bottom=0.07,
                        wspace=0.04, hspace=0.06)
    return fig


def write_quicklook(path: str | os.PathLike, panels: Sequence[tuple[str, np.ndarray]], **kwargs) -> str:
    """Write :func:`quicklook_figure` to a PNG file and return its path."""
    fig = quicklook_figure(panels, **kwargs)
    fig.savefig(path, format="png")
    return os.fspath(path)
