"""Batch OMP and K-SVD against scikit-learn, a bundled photo and a published experiment."""

import warnings

import numpy as np
import pytest
import scipy.sparse

from geosr import sparse
from geosr.errors import InputError, NotFittedError, ParameterError


def _unit(D):
    return D / np.linalg.norm(D, axis=0)


def _gaussian(n_features, n_atoms, n_signals, seed, dtype=np.float64):
    rng = np.random.default_rng(seed)
    D = _unit(rng.standard_normal((n_features, n_atoms)))
    X = rng.standard_normal((n_features, n_signals))
    return D.astype(dtype), X.astype(dtype)


def _sklearn_omp(D, X, n_nonzero, tol=None):
    """Reference: scikit-learn's Gram-form OMP (general-purpose reference library)."""
    from sklearn.linear_model import orthogonal_mp_gram

    G = D.T @ D
    norms = np.einsum("ij,ij->j", X, X) if tol is not None else None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # "stopped early" on exact signals
        C = orthogonal_mp_gram(G, D.T @ X, n_nonzero_coefs=n_nonzero, tol=tol, norms_squared=norms)
    return np.asarray(C).reshape(D.shape[1], X.shape[1])


def _assert_same_codes(ours, ref, rtol):
    dense = ours.toarray()
    np.testing.assert_array_equal(dense != 0, ref != 0)
    scale = np.abs(ref).max()
    np.testing.assert_allclose(dense, ref, rtol=rtol, atol=rtol * scale)


def _camera_patches(size, n_atoms, n_signals, seed):
    """Mean-removed, normalised 8 x 8 patches of skimage's bundled 'camera' photo."""
    from skimage.data import camera

    img = camera().astype(np.float64)
    rng = np.random.default_rng(seed)
    rows = rng.integers(0, img.shape[0] - size, 6 * (n_atoms + n_signals))
    cols = rng.integers(0, img.shape[1] - size, rows.size)
    P = np.stack([img[r : r + size, c : c + size].ravel() for r, c in zip(rows, cols)], axis=1)
    P -= P.mean(axis=0)  # DC removed, common practice for patch dictionaries
    P = P[:, np.linalg.norm(P, axis=0) > 50.0]  # drop flat patches (sky)
    atoms = _unit(P[:, : 3 * n_atoms])
    # keep atoms that are not near-duplicates, so that no selection is an exact tie
    keep = []
    for j in range(atoms.shape[1]):
        if not keep or np.max(np.abs(atoms[:, keep].T @ atoms[:, j])) < 0.999:
            keep.append(j)
        if len(keep) == n_atoms:
            break
    D = atoms[:, keep]
    X = P[:, -n_signals:]
    return D, X


# --------------------------------------------------------------------------
# batch OMP against scikit-learn


@pytest.mark.parametrize("n_nonzero", [1, 3, 6])
def test_batch_omp_matches_sklearn_on_gaussian_data(n_nonzero):
    D, X = _gaussian(30, 400, 300, seed=n_nonzero)
    codes = sparse.batch_omp(D, X, n_nonzero)
    # sklearn.linear_model.orthogonal_mp_gram (reference library): same supports and coefficients.
    _assert_same_codes(codes, _sklearn_omp(D, X, n_nonzero), rtol=1e-5)
    assert np.all(np.diff(codes.indptr) == n_nonzero)


def test_batch_omp_matches_sklearn_on_camera_patches():
    # Structured data: patches of skimage.data.camera() (bundled photo), a
    # coherent dictionary of the kind K-SVD starts from.
    D, X = _camera_patches(8, 256, 300, seed=1)
    assert D.shape == (64, 256)
    codes = sparse.batch_omp(D, X, 5)
    _assert_same_codes(codes, _sklearn_omp(D, X, 5), rtol=1e-5)


def test_batch_omp_with_tol_matches_sklearn():
    D, X = _gaussian(20, 100, 200, seed=4)
    tol = 0.3 * float(np.min(np.einsum("ij,ij->j", X, X)))  # below every signal's energy
    codes = sparse.batch_omp(D, X, 20, tol=tol)
    # sklearn's orthogonal_mp_gram with tol (reference library): stop at squared residual <= tol.
    _assert_same_codes(codes, _sklearn_omp(D, X, None, tol=tol), rtol=1e-5)
    counts = np.diff(codes.indptr)
    assert counts.min() >= 1 and counts.max() < 20
    resid = X - D @ codes.toarray()
    assert np.all(np.einsum("ij,ij->j", resid, resid) <= tol * (1 + 1e-9))


def test_float32_matches_sklearn_float32_supports():
    D, X = _gaussian(30, 500, 300, seed=7, dtype=np.float32)
    codes = sparse.batch_omp(D, X, 3)
    ref = _sklearn_omp(D, X, 3)  # sklearn computes in float32 on a float32 Gram
    assert codes.dtype == np.float32 and ref.dtype == np.float32
    _assert_same_codes(codes, ref, rtol=2e-3)


def test_float32_agrees_with_float64_on_well_separated_signals():
    # Planted 3-atom signals over an incoherent dictionary with coefficients
    # bounded away from zero: the greedy choices are far from ties.
    rng = np.random.default_rng(3)
    D = _unit(rng.standard_normal((40, 120)))
    X = np.zeros((40, 500))
    for s in range(X.shape[1]):
        X[:, s] = D[:, rng.choice(120, 3, replace=False)] @ (rng.uniform(1, 2, 3) * rng.choice([-1, 1], 3))
    c64 = sparse.batch_omp(D, X, 3)
    c32 = sparse.batch_omp(D.astype(np.float32), X.astype(np.float32), 3)
    assert c64.dtype == np.float64 and c32.dtype == np.float32
    np.testing.assert_array_equal(c32.indices, c64.indices)
    np.testing.assert_array_equal(c32.indptr, c64.indptr)
    np.testing.assert_allclose(c32.data, c64.data, rtol=1e-3, atol=1e-4)


def test_orthonormal_dictionary_gives_hard_thresholding():
    # Linear algebra: over an orthonormal basis OMP keeps the n_nonzero
    # largest |D^T x| with coefficients D^T x (a fact, not a measured value).
    rng = np.random.default_rng(5)
    Q, _ = np.linalg.qr(rng.standard_normal((16, 16)))
    X = rng.standard_normal((16, 50))
    codes = sparse.batch_omp(Q, X, 4).toarray()
    c = Q.T @ X
    top = np.argsort(-np.abs(c), axis=0)[:4]
    expected = np.zeros_like(c)
    np.put_along_axis(expected, top, np.take_along_axis(c, top, axis=0), axis=0)
    np.testing.assert_allclose(codes, expected, rtol=1e-10, atol=1e-12)


# --------------------------------------------------------------------------
# degenerate signals, layout, invariants


def test_zero_signals_give_empty_columns():
    D, X = _gaussian(30, 200, 10, seed=0)
    X[:, [0, 4, 9]] = 0.0
    codes = sparse.batch_omp(D, X, 3)
    counts = np.diff(codes.indptr)
    np.testing.assert_array_equal(counts[[0, 4, 9]], 0)
    assert np.all(counts[[1, 2, 3, 5, 6, 7, 8]] == 3)
    assert np.all(np.isfinite(codes.data))
    idx, coef = sparse.omp_codes(D, X, 3)
    np.testing.assert_array_equal(idx[[0, 4, 9]], 0)
    np.testing.assert_array_equal(coef[[0, 4, 9]], 0.0)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_exactly_sparse_signals_take_fewer_atoms(dtype):
    # A signal that is exactly two atoms has a zero residual after two steps:
    # it gets two atoms (and sklearn also stops there), never NaN.
    D, _ = _gaussian(30, 200, 0, seed=2)
    X = np.stack([D[:, 3] * 2.0 - D[:, 50] * 0.7, D[:, 10] * 5.0], axis=1)
    codes = sparse.batch_omp(D.astype(dtype), X.astype(dtype), 3)
    np.testing.assert_array_equal(np.diff(codes.indptr), [2, 1])
    np.testing.assert_array_equal(codes.indices, [3, 50, 10])
    rtol = 1e-4 if dtype == np.float32 else 1e-12
    np.testing.assert_allclose(codes.data, [2.0, -0.7, 5.0], rtol=rtol)
    if dtype == np.float64:
        _assert_same_codes(codes, _sklearn_omp(D, X, 3), rtol=1e-9)  # sklearn (reference library)


def test_signals_within_tol_get_no_atom():
    D, X = _gaussian(30, 200, 6, seed=8)
    X[:, 2] *= 1e-3
    tol = 2.0 * float(np.sum(X[:, 2] ** 2))
    codes = sparse.batch_omp(D, X, 3, tol=tol)
    counts = np.diff(codes.indptr)
    assert counts[2] == 0
    assert np.all(np.delete(counts, 2) >= 1)


def test_csc_layout_and_dtypes():
    D, X = _gaussian(30, 300, 40, seed=9)
    codes = sparse.batch_omp(D, X, 3)
    assert scipy.sparse.issparse(codes) and codes.format == "csc"
    assert codes.shape == (300, 40)
    assert codes.has_sorted_indices
    assert np.all(np.diff(codes.indices.reshape(40, 3), axis=1) > 0)  # sorted rows per column
    assert sparse.batch_omp(D.astype(np.float32), X.astype(np.float32), 3).dtype == np.float32
    # mixed or integer input computes in float64
    assert sparse.batch_omp(D.astype(np.float32), X, 3).dtype == np.float64
    assert sparse.batch_omp(D, np.round(X * 100).astype(np.int16), 3).dtype == np.float64
    empty = sparse.batch_omp(D, X[:, :0], 3)
    assert empty.shape == (300, 0) and empty.nnz == 0


def test_omp_codes_layout_gram_and_reconstruct():
    D, X = _gaussian(30, 300, 120, seed=10, dtype=np.float32)
    X[:, 7] = 0
    idx, coef = sparse.omp_codes(D, X, 4)
    assert idx.dtype == np.int32 and idx.shape == (120, 4)
    assert coef.dtype == np.float32 and coef.shape == (120, 4)
    idx2, coef2 = sparse.omp_codes(D, X, 4, gram=D.T @ D)  # a BLAS Gram: same to rounding
    np.testing.assert_array_equal(idx, idx2)
    np.testing.assert_allclose(coef, coef2, rtol=1e-5)
    codes = sparse.batch_omp(D, X, 4)
    dense = np.zeros((300, 120), np.float32)
    np.add.at(dense, (idx.ravel(), np.repeat(np.arange(120), 4)), coef.ravel())
    np.testing.assert_array_equal(dense, codes.toarray())
    rec = sparse.reconstruct(D, idx, coef)
    assert rec.dtype == np.float32 and rec.shape == X.shape
    np.testing.assert_allclose(rec, D @ codes.toarray(), rtol=1e-5, atol=1e-5)


def test_coding_is_positively_homogeneous():
    # Scaling by powers of two is exact in floating point, so the codes of
    # c * x must be exactly c times those of x (the design's homogeneity).
    D, X = _gaussian(30, 300, 200, seed=11, dtype=np.float32)
    base = sparse.batch_omp(D, X, 3)
    for c in (2.0**-30, 2.0**20):
        scaled = sparse.batch_omp(D, (X * np.float32(c)).astype(np.float32), 3)
        np.testing.assert_array_equal(scaled.indices, base.indices)
        np.testing.assert_array_equal(scaled.data, base.data * np.float32(c))


def test_blocks_and_threads_do_not_change_results(monkeypatch):
    D, X = _gaussian(30, 300, 3000, seed=12, dtype=np.float32)
    ref_idx, ref_coef = sparse.omp_codes(D, X, 3, n_threads=1)
    monkeypatch.setattr(sparse, "BLOCK_SIGNALS", 700)
    monkeypatch.setattr(sparse, "SUB_BLOCK", 100)
    for n_threads in (1, 2, 3):
        idx, coef = sparse.omp_codes(D, X, 3, n_threads=n_threads)
        np.testing.assert_array_equal(idx, ref_idx)
        np.testing.assert_array_equal(coef, ref_coef)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_codes_do_not_depend_on_the_batch(dtype):
    # A signal's code is the same bits wherever it sits in the batch (the
    # property that makes chunked magnification equal whole-image output).
    D, X = _gaussian(30, 500, 1200, seed=15, dtype=dtype)
    idx, coef = sparse.omp_codes(D, X, 3)
    for start, stop in [(1, 2), (37, 300), (255, 1200), (600, 857)]:
        part_idx, part_coef = sparse.omp_codes(D, X[:, start:stop], 3, n_threads=1)
        np.testing.assert_array_equal(part_idx, idx[start:stop])
        np.testing.assert_array_equal(part_coef, coef[start:stop])


def test_concurrent_callers_share_and_restore_the_blas_limit():
    # Callers on several threads (as dask workers are) get the same codes, and
    # the process-wide BLAS thread count is back to its setting afterwards.
    from concurrent.futures import ThreadPoolExecutor

    from threadpoolctl import threadpool_info

    before = [lib["num_threads"] for lib in threadpool_info() if lib["user_api"] == "blas"]
    D, X = _gaussian(30, 300, 2000, seed=14, dtype=np.float32)
    ref = sparse.omp_codes(D, X, 3)
    with ThreadPoolExecutor(4) as pool:
        outs = list(pool.map(lambda _: sparse.omp_codes(D, X, 3, n_threads=2), range(8)))
    for idx, coef in outs:
        np.testing.assert_array_equal(idx, ref[0])
        np.testing.assert_array_equal(coef, ref[1])
    after = [lib["num_threads"] for lib in threadpool_info() if lib["user_api"] == "blas"]
    assert after == before


def test_edited_dictionary_is_not_served_a_stale_gram():
    D, X = _gaussian(30, 300, 50, seed=16)
    first = sparse.batch_omp(D, X, 3).toarray()
    D[:, [0, 1]] = D[:, [1, 0]]  # edit in place: same shape and dtype, new Gram
    swapped = sparse.batch_omp(D, X, 3).toarray()
    np.testing.assert_array_equal(swapped[[1, 0]], first[:2])
    np.testing.assert_array_equal(swapped[2:], first[2:])


def _code_in_child(queue, D, X):
    queue.put(sparse.omp_codes(D, X, 3, n_threads=2)[0])


@pytest.mark.skipif(not hasattr(__import__("os"), "fork"), reason="needs fork")
def test_coding_works_in_a_forked_child():
    # The coding threads do not survive a fork; the child must get its own.
    import multiprocessing

    D, X = _gaussian(30, 300, 2000, seed=17, dtype=np.float32)
    ref = sparse.omp_codes(D, X, 3, n_threads=2)[0]  # the parent's pool exists now
    ctx = multiprocessing.get_context("fork")
    queue = ctx.Queue()
    proc = ctx.Process(target=_code_in_child, args=(queue, D, X))
    proc.start()
    out = queue.get(timeout=60)
    proc.join(timeout=60)
    assert proc.exitcode == 0
    np.testing.assert_array_equal(out, ref)


def test_non_contiguous_input():
    D, X = _gaussian(30, 300, 400, seed=13)
    ref = sparse.batch_omp(D, X[:, ::2], 3).toarray()
    Xf = np.asfortranarray(X)[:, ::2]
    np.testing.assert_array_equal(sparse.batch_omp(np.asfortranarray(D), Xf, 3).toarray(), ref)


# --------------------------------------------------------------------------
# parameter checks


@pytest.mark.parametrize(
    "kwargs, name",
    [
        ({"n_nonzero": 0}, "n_nonzero"),
        ({"n_nonzero": 31}, "n_nonzero"),  # more than n_features = 30
        ({"n_nonzero": 2.0}, "n_nonzero"),
        ({"n_nonzero": True}, "n_nonzero"),
        ({"tol": -1.0}, "tol"),
        ({"tol": float("nan")}, "tol"),
        ({"tol": "small"}, "tol"),
        ({"n_threads": 0}, "n_threads"),
    ],
)
def test_bad_omp_parameters(kwargs, name):
    D, X = _gaussian(30, 100, 5, seed=0)
    args = {"n_nonzero": 3, **kwargs}
    with pytest.raises(ParameterError, match=f"'{name}' parameter"):
        sparse.batch_omp(D, X, args.pop("n_nonzero"), **args)


def test_bad_omp_dictionary_and_signals():
    D, X = _gaussian(30, 100, 5, seed=0)
    with pytest.raises(ParameterError, match="'n_nonzero' parameter"):
        sparse.batch_omp(D[:, :2], X, 3)  # more than n_atoms = 2
    with pytest.raises(ParameterError, match="'D' parameter must have unit-norm columns"):
        sparse.batch_omp(D * 2.0, X, 3)
    bad = D.copy()
    bad[0, 0] = np.nan
    with pytest.raises(ParameterError, match="'D' parameter must hold finite"):
        sparse.batch_omp(bad, X, 3)
    with pytest.raises(ParameterError, match="'D' parameter must be a 2-D"):
        sparse.batch_omp(D[:, 0], X, 1)
    with pytest.raises(InputError, match="'X' parameter must have 30 rows"):
        sparse.batch_omp(D, X[:20], 3)
    with pytest.raises(InputError, match="'X' parameter must be a 2-D"):
        sparse.batch_omp(D, X[:, 0], 3)
    Xn = X.copy()
    Xn[3, 4] = np.inf
    with pytest.raises(InputError, match="finite values.*signal 4"):
        sparse.batch_omp(D, Xn, 3)
    with pytest.raises(ParameterError, match="'gram' parameter must have shape"):
        sparse.omp_codes(D, X, 3, gram=np.eye(5))
    with pytest.raises(ParameterError, match="'indices' parameter"):
        sparse.reconstruct(D, np.full((5, 3), 100), np.zeros((5, 3)))


# --------------------------------------------------------------------------
# K-SVD


def _aharon_experiment(seed, snr_db=20.0):
    """The synthetic test of Aharon, Elad & Bruckstein, "K-SVD: An algorithm for
    designing overcomplete dictionaries for sparse representation", IEEE TSP
    54(11), 2006, section V-A (setting from memory): a random 20 x 50
    dictionary with unit columns, 1500 signals each a combination of 3
    distinct atoms with i.i.d. uniform coefficients at random positions, white
    Gaussian noise at the given SNR."""
    rng = np.random.default_rng(seed)
    D0 = _unit(rng.standard_normal((20, 50)))
    X = np.empty((20, 1500))
    for s in range(X.shape[1]):
        X[:, s] = D0[:, rng.choice(50, 3, replace=False)] @ rng.uniform(-1, 1, 3)
    sigma = np.sqrt(np.mean(X**2) / 10 ** (snr_db / 10))
    X += sigma * rng.standard_normal(X.shape)
    return D0, X


def _recovery_rate(D0, D):
    # Their criterion: a true atom is recovered when 1 - |<d_true, d_learned>| < 0.01
    # for some learned atom (Aharon et al. 2006, from memory).
    return float(np.mean(1 - np.abs(D0.T @ D).max(axis=1) < 0.01))


def test_ksvd_recovers_planted_dictionary():
    rates = []
    for seed in (0, 1, 2):
        D0, X = _aharon_experiment(seed)
        D, info = sparse.ksvd(X, 50, 3, 80, random_state=seed)  # 80 iterations as in the paper (from memory)
        rates.append(_recovery_rate(D0, D))
        assert info["n_iter"] == 80 and len(info["rms"]) == 80
        assert info["rms"][-1] < info["rms"][0]
    print("K-SVD planted-dictionary recovery at 20 dB:", rates)
    # The paper reports about 90 % of atoms recovered at 20 dB (from memory);
    # chance, for random unit vectors in 20-D, is practically 0.
    assert min(rates) >= 0.8


def test_ksvd_seeded_runs_repeat():
    D0, X = _aharon_experiment(5)
    a, info_a = sparse.ksvd(X, 50, 3, 10, random_state=42)
    b, info_b = sparse.ksvd(X, 50, 3, 10, random_state=42)
    np.testing.assert_array_equal(a, b)
    assert info_a == info_b
    c, _ = sparse.ksvd(X, 50, 3, 10, random_state=43)
    assert not np.array_equal(a, c)
    g1, _ = sparse.ksvd(X, 50, 3, 3, random_state=np.random.default_rng(7))
    g2, _ = sparse.ksvd(X, 50, 3, 3, random_state=np.random.default_rng(7))
    np.testing.assert_array_equal(g1, g2)
    r1, _ = sparse.ksvd(X, 50, 3, 3, random_state=np.random.RandomState(7))
    r2, _ = sparse.ksvd(X, 50, 3, 3, random_state=np.random.RandomState(7))
    np.testing.assert_array_equal(r1, r2)


def test_ksvd_dtype_norms_and_zero_signals():
    _, X = _aharon_experiment(6)
    X[:, :100] = 0.0  # zero signals are ignored, never NaN
    D, info = sparse.ksvd(X.astype(np.float32), 50, 3, 5, random_state=0)
    assert D.dtype == np.float32 and D.shape == (20, 50)
    assert np.all(np.isfinite(D))
    np.testing.assert_allclose(np.linalg.norm(D, axis=0), 1.0, rtol=1e-5)
    D64, _ = sparse.ksvd(X, 50, 3, 0, random_state=0)  # n_iter = 0: the initial dictionary
    assert D64.dtype == np.float64
    # initial atoms are distinct normalised training signals
    Xn = X[:, 100:] / np.linalg.norm(X[:, 100:], axis=0)
    match = np.abs(Xn.T @ D64).max(axis=0)
    np.testing.assert_allclose(match, 1.0, rtol=1e-12)
    G = np.abs(D64.T @ D64) - np.eye(50)
    assert G.max() < 1 - 1e-9


def test_ksvd_replaces_duplicate_and_unused_atoms():
    D0, X = _aharon_experiment(7)
    init = D0.copy()
    init[:, 10:15] = init[:, [0]]  # five copies of atom 0
    D, info = sparse.ksvd(X, 50, 3, 3, init=init, random_state=0)
    # copies get no signal (OMP never picks an equal atom twice) or are near-duplicates
    assert info["n_replaced"][0] >= 5
    assert info["n_replaced"][0] == info["n_unused"][0] + info["n_coherent"][0]
    G = np.abs(D.T @ D) - np.eye(50)
    assert G.max() <= sparse.COHERENCE_LIMIT + 1e-6


def test_ksvd_callback_can_stop():
    _, X = _aharon_experiment(8)
    seen = []

    def cb(iteration, D, info):
        seen.append((iteration, D.shape, len(info["rms"])))
        return iteration == 2

    D, info = sparse.ksvd(X, 50, 3, 10, random_state=0, callback=cb)
    assert seen == [(1, (20, 50), 1), (2, (20, 50), 2)]
    assert info["n_iter"] == 2


def test_ksvd_too_few_signals():
    rng = np.random.default_rng(0)
    with pytest.raises(InputError, match=r"n_atoms = 50 non-zero signals, got 40"):
        sparse.ksvd(rng.standard_normal((20, 40)), 50, 3, 5)
    X = np.repeat(rng.standard_normal((20, 10)), 10, axis=1)  # 100 signals, 10 distinct
    with pytest.raises(InputError, match="distinct"):
        sparse.ksvd(X, 50, 3, 5, random_state=0)


@pytest.mark.parametrize(
    "kwargs, name",
    [
        ({"n_atoms": 0}, "n_atoms"),
        ({"n_atoms": 2.5}, "n_atoms"),
        ({"n_nonzero": 0}, "n_nonzero"),
        ({"n_nonzero": 21}, "n_nonzero"),  # more than n_features = 20
        ({"n_iter": -1}, "n_iter"),
        ({"random_state": "seed"}, "random_state"),
        ({"random_state": -3}, "random_state"),
        ({"callback": 5}, "callback"),
        ({"init": np.ones((20, 7))}, "init"),
        ({"init": np.zeros((20, 50))}, "init"),
    ],
)
def test_bad_ksvd_parameters(kwargs, name):
    _, X = _aharon_experiment(0)
    args = {"n_atoms": 50, "n_nonzero": 3, "n_iter": 2, **kwargs}
    with pytest.raises(ParameterError, match=f"'{name}' parameter"):
        sparse.ksvd(X, args.pop("n_atoms"), args.pop("n_nonzero"), args.pop("n_iter"), **args)


def test_ksvd_rejects_bad_signals():
    _, X = _aharon_experiment(0)
    X[0, 0] = np.nan
    with pytest.raises(InputError, match="'X' parameter must hold finite"):
        sparse.ksvd(X, 50, 3, 2)
    with pytest.raises(InputError, match="'X' parameter must be a 2-D"):
        sparse.ksvd(X[0], 50, 3, 2)


def test_ksvd_estimator():
    D0, X = _aharon_experiment(1)
    est = sparse.KSVD(n_atoms=50, n_nonzero=3, n_iter=5, random_state=0)
    with pytest.raises(NotFittedError):
        est.transform(X)
    assert est.fit(X) is est
    D, _ = sparse.ksvd(X, 50, 3, 5, random_state=0)
    np.testing.assert_array_equal(est.components_, D)
    assert est.info_["n_iter"] == 5
    codes = est.transform(X[:, :10])
    assert codes.shape == (50, 10) and np.all(np.diff(codes.indptr) == 3)
