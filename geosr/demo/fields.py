"""Farmland of the demo scene: parcels of crops with tramlines and furrows, margins, tracks.

Parcels lie in a frame rotated by ``theta``: strips of random widths along
``u``, each cut into fields of random lengths along ``v``.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from .landcover import CODE

__all__ = ["CROPS", "CROP_SHARES", "Parcels", "paint_parcels", "paint_tracks"]

#: What a field grows ("orchard" is grass under rows of trees), and how often.
CROPS = ("green-crop", "ripe-cereal", "bare-soil", "grass", "orchard")
CROP_SHARES = (0.3, 0.27, 0.15, 0.18, 0.10)

#: Relative amplitude of the row pattern of each crop (others: 0.015).
_ROW_AMPLITUDE = {"bare-soil": 0.08, "ripe-cereal": 0.05, "green-crop": 0.04}


@dataclasses.dataclass
class Parcels:
    """The field pattern, in the rotated frame (u across strips, v along them).

    Attributes
    ----------
    theta : float
        Rotation of the frame, radians.
    u, v : ndarray, shape (n, n)
        Frame coordinates of every pixel.
    hedge_lines : list of ((u0, v0), (u1, v1))
        Field edges lined with hedges.
    track_edges : list of float
        Strip edges (u) that carry a farm track.
    orchards : list of (u0, u1, v0, v1)
        Fields planted with rows of trees.
    """

    theta: float
    u: np.ndarray
    v: np.ndarray
    hedge_lines: list = dataclasses.field(default_factory=list)
    track_edges: list = dataclasses.field(default_factory=list)
    orchards: list = dataclasses.field(default_factory=list)

    def to_rowcol(self, pu, pv):
        """(row, col) of the frame point (u, v)."""
        theta = self.theta
        return pu * math.sin(theta) + pv * math.cos(theta), pu * math.cos(theta) - pv * math.sin(theta)


def _edges(rng, start, stop, low, high, k):
    """Edges from ``start - 1`` in random steps of ``low`` to ``high`` (times k) past ``stop``."""
    edges = [start - 1]
    while edges[-1] < stop:
        edges.append(edges[-1] + rng.uniform(low, high) * k)
    return edges


def _sow(rng, parcels, here, u_span, v_span, strip):
    """Choose one field's crop and paint its rows, brightness and vigour into ``strip``."""
    lc, tex, vig, us, vv = strip
    crop = CROPS[rng.choice(len(CROPS), p=CROP_SHARES)]
    if crop == "orchard":
        lc[here] = CODE["grass"]
        parcels.orchards.append(u_span + v_span)
    else:
        lc[here] = CODE[crop]
    # tramlines, drill rows or furrows at a parcel-specific direction
    period = rng.uniform(4.0, 9.0)
    along_u = rng.random() < 0.5
    coord = us[here] if along_u else vv[here]
    amp = _ROW_AMPLITUDE.get(crop, 0.015)
    tex[here] += amp * np.sin(2 * math.pi * coord / period + rng.uniform(0, 6.3))
    tex[here] += rng.normal(0.0, 0.05)  # parcel brightness
    vig[here] = rng.normal(0.0, 0.06)  # crop vigour in the NIR
    if rng.random() < 0.35:
        parcels.hedge_lines.append(((u_span[0], v_span[0]), (u_span[1], v_span[0])))


def _paint_strip(rng, layers, parcels, in_strip, u0, u1, k):
    """Cut one strip into fields and sow them; return its grass-margin mask."""
    vs = parcels.v[in_strip]
    v_edges = _edges(rng, vs.min(), vs.max(), 35, 100, k)
    row = np.searchsorted(v_edges, parcels.v[in_strip]) - 1
    us, vv = parcels.u[in_strip], parcels.v[in_strip]
    strip = (layers.landcover[in_strip], layers.texture[in_strip], layers.nir_vigour[in_strip], us, vv)
    for r in range(len(v_edges) - 1):
        _sow(rng, parcels, row == r, (u0, u1), (v_edges[r], v_edges[r + 1]), strip)
    layers.landcover[in_strip], layers.texture[in_strip], layers.nir_vigour[in_strip] = strip[:3]
    # grass margins along every field edge
    dv = np.abs(vv[:, None] - np.asarray(v_edges)[None, :]).min(axis=1)
    du = np.minimum(np.abs(us - u0), np.abs(us - u1))
    lo, hi = vs.min(), vs.max()
    roll = rng.random()
    if roll < 0.4:
        parcels.hedge_lines.append(((u0, lo), (u0, hi)))
    elif roll < 0.65:
        parcels.track_edges.append(u0)
    return (dv < 1.2) | (du < 1.2)


def paint_parcels(rng, grid, layers):
    """Paint the fields and their grass margins; return where hedges, tracks and orchards go."""
    theta = rng.uniform(0.12, 0.28)
    xx, yy = grid.xx, grid.yy
    u = xx * math.cos(theta) + yy * math.sin(theta)
    v = -xx * math.sin(theta) + yy * math.cos(theta)
    parcels = Parcels(theta, u, v)
    u_edges = _edges(rng, u.min(), u.max(), 45, 120, grid.k)
    strip = np.searchsorted(u_edges, u) - 1
    margin = np.zeros(grid.shape, dtype=bool)
    for s in range(len(u_edges) - 1):
        in_strip = strip == s
        if not in_strip.any():
            continue
        margin[in_strip] = _paint_strip(rng, layers, parcels, in_strip, u_edges[s], u_edges[s + 1], grid.k)
    layers.paint(margin, "grass")
    if not parcels.track_edges and len(u_edges) > 3:
        parcels.track_edges.append(u_edges[len(u_edges) // 2])
    return parcels


def paint_tracks(layers, parcels, forest):
    """Farm tracks along some strip edges, not through the woods."""
    for ue in parcels.track_edges:
        layers.paint((np.abs(parcels.u - ue) < 1.1) & ~forest, "track")
