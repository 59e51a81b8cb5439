"""QNR, D_lambda and D_s against the published formulas worked by hand, and their invariants."""

import numpy as np
import pytest
from skimage import data

from geosr.core.injection import component_substitution, highpass_injection
from geosr.core.metrics import d_lambda, d_s, qnr
from geosr.core.resample import degrade, upscale_bicubic
from geosr.errors import InputError, ParameterError


def _hand_q(x, y, k):
    """Universal image quality index (Wang & Bovik, IEEE SPL 9(3) 2002):
    Q = 4 s_xy mx my / ((s_x^2 + s_y^2)(mx^2 + my^2)) in every k x k window,
    sliding by one pixel, averaged over the windows."""
    values = []
    for i in range(x.shape[0] - k + 1):
        for j in range(x.shape[1] - k + 1):
            a = x[i : i + k, j : j + k].ravel()
            b = y[i : i + k, j : j + k].ravel()
            ma, mb = a.mean(), b.mean()
            sab = ((a - ma) * (b - mb)).mean()
            values.append(4 * sab * ma * mb / ((a.var() + b.var()) * (ma**2 + mb**2)))
    return np.mean(values)


def _hand_qnr(fused, coarse, guide, s, k, alpha, beta, p, q):
    # Alparone et al., PE&RS 74(2) 2008:
    # D_lambda = (1/(N(N-1)) sum_{l != r} |Q(F_l,F_r) - Q(M_l,M_r)|^p)^(1/p)
    # D_s = (1/N sum_l |Q(F_l,P) - Q(M_l,P_L)|^q)^(1/q)
    # QNR = (1 - D_lambda)^alpha (1 - D_s)^beta
    n = coarse.shape[0]
    pairs = [(a, b) for a in range(n) for b in range(n) if a != b]
    dl = np.mean([abs(_hand_q(fused[a], fused[b], k) - _hand_q(coarse[a], coarse[b], k)) ** p
                  for a, b in pairs]) ** (1 / p)
    p_low = degrade(guide, s)
    ds = np.mean([abs(_hand_q(fused[a], guide, k) - _hand_q(coarse[a], p_low, k)) ** q
                  for a in range(n)]) ** (1 / q)
    return (1 - dl) ** alpha * (1 - ds) ** beta, dl, ds


def _random_case(seed=0, n=3, h=12, w=14, s=2):
    rng = np.random.default_rng(seed)
    coarse = rng.uniform(20.0, 200.0, (n, h, w))
    fused = upscale_bicubic(coarse, s) + rng.normal(0.0, 15.0, (n, s * h, s * w))
    guide = rng.uniform(20.0, 200.0, (s * h, s * w))
    return fused, coarse, guide


@pytest.mark.parametrize("alpha, beta, p, q", [(1, 1, 1, 1), (0.5, 2.0, 2.0, 3.0)])
def test_qnr_matches_hand_computation(alpha, beta, p, q):
    fused, coarse, guide = _random_case()
    before = [a.copy() for a in (fused, coarse, guide)]
    got = qnr(fused, coarse, guide, 2, block=4, alpha=alpha, beta=beta, p=p, q=q)
    want, dl, ds = _hand_qnr(fused, coarse, guide, 2, 4, alpha, beta, p, q)
    assert got["d_lambda"] == pytest.approx(dl, rel=1e-9, abs=1e-12)
    assert got["d_s"] == pytest.approx(ds, rel=1e-9, abs=1e-12)
    assert got["qnr"] == pytest.approx(want, rel=1e-9)
    assert 0 < dl and 0 < ds  # a case where both distortions are at work
    assert d_lambda(fused, coarse, 2, block=4, p=p) == pytest.approx(dl, rel=1e-9)
    assert d_s(fused, coarse, guide, 2, block=4, q=q) == pytest.approx(ds, rel=1e-9)
    for a, b in zip(before, (fused, coarse, guide)):
        np.testing.assert_array_equal(a, b)


def test_qnr_is_one_when_both_distortions_vanish():
    # Q(x, x) = 4 s^2 m^2 / (2 s^2 2 m^2) = 1 (Wang & Bovik 2002). With every
    # band equal to F, the guide P = F and the coarse bands degrade(F) = P_L,
    # each Q in D_lambda and D_s is 1 on both grids: QNR = 1 exactly.
    rng = np.random.default_rng(2)
    f = rng.uniform(10.0, 100.0, (32, 32))
    fused = np.stack([f, f])
    coarse = degrade(fused, 2)
    got = qnr(fused, coarse, f, 2, block=8)
    assert got == pytest.approx({"qnr": 1.0, "d_lambda": 0.0, "d_s": 0.0}, abs=1e-12)


def test_d_lambda_is_zero_for_one_band():
    fused, coarse, guide = _random_case()
    assert d_lambda(fused[0], coarse[0], 2, block=4) == 0.0
    got = qnr(fused[:1], coarse[:1], guide, 2, block=4)
    assert got["d_lambda"] == 0.0
    assert got["qnr"] == pytest.approx(1.0 - got["d_s"])


def test_guided_baselines_score_better_than_bicubic_on_astronaut():
    # QNR rewards fused bands that carry the guide's detail (Alparone et al.
    # 2008). Measured on this 256 x 256 crop (block 32): bicubic 0.908,
    # high-pass 0.942, GSA 0.943; D_s 0.050, 0.021, 0.021.
    truth = np.moveaxis(data.astronaut()[:256, :256].astype(np.float64), -1, 0)
    coarse = degrade(truth, 2)
    guide = truth.mean(axis=0)
    base = qnr(upscale_bicubic(coarse, 2), coarse, guide, 2)
    for method in (highpass_injection, component_substitution):
        got = qnr(method(coarse, guide, 2), coarse, guide, 2)
        assert got["qnr"] > base["qnr"]
        assert got["d_s"] < base["d_s"]
        assert 0.0 < got["qnr"] <= 1.0


def test_values_at_invalid_pixels_are_never_read():
    fused, coarse, guide = _random_case(h=16, w=16)
    valid = np.ones((16, 16), dtype=bool)
    valid[:3, :] = False
    gvalid = np.ones((32, 32), dtype=bool)
    gvalid[:, -5:] = False
    results = []
    for fill in (np.nan, -1e9):
        f, c, g = fused.copy(), coarse.copy(), guide.copy()
        c[:, ~valid] = fill
        f[:, np.repeat(np.repeat(~valid, 2, 0), 2, 1)] = fill
        g[~gvalid] = fill
        results.append(qnr(f, c, g, 2, block=4, valid=valid, guide_valid=gvalid))
    assert results[0] == results[1]
    assert np.isfinite(list(results[0].values())).all()


def test_bad_input_gets_one_line_errors():
    fused, coarse, guide = _random_case()
    with pytest.raises(InputError, match="'fused' parameter must have shape"):
        qnr(fused[:, :-2], coarse, guide, 2, block=4)
    with pytest.raises(InputError, match="'guide' parameter must be on the grid"):
        qnr(fused, coarse, guide[:-2], 2, block=4)
    with pytest.raises(InputError, match="at least 32 x 32"):
        qnr(fused, coarse, guide, 2)
    with pytest.raises(ParameterError, match="'p'"):
        qnr(fused, coarse, guide, 2, block=4, p=0)
    with pytest.raises(ParameterError, match="'alpha'"):
        qnr(fused, coarse, guide, 2, block=4, alpha=-1)
    with pytest.raises(ParameterError, match="'block'"):
        d_lambda(fused, coarse, 2, block=1)
    with pytest.raises(ParameterError, match="degradation"):
        d_s(fused, coarse, guide, 2, block=4, degradation="nearest")
