"""Guided magnification: block exactness, the regression, Wald's protocol, errors."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage
from skimage import data
from skimage.metrics import peak_signal_noise_ratio
from sklearn.base import clone

from geosr.core.guided import (
    N_FEATURES,
    SLOPE_EPS,
    CombinationStatistics,
    GuidedRegression,
    TrainingStatistics,
    combination_statistics,
    guided_halo,
    sample_mask,
    sharpen_with_guide,
    training_statistics,
)
from geosr.core.resample import degrade, upscale_bicubic
from geosr.errors import InputError, NotFittedError, ParameterError


def _photo(name, size, s):
    """RGB bands of a scikit-image photo crop, (3, size, size) float64, size a multiple of s."""
    img = getattr(data, name)().astype(np.float64)
    size -= size % s
    return np.moveaxis(img[:size, :size], 2, 0)


def _pad(a, r):
    return np.pad(a, [(0, 0)] * (a.ndim - 2) + [(r, r)] * 2, mode="symmetric")


@pytest.fixture(scope="module")
def scene():
    """Astronaut at x2: coarse RGB, guide = luminance-like mean, masks with holes."""
    s = 2
    ref = _photo("astronaut", 240, s)
    coarse = degrade(ref, s)
    guide = ref.mean(axis=0, keepdims=True)
    cv = np.ones(coarse.shape, dtype=bool)
    cv[0, 30:40, 50:60] = False
    gv = np.ones(guide.shape[1:], dtype=bool)
    gv[100:110, 20:25] = False
    return s, coarse, guide, cv, gv


def _blocks(n, cuts):
    return [(cuts[i], cuts[i + 1]) for i in range(len(cuts) - 1)] if n else []


def test_statistics_summed_over_blocks_equal_whole(scene):
    s, coarse, guide, cv, gv = scene
    m = guided_halo(s)
    xp, gp, cvp, gvp = _pad(coarse, m), _pad(guide, s * m), _pad(cv, m), _pad(gv, s * m)
    whole = combination_statistics(xp, gp, cvp, gvp, s, margin=m)
    w = GuidedRegression(scale=s).combination_from_statistics(whole)
    kw = dict(sample_rate=0.3, random_state=7, margin=m)
    train = training_statistics(xp, gp, cvp, gvp, w, s, origin=(0, 0), **kw)
    comb = CombinationStatistics.empty(3, 1)
    parts = TrainingStatistics.empty(3)
    cuts = [0, 36, 90, coarse.shape[1]]  # interiors and offsets multiples of s
    for r0, r1 in _blocks(1, cuts):
        for c0, c1 in _blocks(1, cuts):
            cs = (slice(None), slice(r0, r1 + 2 * m), slice(c0, c1 + 2 * m))
            fs = (slice(s * r0, s * (r1 + 2 * m)), slice(s * c0, s * (c1 + 2 * m)))
            args = (xp[cs], gp[(slice(None),) + fs], cvp[cs], gvp[fs])
            comb = comb + combination_statistics(*args, s, margin=m)
            parts = parts + training_statistics(*args, w, s, origin=(r0, c0), **kw)
    np.testing.assert_array_equal(comb.count, whole.count)
    np.testing.assert_allclose(comb.gram, whole.gram, rtol=1e-12)
    np.testing.assert_allclose(comb.cross, whole.cross, rtol=1e-12)
    # The same samples are drawn whatever the cut.
    np.testing.assert_array_equal(parts.count, train.count)
    np.testing.assert_allclose(parts.ata, train.ata, rtol=1e-9, atol=1e-6)
    np.testing.assert_allclose(parts.aty, train.aty, rtol=1e-9, atol=1e-6)
    # Band 0 has a hole, so fewer valid pixels than the others.
    assert whole.count[0] < whole.count[1] == whole.count[2]


def test_block_predictions_equal_whole(scene):
    s, coarse, guide, cv, gv = scene
    model = GuidedRegression(scale=s).fit(coarse, guide, cv, gv)
    values, ok = model.predict(coarse, guide, gv)
    assert values.shape == (3, s * coarse.shape[1], s * coarse.shape[2])
    assert 0 < (~ok).sum() < ok.size // 10
    assert not ok[s * 100 // 2 + 5 : s * 110 // 2 - 5, 22].any()  # under the guide's hole
    m = guided_halo(s)
    xp, gp, gvp = _pad(coarse, m), _pad(guide, s * m), _pad(gv, s * m)
    # Block sizes and offsets need not be multiples of the scale for prediction.
    for r0, r1, c0, c1 in [(0, 37, 0, 51), (37, 120, 51, 120), (10, 70, 90, 120)]:
        cs = (slice(None), slice(r0, r1 + 2 * m), slice(c0, c1 + 2 * m))
        fs = (slice(s * r0, s * (r1 + 2 * m)), slice(s * c0, s * (c1 + 2 * m)))
        v, o = model.predict_block(xp[cs], gp[(slice(None),) + fs], gvp[fs], m)
        window = (slice(s * r0, s * r1), slice(s * c0, s * c1))
        np.testing.assert_array_equal(o, ok[window])
        np.testing.assert_allclose(v[:, o], values[(slice(None),) + window][:, o], rtol=1e-10,
                                   atol=1e-9)


def _reference_prediction(model, coarse, guide, s):
    """The documented features built one by one with scipy, times the coefficients."""
    w = model.combination_[0]
    p = np.tensordot(w[:-1], guide, axes=1) + w[-1]
    u = upscale_bicubic(coarse[0], s)
    low = upscale_bicubic(degrade(p, s), s)
    d = p - low

    def mean7(a):  # box mean over the 7 x 7 window
        return ndimage.uniform_filter(a, 7, mode="nearest")

    cov = mean7(u * low) - mean7(u) * mean7(low)
    var_l = np.maximum(mean7(low * low) - mean7(low) ** 2, 0)
    var_u = np.maximum(mean7(u * u) - mean7(u) ** 2, 0)
    ds = d * cov / (var_l + SLOPE_EPS * var_u)
    shifts = [(a, b) for a in range(-2, 3) for b in range(-2, 3)]

    def nb(a, da, db):  # a[i + da, j + db]
        return np.roll(a, (-da, -db), axis=(0, 1))

    feats = [nb(d, *o) for o in shifts]
    feats += [nb(u, *o) - u for o in shifts if o != (0, 0)]
    feats += [nb(low, *o) - low for o in shifts if o != (0, 0)]
    feats += [nb(ds, *o) for o in shifts]
    return u + np.tensordot(model.coef_[0], np.stack(feats), axes=1) + model.intercept_[0]


def test_prediction_equals_explicit_features():
    s = 3
    ref = _photo("coffee", 162, s * s)
    coarse, guide = degrade(ref[:1], s), ref[1:].mean(axis=0, keepdims=True)
    model = GuidedRegression(scale=s).fit(coarse, guide)
    values, ok = model.predict(coarse, guide)
    assert ok.all()
    expect = _reference_prediction(model, coarse, guide, s)
    inner = (slice(30, -30), slice(30, -30))  # away from the border rules
    np.testing.assert_allclose(values[0][inner], expect[inner], rtol=1e-9, atol=1e-7)


def test_ridge_recovers_an_affine_relation():
    rng = np.random.default_rng(3)
    a = rng.normal(size=(2, 3000, N_FEATURES))
    coef = rng.normal(size=(2, N_FEATURES))
    y = np.einsum("bnf,bf->bn", a, coef) + np.array([[5.0], [-2.0]])
    comb = CombinationStatistics.empty(2, 1)
    comb.gram[:] = [[2.0, 1.0], [1.0, 1.0]]
    comb.cross[:] = [1.0, 1.0]
    comb.sq[:] = 1.0
    comb.count[:] = 1
    comb = comb + comb + comb  # three pixels per band, enough for stage 1
    model = GuidedRegression(ridge=1e-12).fit_statistics(comb, TrainingStatistics.from_samples(a, y))
    for b in range(2):
        design = np.column_stack([a[b], np.ones(len(a[b]))])
        expected = np.linalg.lstsq(design, y[b], rcond=None)[0]  # numpy reference
        np.testing.assert_allclose(model.coef_[b], expected[:-1], atol=1e-9)
        np.testing.assert_allclose(model.intercept_[b], expected[-1], atol=1e-9)
    np.testing.assert_array_equal(model.n_samples_, [3000, 3000])


def _glp_regression(coarse_band, guide, s):
    """High-pass injection with a global regression gain, GLP family.

    Aiazzi et al. 2006 (PE&RS 72(5)): X_hat = X~ + g (P - P_L) with
    g = cov(X, P_L) / var(P_L) fitted between the band and the low-passed
    guide at the band's resolution.
    """
    low_coarse = degrade(guide, s)
    gain = np.cov(coarse_band.ravel(), low_coarse.ravel())[0, 1] / np.var(low_coarse, ddof=1)
    return upscale_bicubic(coarse_band, s) + gain * (guide - upscale_bicubic(low_coarse, s))


# Margins measured with this implementation on 256 x 256 (x3: 252 x 252) crops, mean over the
# three bands (dB): guided minus bicubic, guided minus GLP-regression.
WALD_MARGINS = {
    ("astronaut", 2): (11.1, 1.4),
    ("astronaut", 3): (11.6, 1.2),
    ("chelsea", 2): (12.7, 0.9),
    ("chelsea", 3): (11.9, 0.6),
    ("coffee", 2): (12.4, 2.0),
    ("coffee", 3): (10.8, 1.0),
}


@pytest.mark.parametrize("name,s", sorted(WALD_MARGINS))
def test_wald_protocol_beats_bicubic_and_high_pass(name, s):
    """Wald et al. 1997 protocol: degrade by s, magnify with a guide, compare to the original."""
    ref = _photo(name, 256 - 256 % (s * s), s * s)
    coarse = degrade(ref, s)
    gains = []
    for b in range(3):
        guide = np.delete(ref, b, axis=0).mean(axis=0)  # the other two bands
        out = sharpen_with_guide(coarse[b], guide, s)
        scores = [peak_signal_noise_ratio(ref[b], x, data_range=255)
                  for x in (out, upscale_bicubic(coarse[b], s), _glp_regression(coarse[b], guide, s))]
        gains.append((scores[0] - scores[1], scores[0] - scores[2]))
    over_bicubic, over_glp = np.mean(gains, axis=0)
    want_bicubic, want_glp = WALD_MARGINS[(name, s)]
    assert over_bicubic > want_bicubic - 0.3
    assert over_glp > want_glp - 0.3


def test_sample_selection_is_global_and_bounded_by_the_rate():
    rows, cols = np.mgrid[0:300, 0:400]
    whole = sample_mask(rows, cols, 0.1, 5)
    part = sample_mask(rows[120:, 200:], cols[120:, 200:], 0.1, 5)
    np.testing.assert_array_equal(part, whole[120:, 200:])
    n = whole.size
    # Binomial(n, 0.1): mean 0.1 n, sd sqrt(0.09 n); 5 sd never fails by chance.
    assert abs(whole.sum() - 0.1 * n) < 5 * np.sqrt(0.09 * n)
    assert not np.array_equal(whole, sample_mask(rows, cols, 0.1, 6))
    assert sample_mask(rows, cols, 1.0, 0).all()


def test_max_samples_bounds_the_training_set(scene):
    s, coarse, guide, _, _ = scene
    model = GuidedRegression(scale=s, max_samples=2000).fit(coarse, guide)
    n = 2000
    assert (model.n_samples_ < n + 5 * np.sqrt(n)).all()
    assert (model.n_samples_ > n - 5 * np.sqrt(n)).all()


def test_model_round_trip_float32_and_clone(scene):
    s, coarse, guide, _, _ = scene
    model = GuidedRegression(scale=s, ridge=1e-2).fit(coarse, guide)
    again = GuidedRegression.from_arrays(model.get_params(), model.to_arrays())
    for name in ("combination_", "coef_", "intercept_", "correlation_", "n_samples_"):
        np.testing.assert_array_equal(getattr(again, name), getattr(model, name))
    np.testing.assert_array_equal(again.predict(coarse, guide)[0], model.predict(coarse, guide)[0])
    v32 = model.predict(coarse.astype(np.float32), guide.astype(np.float32))[0]
    assert v32.dtype == np.float32
    np.testing.assert_allclose(v32, model.predict(coarse, guide)[0], atol=0.05)
    assert clone(model).get_params() == model.get_params()
    assert model.correlation_.shape == (3,) and (model.correlation_ > 0.9).all()


def test_constant_band_stays_constant():
    s = 2
    ref = _photo("chelsea", 64, s)
    coarse = np.full((1, 32, 32), 7.0)
    out = sharpen_with_guide(coarse, ref[:1], s, max_samples=1000)
    np.testing.assert_allclose(out, 7.0, atol=1e-9)


def test_errors(scene):
    s, coarse, guide, _, _ = scene
    with pytest.raises(InputError, match="times finer"):
        GuidedRegression(scale=s).fit(coarse, guide[:, :-2])
    with pytest.raises(InputError, match="times finer"):
        GuidedRegression(scale=3).fit(coarse[:, :120, :120], guide)  # guide is 2x finer
    with pytest.raises(InputError, match="crop_to_multiple"):
        GuidedRegression(scale=s).fit(coarse[:, :119, :120], guide[:, :238, :240])
    bad = coarse.copy()
    bad[1, 3, 3] = np.nan
    with pytest.raises(InputError, match="finite"):
        GuidedRegression(scale=s).fit(bad, guide)
    with pytest.raises(InputError, match="training samples"):
        GuidedRegression(scale=s, max_samples=500).fit(coarse[:, :20, :20], guide[:, :40, :40])
    few = np.zeros(coarse.shape, dtype=bool)
    few[:, :10, :10] = True
    with pytest.raises(InputError, match="training samples"):
        GuidedRegression(scale=s).fit(coarse, guide, few)
    with pytest.raises(ParameterError, match="scale"):
        GuidedRegression(scale=9).fit(coarse, guide)
    with pytest.raises(ParameterError, match="random_state"):
        GuidedRegression(random_state=np.random.default_rng(0)).fit(coarse, guide)
    with pytest.raises(NotFittedError):
        GuidedRegression(scale=s).predict(coarse, guide)
    m = guided_halo(s)
    with pytest.raises(ParameterError, match="margin"):
        combination_statistics(coarse, guide, None, None, s, margin=m - 1)


def test_masked_inputs_are_filled_not_modified(scene):
    s, coarse, guide, cv, gv = scene
    x, g = coarse.copy(), guide.copy()
    x[~cv] = np.nan
    g[:, ~gv] = np.nan
    before_x, before_g = x.copy(), g.copy()
    values, ok = GuidedRegression(scale=s).fit(x, g, cv, gv).predict(coarse, g, gv)
    np.testing.assert_array_equal(x, before_x)  # NaN stays where it was
    np.testing.assert_array_equal(g, before_g)
    assert np.isfinite(values).all() and not ok.all()


def test_halo_is_a_multiple_of_the_scale():
    for s in range(2, 9):
        for model in ("bicubic", "gaussian", "area"):
            h = guided_halo(s, model)
            assert h % s == 0 and h >= 2 * s
