"""Sparse coding: batch orthogonal matching pursuit and K-SVD.

Layout
------
Signals are *columns*: a dictionary ``D`` is ``(n_features, n_atoms)`` with
unit-norm columns and a set of signals ``X`` is ``(n_features, n_signals)``.
Sparse codes come either as a :class:`scipy.sparse.csc_matrix` of shape
``(n_atoms, n_signals)`` (:func:`batch_omp`) or in the compact form
``(indices, coefs)``, two ``(n_signals, n_nonzero)`` arrays (:func:`omp_codes`),
which :func:`reconstruct` turns back into signals.

Batch OMP
---------
Orthogonal matching pursuit in the Gram form of Rubinstein, Zibulevsky &
Elad (2008, "Efficient implementation of the K-SVD algorithm using Batch
Orthogonal Matching Pursuit"): with ``G = D^T D`` and ``alpha0 = D^T x``,
step ``k`` picks the atom of largest ``|alpha|``, ``alpha = alpha0 - G_I gamma``
being the correlations of the current residual, grows the Cholesky factor of
``G_II`` by one row and solves for ``gamma``. No residual vector is ever
formed. ``alpha0`` comes from one BLAS product per sub-block of 256
signals; the selection loop runs in a compiled (numba) kernel, one signal
after the other, and blocks of signals run on a few threads (the kernel
releases the GIL, BLAS is held to one thread meanwhile).

Codes do not depend on the batch. A BLAS product rounds a row differently
depending on where it sits in the matrix, so its correlations only
*screen*: the atoms whose screened ``|alpha|`` lies within a rounding bound
of the maximum are re-evaluated with a dot product in one fixed order, and
only those values choose the atom, decide the stops and enter the
coefficients; the Gram matrix is computed in a fixed order too. The code of
a signal is therefore the same bits whatever the chunk, block, thread count
or BLAS threading that coded it (chunked magnification equals whole-image
magnification exactly, not just to rounding).

Selections and coefficients are those of scikit-learn's
``orthogonal_mp_gram`` (same argmax of ``|alpha|``, same stopping when an
atom is selected twice or is linearly dependent on the chosen ones), with
one deliberate difference: the "correlation too small" stop,
``max|alpha|**2 <= eps``, is taken relative to the signal energy
(``<= eps * ||x||**2``), so that the coding of ``c * x`` is ``c`` times the
coding of ``x`` for every ``c > 0``, whatever the units of the raster. For
signals of unit energy both rules are the same.

K-SVD
-----
Approximate K-SVD of the same report: each iteration codes all signals with
batch OMP, then updates the atoms one by one in a random order; atom ``j`` is
replaced by the normalised ``E_j g`` (one power iteration of the rank-one
approximation of the residual ``E_j`` of the signals that use it, without
atom ``j``) and its coefficients by ``E_j^T d``. Atoms used by no signal and
atoms nearly equal to another (``|<d_i, d_j>| > 0.99``) are then replaced by
the worst-represented training signals, normalised.

Working dtype: float32 when every input array is float32, float64 otherwise.
"""

from __future__ import annotations

import contextlib
import functools
import hashlib
import os
import threading
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from numbers import Real
from typing import Any

import numba
import numpy as np
import scipy.sparse
from llvmlite import ir as llvm_ir
from numba import types
from numba.extending import intrinsic
from numpy.typing import ArrayLike
from threadpoolctl import ThreadpoolController

from .._validation import check_int, check_random_state, cpu_count, working_dtype
from ..errors import InputError, NotFittedError, ParameterError

__all__ = ["batch_omp", "omp_codes", "reconstruct", "ksvd", "KSVD"]

#: Signals coded per block (bounds the temporary copies; blocks are the unit
#: of work handed to the threads).
BLOCK_SIGNALS = 16384

#: Two atoms whose absolute inner product exceeds this are near-duplicates;
#: K-SVD replaces one of them (Rubinstein et al. 2008 use 0.99, from memory).
COHERENCE_LIMIT = 0.99

#: Callers inside :func:`one_blas_thread` and the limit they share (the BLAS
#: thread count is process-wide, so is this state).
_BLAS_LOCK = threading.Lock()
_BLAS_STATE: dict = {"users": 0, "limiter": None}


@functools.cache
def _blas_controller() -> ThreadpoolController:
    """The process's BLAS controller, created on first use (it scans the loaded libraries)."""
    return ThreadpoolController()


@contextlib.contextmanager
def one_blas_thread() -> Iterator[None]:
    """BLAS limited to one thread while any caller is inside (thread-safe).

    The limit is process-wide; callers on several threads (dask workers)
    share one limit, set by the first to enter and lifted by the last to
    leave, so the original setting is always restored.
    """
    with _BLAS_LOCK:
        if _BLAS_STATE["users"] == 0:
            _BLAS_STATE["limiter"] = _blas_controller().limit(limits=1, user_api="blas")
        _BLAS_STATE["users"] += 1
    try:
        yield
    finally:
        with _BLAS_LOCK:
            _BLAS_STATE["users"] -= 1
            if _BLAS_STATE["users"] == 0:
                _BLAS_STATE["limiter"].restore_original_limits()
                _BLAS_STATE["limiter"] = None


#: Tolerance on the column norms of a dictionary given to OMP (a sanity
#: check against unnormalised dictionaries; float32 normalisation is ~1e-7).
UNIT_NORM_TOL = 1e-4


# --------------------------------------------------------------------------
# validation helpers


def _as_real_array(value, name, error=ParameterError) -> np.ndarray:
    try:
        arr = np.asarray(value)
    except Exception as exc:  # noqa: BLE001 - anything unconvertible
        raise error(f"The {name!r} parameter must be a numeric array, got {type(value).__name__}") from exc
    if arr.dtype == object or not (
        np.issubdtype(arr.dtype, np.floating) or np.issubdtype(arr.dtype, np.integer)
    ) or arr.dtype == np.bool_:
        raise error(f"The {name!r} parameter must be a real numeric array, got dtype {arr.dtype}")
    return arr


def _check_2d(arr, name, error=ParameterError) -> np.ndarray:
    if arr.ndim != 2:
        raise error(f"The {name!r} parameter must be a 2-D array, got shape {arr.shape}")
    return arr


def _check_n_nonzero(n_nonzero, n_features, n_atoms):
    return check_int(
        n_nonzero,
        "n_nonzero",
        1,
        min(n_features, n_atoms),
        what=f"at most n_features = {n_features} and n_atoms = {n_atoms}",
    )


def _check_tol(tol):
    if tol is None:
        return None
    if isinstance(tol, (bool, np.bool_)) or not isinstance(tol, Real) or not np.isfinite(tol) or tol < 0:
        raise ParameterError(f"The 'tol' parameter must be None or a finite number >= 0, got {tol!r}")
    return float(tol)


def _check_n_threads(n_threads):
    return cpu_count() if n_threads is None else check_int(n_threads, "n_threads", 1)


def _check_dictionary(D, name="D") -> np.ndarray:
    D = _check_2d(_as_real_array(D, name), name)
    if D.shape[0] < 1 or D.shape[1] < 1:
        raise ParameterError(f"The {name!r} parameter must have at least one row and one column, got shape {D.shape}")
    if not np.isfinite(D).all():
        raise ParameterError(f"The {name!r} parameter must hold finite values, got NaN or infinity")
    return D


def _check_unit_columns(D, name="D"):
    norms = np.sqrt(np.einsum("ij,ij->j", D, D, dtype=np.float64))
    rtol = UNIT_NORM_TOL
    if norms.size and np.max(np.abs(norms - 1.0)) > rtol:
        raise ParameterError(
            f"The {name!r} parameter must have unit-norm columns (to {rtol:g}), "
            f"got column norms in [{norms.min():.6g}, {norms.max():.6g}]"
        )


def _check_signals(X, n_features, name="X") -> np.ndarray:
    X = _as_real_array(X, name, InputError)
    if X.ndim != 2:
        raise InputError(f"The {name!r} parameter must be a 2-D array (n_features, n_signals), got shape {X.shape}")
    if X.shape[0] != n_features:
        raise InputError(
            f"The {name!r} parameter must have {n_features} rows (one per dictionary row), "
            f"got shape {X.shape}"
        )
    return X


def _check_gram(gram, n_atoms, dtype):
    gram = _check_2d(_as_real_array(gram, "gram"), "gram")
    if gram.shape != (n_atoms, n_atoms):
        raise ParameterError(
            f"The 'gram' parameter must have shape ({n_atoms}, {n_atoms}) = D.T @ D, got {gram.shape}"
        )
    return np.ascontiguousarray(gram, dtype=dtype)


# --------------------------------------------------------------------------
# the OMP kernel


@intrinsic
def _maxnum(typingctx, a, b):
    """``max(a, b)`` as LLVM's ``maxnum`` (the loop vectoriser turns it into ``vmaxps``)."""
    if not (isinstance(a, types.Float) and a == b):
        return None

    def codegen(context, builder, signature, args):
        ty = args[0].type
        name = "llvm.maxnum.f32" if signature.args[0] == types.float32 else "llvm.maxnum.f64"
        fn = builder.module.globals.get(name)
        if fn is None:
            fn = llvm_ir.Function(builder.module, llvm_ir.FunctionType(ty, [ty, ty]), name=name)
        return builder.call(fn, args)

    return a(a, b), codegen


@numba.njit(nogil=True, cache=True, fastmath=True)
def _max_abs(v, zero, n):  # pragma: no cover - compiled
    """``max |v|`` (vectorised)."""
    m = zero
    for a in range(n):
        m = _maxnum(m, abs(v[a]))
    return m


@numba.njit(nogil=True, cache=True, fastmath=True)
def _screen(v, thr, n):  # pragma: no cover - compiled
    """First index with ``|v[a]| >= thr``, ``n`` if none (vectorised)."""
    first = n
    for a in range(n):
        c = a if abs(v[a]) >= thr else n
        first = c if c < first else first
    return first


@numba.njit(nogil=True, cache=True, fastmath=True)
def _dot(Dt, a, x, n_features):  # pragma: no cover - compiled
    """``<d_a, x>`` in one fixed order: the same bits wherever ``x`` sits in a batch."""
    acc = x[0] - x[0]
    for f in range(n_features):
        acc += Dt[a, f] * x[f]
    return acc


@numba.njit(nogil=True, cache=True, fastmath=True)
def _gram(Dt):  # pragma: no cover - compiled
    """``D^T D`` in a fixed order (independent of BLAS threading), symmetric."""
    n_atoms, n_features = Dt.shape
    G = np.empty((n_atoms, n_atoms), dtype=Dt.dtype)
    for i in range(n_atoms):
        for j in range(i, n_atoms):
            acc = Dt[0, 0] - Dt[0, 0]
            for f in range(n_features):
                acc += Dt[i, f] * Dt[j, f]
            G[i, j] = acc
            G[j, i] = acc
    return G


@numba.njit(nogil=True, cache=True, fastmath=True)
def _omp_kernel(A, Xt, Dt, G, n_index, n_nonzero, tol, use_tol, eps, err_scale, idx_out, coef_out, cnt_out):  # pragma: no cover - compiled
    """OMP of the signals ``Xt`` (rows) given their correlations ``A ~ Xt @ D``.

    ``A`` comes from a BLAS product whose rounding depends on where a signal
    sits in the batch. It only screens: an atom can be the arg-max only if its
    screened ``|alpha|`` is within ``2 E`` of the screened maximum, ``E``
    bounding the rounding of either computation (``(F + 2k + 4) eps
    (||x|| + sum |gamma|)``, standard dot-product error bounds for unit
    atoms). The candidates' correlations are recomputed in one fixed order
    (:func:`_dot`), and the choice, the stopping tests and the coefficients
    use only those: every signal's code depends on that signal alone, not on
    the batch, block or thread that coded it.
    """
    n_sig = A.shape[0]
    n_atoms = n_index
    n_features = Xt.shape[1]
    L = n_nonzero
    zero = eps - eps  # a zero of the working dtype
    alpha = np.empty(n_atoms, dtype=A.dtype)
    chol = np.zeros((L, L), dtype=A.dtype)
    sel = np.zeros(L, dtype=np.int64)
    gamma = np.zeros(L, dtype=A.dtype)
    a0sel = np.zeros(L, dtype=A.dtype)  # exact-order <d_j, x> of the chosen atoms
    rhs = np.zeros(L, dtype=A.dtype)
    w = np.zeros(L, dtype=A.dtype)
    for s in range(n_sig):
        x = Xt[s]
        alpha0 = A[s]
        nrm2 = zero
        for f in range(n_features):
            nrm2 += x[f] * x[f]
        stop2 = eps * nrm2  # "correlation too small": max |alpha|^2 <= eps ||x||^2
        xnorm = np.sqrt(nrm2)
        k = 0
        energy = zero  # ||D_I gamma||^2
        gsum = zero  # sum |gamma|
        while k < L:
            if nrm2 == zero:
                break
            if use_tol and nrm2 - energy <= tol:
                break
            if k == 0:
                cur = alpha0
                mb = _max_abs(alpha0, zero, n_atoms)
            else:
                # screened correlations of the residual, alpha0 - G[I] gamma
                mb = zero
                if k == 1:
                    g0 = gamma[0]
                    r0 = sel[0]
                    for a in range(n_atoms):
                        v = alpha0[a] - G[r0, a] * g0
                        alpha[a] = v
                        mb = _maxnum(mb, abs(v))
                elif k == 2:
                    g0 = gamma[0]
                    r0 = sel[0]
                    g1 = gamma[1]
                    r1 = sel[1]
                    for a in range(n_atoms):
                        v = alpha0[a] - G[r0, a] * g0 - G[r1, a] * g1
                        alpha[a] = v
                        mb = _maxnum(mb, abs(v))
                else:
                    for a in range(n_atoms):
                        alpha[a] = alpha0[a]
                    for j in range(k - 1):
                        gj = gamma[j]
                        rj = sel[j]
                        for a in range(n_atoms):
                            alpha[a] -= G[rj, a] * gj
                    gj = gamma[k - 1]
                    rj = sel[k - 1]
                    for a in range(n_atoms):
                        v = alpha[a] - G[rj, a] * gj
                        alpha[a] = v
                        mb = _maxnum(mb, abs(v))
                cur = alpha
            err = err_scale[k] * (xnorm + gsum)
            if (mb + err) * (mb + err) <= stop2:
                break  # every exact-order |alpha| is below the stop as well
            thr = mb - (err + err)
            first = _screen(cur, thr, n_atoms)
            lam = first
            a0lam = _dot(Dt, first, x, n_features)
            v = a0lam
            for j in range(k):
                v -= G[sel[j], first] * gamma[j]
            best = abs(v)
            keep = cur[first]
            cur[first] = zero  # (cur is scratch) look for a second candidate
            second = _screen(cur, thr, n_atoms)
            cur[first] = keep
            if second < n_atoms:
                # rare: several atoms within the rounding margin of the maximum
                for a in range(second, n_atoms):
                    if abs(cur[a]) >= thr:
                        d0 = _dot(Dt, a, x, n_features)
                        v = d0
                        for j in range(k):
                            v -= G[sel[j], a] * gamma[j]
                        v = abs(v)
                        if v > best:
                            best = v
                            lam = a
                            a0lam = d0
            if best * best <= stop2:
                break  # residual (numerically) orthogonal to every atom
            dup = False
            for j in range(k):
                if sel[j] == lam:
                    dup = True
            if dup:
                break
            if k > 0:
                v = zero
                for i in range(k):
                    acc = G[lam, sel[i]]
                    for j in range(i):
                        acc -= chol[i, j] * w[j]
                    w[i] = acc / chol[i, i]
                    v += w[i] * w[i]
                lkk = G[lam, lam] - v
                if lkk <= eps:
                    break  # the atom depends linearly on the chosen ones
                for i in range(k):
                    chol[k, i] = w[i]
                chol[k, k] = np.sqrt(lkk)
            else:
                chol[0, 0] = np.sqrt(G[lam, lam])
            sel[k] = lam
            a0sel[k] = a0lam
            k += 1
            # gamma = (L L^T)^-1 alpha0[I]
            for i in range(k):
                acc = a0sel[i]
                for j in range(i):
                    acc -= chol[i, j] * rhs[j]
                rhs[i] = acc / chol[i, i]
            gsum = zero
            for i in range(k - 1, -1, -1):
                acc = rhs[i]
                for j in range(i + 1, k):
                    acc -= chol[j, i] * gamma[j]
                gamma[i] = acc / chol[i, i]
                gsum += abs(gamma[i])
            if use_tol:
                energy = zero
                for i in range(k):
                    acc = zero
                    for j in range(k):
                        acc += G[sel[i], sel[j]] * gamma[j]
                    energy += gamma[i] * acc
        cnt_out[s] = k
        for i in range(k):
            idx_out[s, i] = sel[i]
            coef_out[s, i] = gamma[i]
        for i in range(k, L):
            idx_out[s, i] = 0
            coef_out[s, i] = zero


#: Signals per correlation product: the ``(sub_block, n_atoms)`` block of
#: correlations stays in the second-level cache while the kernel reads it.
SUB_BLOCK = 256


#: The coding threads, started on first use and kept: measured, a new pool per
#: call costs ~150 ms against ~14 ms reused (8 threads, first BLAS use per thread).
_POOL: dict = {"pool": None, "size": 0, "pid": None}
_POOL_LOCK = threading.Lock()


def _worker_pool(n_threads):
    """A persistent pool of at least ``n_threads`` threads (new after a fork).

    Reusing threads spares the per-thread start-up of BLAS buffers on every
    call; callers on several threads share it, which also bounds the total
    number of coding threads.
    """
    with _POOL_LOCK:
        if _POOL["pool"] is None or _POOL["pid"] != os.getpid() or _POOL["size"] < n_threads:
            old = _POOL["pool"] if _POOL["pid"] == os.getpid() else None
            _POOL.update(
                pool=ThreadPoolExecutor(max_workers=n_threads, thread_name_prefix="geosr-omp"),
                size=n_threads,
                pid=os.getpid(),
            )
            if old is not None:
                old.shutdown(wait=False)
        return _POOL["pool"]


def _omp_run(D, X, n_nonzero, tol, G, n_threads, block=BLOCK_SIGNALS):
    """Code the columns of ``X``; D and G already validated, in the working dtype.

    Returns ``(indices, coefs, counts)``; ``counts[s]`` atoms are used by signal s.
    """
    dtype = D.dtype
    n_sig = X.shape[1]
    idx = np.zeros((n_sig, n_nonzero), dtype=np.int32)
    coef = np.zeros((n_sig, n_nonzero), dtype=dtype)
    cnt = np.zeros(n_sig, dtype=np.int32)
    if n_sig == 0:
        return idx, coef, cnt
    eps = dtype.type(np.finfo(dtype).eps)
    use_tol = tol is not None
    tol_v = dtype.type(tol if use_tol else 0.0)
    n_index = (np.int32 if dtype == np.float32 else np.int64)(D.shape[1])
    n_features = D.shape[0]
    err_scale = ((n_features + 2 * np.arange(n_nonzero) + 4) * np.finfo(dtype).eps).astype(dtype)
    D = np.ascontiguousarray(D)
    Dt = np.ascontiguousarray(D.T)
    G = np.ascontiguousarray(G)

    # Blocks small enough that every thread gets several of them.
    per_thread = -(-n_sig // n_threads)
    block = max(SUB_BLOCK, min(block, per_thread))
    starts = list(range(0, n_sig, block))

    def work(s0):
        s1 = min(s0 + block, n_sig)
        xt = np.ascontiguousarray(X[:, s0:s1].T, dtype=dtype)
        finite = np.isfinite(xt)
        if not finite.all():
            bad = s0 + int(np.flatnonzero(~finite.all(axis=1))[0])
            raise InputError(f"The 'X' parameter must hold finite values, got NaN or infinity in signal {bad}")
        a = np.empty((min(SUB_BLOCK, s1 - s0), D.shape[1]), dtype=dtype)
        for b0 in range(0, s1 - s0, SUB_BLOCK):
            b1 = min(b0 + SUB_BLOCK, s1 - s0)
            ab = a[: b1 - b0]
            np.matmul(xt[b0:b1], D, out=ab)
            _omp_kernel(
                ab, xt[b0:b1], Dt, G, n_index, n_nonzero, tol_v, use_tol, eps, err_scale,
                idx[s0 + b0 : s0 + b1], coef[s0 + b0 : s0 + b1], cnt[s0 + b0 : s0 + b1],
            )

    # Parallelism comes from the blocks; each small product runs on one BLAS
    # thread (BLAS threading costs more than it brings on these sizes).
    limit = one_blas_thread() if n_sig > SUB_BLOCK else contextlib.nullcontext()
    with limit:
        if n_threads == 1 or len(starts) == 1:
            for s0 in starts:
                work(s0)
        else:
            pool = _worker_pool(n_threads)
            futures = [pool.submit(work, s0) for s0 in starts]
            try:
                for fut in futures:
                    fut.result()
            finally:
                for fut in futures:
                    fut.cancel()
    return idx, coef, cnt


#: Gram matrices of the last few dictionaries, filled on first use: measured,
#: ``D^T D`` of 1024 atoms takes ~25 ms against ~0.9 ms for a hit, once per strip.
_GRAM_CACHE: dict = {}
_GRAM_CACHE_SIZE = 4
_GRAM_LOCK = threading.Lock()


def _cached_gram(D):
    """``D^T D`` of a C-contiguous dictionary, remembered for the last few dictionaries.

    Models code chunk after chunk over the same dictionary; the key is a
    digest of the bytes, so an edited array is never served a stale Gram.
    """
    key = (D.shape, D.dtype.str, hashlib.blake2b(D.tobytes(), digest_size=16).digest())
    with _GRAM_LOCK:
        G = _GRAM_CACHE.get(key)
    if G is None:
        G = _gram(np.ascontiguousarray(D.T))
        with _GRAM_LOCK:
            while len(_GRAM_CACHE) >= _GRAM_CACHE_SIZE:
                _GRAM_CACHE.pop(next(iter(_GRAM_CACHE)))
            _GRAM_CACHE[key] = G
    return G


def _prepare(D, X, n_nonzero, tol, gram, n_threads) -> tuple[np.ndarray, np.ndarray, int, float | None, np.ndarray, int]:
    D = _check_dictionary(D)
    n_features, n_atoms = D.shape
    X = _check_signals(X, n_features)
    dtype = working_dtype(D, X)
    D = np.ascontiguousarray(D, dtype=dtype)
    _check_unit_columns(D)
    n_nonzero = _check_n_nonzero(n_nonzero, n_features, n_atoms)
    tol = _check_tol(tol)
    n_threads = _check_n_threads(n_threads)
    G = _cached_gram(D) if gram is None else _check_gram(gram, n_atoms, dtype)
    return D, X, n_nonzero, tol, G, n_threads


def omp_codes(D: ArrayLike, X: ArrayLike, n_nonzero: int, *, tol: float | None = None,
              gram: ArrayLike | None = None, n_threads: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Sparse codes of the columns of ``X`` over ``D`` in compact form.

    Parameters
    ----------
    D : ndarray, shape (n_features, n_atoms)
        Dictionary with unit-norm columns (to :data:`UNIT_NORM_TOL`).
    X : ndarray, shape (n_features, n_signals)
        Signals as columns, finite.
    n_nonzero : int
        Atoms per signal at most, ``1 <= n_nonzero <= min(n_features, n_atoms)``.
    tol : float, optional
        Stop coding a signal once its squared residual norm is ``<= tol``
        (checked before each selection, so a signal with ``||x||**2 <= tol``
        gets no atom). ``n_nonzero`` still caps the count.
    gram : ndarray, shape (n_atoms, n_atoms), optional
        ``D.T @ D`` if already computed (saves its cost on repeated calls).
    n_threads : int, optional
        Threads coding blocks of signals; default all cores of the process.

    Returns
    -------
    indices : ndarray of int32, shape (n_signals, n_nonzero)
        Atoms of each signal in the order OMP selected them.
    coefs : ndarray, shape (n_signals, n_nonzero)
        Their coefficients, in the working dtype (float32 when ``D`` and ``X``
        are float32, float64 otherwise). Slots a signal does not use (a zero
        signal, a residual that reached zero or ``tol``) hold index 0 and
        coefficient 0, so ``sum_t D[:, indices[:, t]] * coefs[:, t]`` is the
        approximation (see :func:`reconstruct`).

    Raises
    ------
    ParameterError
        Bad ``D``, ``n_nonzero``, ``tol``, ``gram`` or ``n_threads``.
    InputError
        ``X`` of the wrong shape or with non-finite values.
    """
    D, X, n_nonzero, tol, G, n_threads = _prepare(D, X, n_nonzero, tol, gram, n_threads)
    idx, coef, _ = _omp_run(D, X, n_nonzero, tol, G, n_threads)
    return idx, coef


def _codes_to_csc(idx, coef, cnt, n_atoms):
    n_sig, L = idx.shape
    used = np.arange(L)[None, :] < cnt[:, None]
    rows = np.where(used, idx, n_atoms)  # unused slots sort last
    order = np.argsort(rows, axis=1, kind="stable")
    rows = np.take_along_axis(rows, order, axis=1)
    vals = np.take_along_axis(coef, order, axis=1)
    keep = np.take_along_axis(used, order, axis=1)
    indptr = np.zeros(n_sig + 1, dtype=np.int64)
    np.cumsum(cnt, out=indptr[1:])
    index_dtype = np.int32 if max(n_atoms, int(indptr[-1])) < 2**31 - 1 else np.int64
    out = scipy.sparse.csc_matrix(
        (vals[keep], rows[keep].astype(index_dtype), indptr.astype(index_dtype)),
        shape=(n_atoms, n_sig),
    )
    out.has_sorted_indices = True
    return out


def batch_omp(D: ArrayLike, X: ArrayLike, n_nonzero: int, *, tol: float | None = None,
              n_threads: int | None = None) -> scipy.sparse.csc_matrix:
    """Orthogonal matching pursuit of many signals over one dictionary.

    Parameters
    ----------
    D : ndarray, shape (n_features, n_atoms)
        Dictionary with unit-norm columns.
    X : ndarray, shape (n_features, n_signals)
        Signals as columns, finite.
    n_nonzero : int
        Atoms per signal at most, ``1 <= n_nonzero <= min(n_features, n_atoms)``.
    tol : float, optional
        Squared residual norm at which a signal stops taking atoms
        (see :func:`omp_codes`).
    n_threads : int, optional
        Threads coding blocks of signals; default all cores of the process.

    Returns
    -------
    scipy.sparse.csc_matrix, shape (n_atoms, n_signals)
        Column ``s`` holds the coefficients of signal ``s`` (sorted row
        indices; a zero signal gives an empty column). dtype float32 when
        ``D`` and ``X`` are float32, float64 otherwise. Same selections and
        coefficients as ``sklearn.linear_model.orthogonal_mp_gram(D.T @ D,
        D.T @ X, n_nonzero_coefs=n_nonzero)``.

    Raises
    ------
    ParameterError, InputError
        As :func:`omp_codes`.
    """
    D, X, n_nonzero, tol, G, n_threads = _prepare(D, X, n_nonzero, tol, None, n_threads)
    idx, coef, cnt = _omp_run(D, X, n_nonzero, tol, G, n_threads)
    return _codes_to_csc(idx, coef, cnt, D.shape[1])


def reconstruct(D: ArrayLike, indices: ArrayLike, coefs: ArrayLike) -> np.ndarray:
    """Signals from compact codes: ``sum_t D[:, indices[:, t]] * coefs[:, t]``.

    Parameters
    ----------
    D : ndarray, shape (n_features, n_atoms)
        Any dictionary (for example the high-res one of a coupled pair).
    indices : ndarray of int, shape (n_signals, n_nonzero)
    coefs : ndarray, shape (n_signals, n_nonzero)
        As returned by :func:`omp_codes`.

    Returns
    -------
    ndarray, shape (n_features, n_signals)
        float32 when ``D`` and ``coefs`` are float32, float64 otherwise.
    """
    D = _check_dictionary(D)
    indices = np.asarray(indices)
    coefs = _as_real_array(coefs, "coefs")
    if indices.ndim != 2 or not np.issubdtype(indices.dtype, np.integer):
        raise ParameterError(f"The 'indices' parameter must be a 2-D integer array, got shape {indices.shape} and dtype {indices.dtype}")
    if coefs.shape != indices.shape:
        raise ParameterError(f"The 'coefs' parameter must have the shape of 'indices' {indices.shape}, got {coefs.shape}")
    if indices.size and (indices.min() < 0 or indices.max() >= D.shape[1]):
        raise ParameterError(f"The 'indices' parameter must hold atom numbers in 0..{D.shape[1] - 1}, got values outside")
    dtype = working_dtype(D, coefs)
    D = np.asarray(D, dtype=dtype)
    n_sig, L = indices.shape
    out = np.zeros((D.shape[0], n_sig), dtype=dtype)
    for s0 in range(0, n_sig, BLOCK_SIGNALS):
        s1 = min(s0 + BLOCK_SIGNALS, n_sig)
        acc = out[:, s0:s1]
        for t in range(L):
            acc += D[:, indices[s0:s1, t]] * coefs[s0:s1, t].astype(dtype, copy=False)
    return out


# --------------------------------------------------------------------------
# K-SVD


@numba.njit(nogil=True, cache=True)
def _group_by_atom(idx, cnt, n_atoms):  # pragma: no cover - compiled
    """CSR lists of (signal, slot) pairs per atom."""
    n_sig = idx.shape[0]
    ptr = np.zeros(n_atoms + 1, dtype=np.int64)
    for s in range(n_sig):
        for t in range(cnt[s]):
            ptr[idx[s, t] + 1] += 1
    for a in range(n_atoms):
        ptr[a + 1] += ptr[a]
    fill = ptr[:-1].copy()
    sig = np.empty(ptr[-1], dtype=np.int64)
    slot = np.empty(ptr[-1], dtype=np.int64)
    for s in range(n_sig):
        for t in range(cnt[s]):
            a = idx[s, t]
            sig[fill[a]] = s
            slot[fill[a]] = t
            fill[a] += 1
    return ptr, sig, slot


@numba.njit(nogil=True, cache=True, fastmath=True)
def _ksvd_sweep(Dt, Xt, idx, coef, cnt, order, ptr, sig, slot):  # pragma: no cover - compiled
    """Approximate K-SVD atom updates, in place, Gauss-Seidel over ``order``."""
    n_atoms, n_features = Dt.shape
    max_use = 0
    for a in range(n_atoms):
        max_use = max(max_use, ptr[a + 1] - ptr[a])
    R = np.empty((max(max_use, 1), n_features), dtype=Dt.dtype)
    d = np.empty(n_features, dtype=Dt.dtype)
    for jj in range(order.shape[0]):
        j = order[jj]
        p0 = ptr[j]
        m = ptr[j + 1] - p0
        if m == 0:
            continue
        for f in range(n_features):
            d[f] = 0.0
        for i in range(m):
            s = sig[p0 + i]
            g = coef[s, slot[p0 + i]]
            for f in range(n_features):
                R[i, f] = Xt[s, f]
            for t in range(cnt[s]):
                c = coef[s, t]
                a = idx[s, t]
                if a != j:
                    for f in range(n_features):
                        R[i, f] -= Dt[a, f] * c
            for f in range(n_features):
                d[f] += R[i, f] * g
        nrm = 0.0
        for f in range(n_features):
            nrm += d[f] * d[f]
        nrm = np.sqrt(nrm)
        if not nrm > 0.0:
            continue
        for f in range(n_features):
            d[f] /= nrm
            Dt[j, f] = d[f]
        for i in range(m):
            acc = 0.0
            for f in range(n_features):
                acc += R[i, f] * d[f]
            coef[sig[p0 + i], slot[p0 + i]] = acc


@numba.njit(nogil=True, cache=True, fastmath=True)
def _residual_energy(Dt, Xt, idx, coef, cnt):  # pragma: no cover - compiled
    n_sig, n_features = Xt.shape
    err = np.empty(n_sig, dtype=np.float64)
    r = np.empty(n_features, dtype=Dt.dtype)
    for s in range(n_sig):
        for f in range(n_features):
            r[f] = Xt[s, f]
        for t in range(cnt[s]):
            c = coef[s, t]
            a = idx[s, t]
            for f in range(n_features):
                r[f] -= Dt[a, f] * c
        e = 0.0
        for f in range(n_features):
            e += r[f] * r[f]
        err[s] = e
    return err


def _initial_atoms(Xt, norms, n_atoms, rng):
    """Random distinct non-zero training signals, normalised, as rows."""
    candidates = np.flatnonzero(norms > 0)
    if candidates.size < n_atoms:
        raise InputError(
            f"The 'X' parameter must hold at least n_atoms = {n_atoms} non-zero signals, "
            f"got {candidates.size} (of {Xt.shape[0]} signals)"
        )
    perm = rng.permutation(candidates)
    chosen = []
    seen = set()
    pos = 0
    take = n_atoms
    while len(chosen) < n_atoms and pos < perm.size:
        batch = perm[pos : pos + take]
        pos += batch.size
        atoms = Xt[batch] / norms[batch, None]
        for s, row in zip(batch, atoms):
            key = row.tobytes()
            if key not in seen:
                seen.add(key)
                chosen.append(s)
                if len(chosen) == n_atoms:
                    break
        take = max(n_atoms - len(chosen), 16)
    if len(chosen) < n_atoms:
        raise InputError(
            f"The 'X' parameter must hold at least n_atoms = {n_atoms} distinct non-zero signals, "
            f"got {len(chosen)}"
        )
    chosen = np.asarray(chosen)
    return Xt[chosen] / norms[chosen, None]


def _replace_atoms(Dt, Xt, norms, err, usage, limit):
    """Replace unused and near-duplicate atoms by the worst-represented signals.

    Returns the numbers of atoms replaced for being unused and for coherence.
    """
    n_atoms = Dt.shape[0]
    ranked = np.argsort(-err, kind="stable")
    ranked = ranked[norms[ranked] > 0]
    pos = 0
    G = Dt @ Dt.T
    np.fill_diagonal(G, 0)
    n_unused = n_coherent = 0
    for j in range(n_atoms):
        unused = usage[j] == 0
        coherent = np.max(np.abs(G[j])) > limit if n_atoms > 1 else False
        if not (unused or coherent):
            continue
        if pos >= ranked.size:
            break
        s = ranked[pos]
        pos += 1
        Dt[j] = Xt[s] / norms[s]
        g = Dt @ Dt[j]
        g[j] = 0
        G[j] = g
        G[:, j] = g
        if unused:
            n_unused += 1
        else:
            n_coherent += 1
    return n_unused, n_coherent


def ksvd(
    X: ArrayLike, n_atoms: int, n_nonzero: int, n_iter: int, *, init: ArrayLike | None = None,
    random_state: Any = None, callback: Callable[[int, np.ndarray, dict], Any] | None = None,
    n_threads: int | None = None,
) -> tuple[np.ndarray, dict[str, Any]]:
    """Learn a dictionary by approximate K-SVD over batch OMP.

    Parameters
    ----------
    X : ndarray, shape (n_features, n_signals)
        Training signals as columns, finite. Zero signals are allowed and
        ignored.
    n_atoms : int
        Dictionary size, >= 1; ``X`` must hold at least that many distinct
        non-zero signals.
    n_nonzero : int
        Sparsity of the OMP coding, ``1 <= n_nonzero <= min(n_features, n_atoms)``.
    n_iter : int
        Iterations (coding plus atom update), >= 0; 0 returns the initial
        dictionary.
    init : ndarray, shape (n_features, n_atoms), optional
        Initial dictionary (columns are normalised; none may be zero).
        Default: random distinct non-zero training signals, normalised.
    random_state : None, int, numpy.random.Generator or numpy.random.RandomState
        Seeds the initial choice and the atom update order. Runs with the
        same seed and input give the same dictionary.
    callback : callable, optional
        ``callback(iteration, D, info)`` after each iteration (``iteration``
        counts from 1, ``D`` is a copy); returning ``True`` stops training.
    n_threads : int, optional
        Threads for the OMP coding; default all cores of the process.

    Returns
    -------
    D : ndarray, shape (n_features, n_atoms)
        Unit-norm atoms; float32 when ``X`` (and ``init``) are float32,
        float64 otherwise.
    info : dict
        ``n_iter`` (iterations done), ``rms`` (list: root mean square
        residual per signal entry after each iteration), ``n_replaced``
        (list: atoms replaced after each iteration), with its parts
        ``n_unused`` and ``n_coherent`` (atoms used by no signal, atoms with
        ``|<d_i, d_j>| >`` :data:`COHERENCE_LIMIT`).

    Raises
    ------
    ParameterError
        Bad ``n_atoms``, ``n_nonzero``, ``n_iter``, ``init``, ``random_state``
        or ``callback``.
    InputError
        ``X`` not 2-D, non-finite, or with fewer distinct non-zero signals
        than ``n_atoms``.
    """
    X = _as_real_array(X, "X", InputError)
    if X.ndim != 2 or X.shape[0] < 1:
        raise InputError(f"The 'X' parameter must be a 2-D array (n_features, n_signals), got shape {X.shape}")
    n_features, n_signals = X.shape
    n_atoms = check_int(n_atoms, "n_atoms", 1)
    n_nonzero = _check_n_nonzero(n_nonzero, n_features, n_atoms)
    n_iter = check_int(n_iter, "n_iter", 0)
    if callback is not None and not callable(callback):
        raise ParameterError(f"The 'callback' parameter must be None or callable, got {callback!r}")
    n_threads = _check_n_threads(n_threads)
    rng = check_random_state(random_state)
    arrays = [X]
    if init is not None:
        init = _check_dictionary(init, "init")
        if init.shape != (n_features, n_atoms):
            raise ParameterError(
                f"The 'init' parameter must have shape ({n_features}, {n_atoms}), got {init.shape}"
            )
        arrays.append(init)
    dtype = working_dtype(*arrays)
    Xt = np.ascontiguousarray(X.T, dtype=dtype)
    if not np.isfinite(Xt).all():
        raise InputError("The 'X' parameter must hold finite values, got NaN or infinity")
    norms = np.sqrt(np.einsum("ij,ij->i", Xt, Xt, dtype=np.float64))
    if init is None:
        Dt = np.ascontiguousarray(_initial_atoms(Xt, norms, n_atoms, rng), dtype=dtype)
    else:
        cn = np.linalg.norm(init.astype(np.float64), axis=0)
        if np.any(cn == 0):
            raise ParameterError(f"The 'init' parameter must have no zero column, got {int(np.sum(cn == 0))}")
        Dt = np.ascontiguousarray((init / cn).T, dtype=dtype)
        if np.count_nonzero(norms > 0) < n_atoms:
            raise InputError(
                f"The 'X' parameter must hold at least n_atoms = {n_atoms} non-zero signals, "
                f"got {int(np.count_nonzero(norms > 0))}"
            )
    info: dict[str, Any] = {"n_iter": 0, "rms": [], "n_replaced": [], "n_unused": [], "n_coherent": []}
    n_entries = float(n_features) * n_signals
    for it in range(1, n_iter + 1):
        D = np.ascontiguousarray(Dt.T)
        G = _gram(Dt)
        idx, coef, cnt = _omp_run(D, X, n_nonzero, None, G, n_threads)
        ptr, sig, slot = _group_by_atom(idx, cnt, n_atoms)
        order = rng.permutation(n_atoms).astype(np.int64)
        _ksvd_sweep(Dt, Xt, idx, coef, cnt, order, ptr, sig, slot)
        err = _residual_energy(Dt, Xt, idx, coef, cnt)
        usage = np.diff(ptr)
        n_unused, n_coherent = _replace_atoms(Dt, Xt, norms, err, usage, COHERENCE_LIMIT)
        info["n_iter"] = it
        info["rms"].append(float(np.sqrt(err.sum() / n_entries)))
        info["n_unused"].append(n_unused)
        info["n_coherent"].append(n_coherent)
        info["n_replaced"].append(n_unused + n_coherent)
        if callback is not None and callback(it, np.array(Dt.T), info) is True:
            break
    return np.ascontiguousarray(Dt.T), info


class KSVD:
    """A thin estimator over :func:`ksvd` and :func:`batch_omp`.

    Signals are columns, as everywhere in :mod:`geosr.core.sparse`:
    ``fit(X)`` takes ``X`` of shape (n_features, n_signals) and learns
    ``components_`` of shape (n_features, n_atoms) (the dictionary ``D``).

    Parameters
    ----------
    n_atoms, n_nonzero, n_iter, random_state
        As :func:`ksvd`.
    """

    def __init__(self, n_atoms: int = 1000, n_nonzero: int = 3, n_iter: int = 20, random_state: Any = None) -> None:
        self.n_atoms = n_atoms
        self.n_nonzero = n_nonzero
        self.n_iter = n_iter
        self.random_state = random_state

    def fit(self, X: ArrayLike, init: ArrayLike | None = None) -> KSVD:
        """Learn the dictionary from ``X`` (n_features, n_signals); returns self."""
        self.components_, self.info_ = ksvd(
            X, self.n_atoms, self.n_nonzero, self.n_iter, init=init, random_state=self.random_state
        )
        return self

    def transform(self, X: ArrayLike, tol: float | None = None) -> scipy.sparse.csc_matrix:
        """Sparse codes of ``X`` (n_features, n_signals) as CSC (n_atoms, n_signals)."""
        if not hasattr(self, "components_"):
            raise NotFittedError("This KSVD instance is not fitted yet; call fit first")
        return batch_omp(self.components_, X, self.n_nonzero, tol=tol)
