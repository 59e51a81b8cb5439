"""Batch OMP and K-SVD speed against scikit-learn's OMP, measured in the same run.

    .venv/bin/python benchmarks/bench_sparse_coding.py            # full figures
    .venv/bin/python benchmarks/bench_sparse_coding.py --quick    # a smoke run

Workload (the sparse path's defaults at x3): a 30 x 1000 dictionary of
normalised random vectors, 3 atoms per signal, float32. Signals are sparse
combinations of the atoms plus noise, like the training features K-SVD sees.

- ``geosr.core.sparse.batch_omp`` on ``--signals`` signals (best of ``--repeat``);
- ``sklearn.linear_model.orthogonal_mp_gram(G, D.T @ X)`` on the first
  ``--sklearn-signals`` of them (it codes one signal at a time, so a subset
  gives its per-signal time); the supports of the two are compared there;
- ``geosr.core.sparse.ksvd`` on ``--ksvd-signals`` signals, 1000 atoms, L = 3,
  ``--ksvd-iter`` iterations.

Prints a plain table and one ``RESULT {json}`` line per figure (the
convention of benchmarks/run_all.py).
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
import warnings

import numpy as np

from geosr import sparse

NAME = "sparse_coding"


def emit(metric, value, unit, **extra):
    """Print one machine-readable figure (see benchmarks/run_all.py)."""
    record = {"benchmark": NAME, "metric": metric, "value": value, "unit": unit}
    record.update({k: v for k, v in extra.items() if v is not None})
    print("RESULT " + json.dumps(record), flush=True)
    return record


def make_problem(n_features, n_atoms, n_signals, n_nonzero, seed):
    rng = np.random.default_rng(seed)
    D = rng.standard_normal((n_features, n_atoms))
    D /= np.linalg.norm(D, axis=0)
    X = np.zeros((n_features, n_signals))
    for _ in range(n_nonzero):
        atoms = rng.integers(0, n_atoms, n_signals)
        X += D[:, atoms] * rng.standard_normal(n_signals)
    X += 0.1 * rng.standard_normal(X.shape) * np.sqrt(n_nonzero / n_features)
    return D.astype(np.float32), X.astype(np.float32)


def time_batch_omp(D, X, n_nonzero, repeat):
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        codes = sparse.batch_omp(D, X, n_nonzero)
        best = min(best, time.perf_counter() - t0)
    return best, codes


def time_sklearn(D, X, n_nonzero):
    from sklearn.linear_model import orthogonal_mp_gram

    G = D.T @ D
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        ref = orthogonal_mp_gram(G, D.T @ X, n_nonzero_coefs=n_nonzero)
    return time.perf_counter() - t0, np.asarray(ref).reshape(D.shape[1], X.shape[1])


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--features", type=int, default=30)
    p.add_argument("--atoms", type=int, default=1000)
    p.add_argument("--nonzero", type=int, default=3)
    p.add_argument("--signals", type=int, default=200_000)
    p.add_argument("--sklearn-signals", type=int, default=2_000)
    p.add_argument("--ksvd-signals", type=int, default=100_000)
    p.add_argument("--ksvd-iter", type=int, default=20)
    p.add_argument("--repeat", type=int, default=3)
    p.add_argument("--quick", action="store_true", help="small sizes, for a smoke run")
    args = p.parse_args(argv)
    if args.quick:
        args.signals, args.sklearn_signals, args.ksvd_signals, args.ksvd_iter = 20_000, 300, 5_000, 3

    L = args.nonzero
    D, X = make_problem(args.features, args.atoms, args.signals, L, seed=0)
    sparse.batch_omp(D, X[:, :2000], L)  # compile (numba caches to disk after the first run)

    ours_s, codes = time_batch_omp(D, X, L, args.repeat)
    ours_us = ours_s / args.signals * 1e6
    n_ref = min(args.sklearn_signals, args.signals)
    ref_s, ref = time_sklearn(D, X[:, :n_ref], L)
    ref_us = ref_s / n_ref * 1e6
    sub = codes[:, :n_ref].toarray()
    same_support = np.all((sub != 0) == (ref != 0), axis=0)
    agree = float(np.mean(same_support))
    coef_diff = float(np.max(np.abs(sub[:, same_support] - ref[:, same_support]))) if same_support.any() else None
    ratio = ref_us / ours_us

    # K-SVD on training-like signals
    Dk, Xk = make_problem(args.features, args.atoms, args.ksvd_signals, L, seed=1)
    t0 = time.perf_counter()
    _, info = sparse.ksvd(Xk, args.atoms, L, args.ksvd_iter, random_state=0)
    ksvd_s = time.perf_counter() - t0

    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    shape = f"{args.features} x {args.atoms} dictionary, L = {L}, float32"
    rows = [
        ("batch_omp (geosr)", f"{ours_us:.3f} us/signal", f"{args.signals} signals, best of {args.repeat}"),
        ("orthogonal_mp_gram (sklearn)", f"{ref_us:.1f} us/signal", f"{n_ref} signals"),
        ("speed-up", f"{ratio:.0f} x", "targets >= 100 x (core), >= 300 x (performance)"),
        ("same supports", f"{agree * 100:.3f} %", f"max |coef diff| {coef_diff:.2e}" if coef_diff is not None else ""),
        (
            "ksvd (geosr)",
            f"{ksvd_s:.2f} s",
            f"{args.ksvd_signals} signals, {args.atoms} atoms, {info['n_iter']} iterations, "
            f"RMS {info['rms'][0]:.4f} -> {info['rms'][-1]:.4f}",
        ),
    ]
    print(f"Sparse coding, {shape}, {cores} cores")
    w0 = max(len(r[0]) for r in rows)
    w1 = max(len(r[1]) for r in rows)
    for name, value, note in rows:
        print(f"  {name:<{w0}}  {value:>{w1}}  {note}")

    emit(
        "batch_omp_time_per_signal",
        round(ours_us, 4),
        "us/signal",
        reference="sklearn.linear_model.orthogonal_mp_gram",
        reference_value=round(ref_us, 2),
        ratio=round(ratio, 1),
        target=">= 100x (core issue), >= 300x (performance issue)",
        meets_target=bool(ratio >= 100),
        notes=f"{shape}; {args.signals} signals (sklearn on {n_ref}); {cores} cores; "
        f"meets_target is the core issue's 100x; 300x {'met' if ratio >= 300 else 'not met'}",
    )
    emit(
        "batch_omp_same_supports",
        round(agree, 6),
        "fraction",
        reference="sklearn.linear_model.orthogonal_mp_gram",
        notes=f"on the first {n_ref} signals; max |coef diff| {coef_diff}",
    )
    emit(
        "ksvd_time",
        round(ksvd_s, 3),
        "s",
        target="well under 60 s on 2 cores",
        meets_target=bool(ksvd_s < 60),
        notes=f"{args.ksvd_signals} signals, {args.atoms} atoms of {args.features}, L = {L}, "
        f"{info['n_iter']} iterations, {cores} cores",
    )
    return 0


if __name__ == "__main__":
    sys.exit(main())
