"""Reassembly of overlapping patches against an explicit per-patch loop."""

import numpy as np
import pytest

from geosr.core.features import canvas_average, overlap_add, overlap_average, overlap_canvas


def reference_average(patches, scale):
    # Plain definition (module docstring of geosr.core.features): the patch of centre (ci, cj),
    # counted from -1, covers high-res rows s*(ci-1) .. s*(ci+2)-1; each pixel of the
    # h x w window is the mean of the nine patches covering it.
    s = scale
    h, w = patches.shape[0] - 2, patches.shape[1] - 2
    acc = np.zeros((s * (h + 4), s * (w + 4)))
    for ci in range(h + 2):
        for cj in range(w + 2):
            acc[s * ci : s * ci + 3 * s, s * cj : s * cj + 3 * s] += patches[ci, cj].reshape(3 * s, 3 * s)
    return acc[2 * s : 2 * s + s * h, 2 * s : 2 * s + s * w] / 9.0


@pytest.mark.parametrize("scale", [2, 3, 4])
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_overlap_average_matches_per_patch_loop(scale, dtype):
    rng = np.random.default_rng(scale)
    h, w = 7, 5
    patches = rng.standard_normal((h + 2, w + 2, (3 * scale) ** 2)).astype(dtype)
    got = overlap_average(patches, scale)
    assert got.dtype == dtype
    tol = 1e-5 if dtype == np.float32 else 1e-12
    np.testing.assert_allclose(got, reference_average(patches.astype(np.float64), scale), atol=tol)


def test_strips_add_up_to_the_whole():
    # Adding the centre rows in strips of any height gives the one-shot result (to rounding:
    # the nine contributions arrive in another order).
    rng = np.random.default_rng(0)
    h, w, s = 9, 6, 3
    patches = rng.standard_normal((h + 2, w + 2, (3 * s) ** 2))
    whole = overlap_average(patches, s)
    canvas = overlap_canvas(h, w, s, patches.dtype)
    for r0, r1 in [(0, 1), (1, 5), (5, 11)]:
        overlap_add(canvas, patches[r0:r1], r0)
    np.testing.assert_allclose(canvas_average(canvas), whole, atol=1e-12)
    np.testing.assert_allclose(whole, reference_average(patches, s), atol=1e-12)
