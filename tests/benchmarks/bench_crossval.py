"""Benchmark: 10-fold cross-validation against one least-squares fit and against scikit-learn.

Run ``python tests/benchmarks/bench_crossval.py`` (n = 10^6, p = 12) or with ``--quick``
(n = 10^5).  All timings are taken in the same run; the table reports best-of-repeats seconds and
ratios.  Goal: afterfit's 10-fold CV costs at most 2x one fit.  On a machine that is busier
than its CPU count, threaded BLAS calls slow down unevenly and the ratios mean little: the
table prints the load; run it on a quiet machine (or with ``OPENBLAS_NUM_THREADS=1``).

The folds are contiguous blocks in row order (``scheme="blocked"``), which is the partition
scikit-learn's ``cross_val_score(..., cv=10)`` uses for a regressor, so the per-fold errors of the
two can be compared as a check that both computed the same thing.
"""
from __future__ import annotations

import argparse
import os
import time

import numpy as np


def best_of(fn, repeats):
    times = []
    out = None
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return min(times), out


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="n = 10^5 and fewer repeats")
    parser.add_argument("--n", type=int, default=None, help="rows (default 10^6, 10^5 with --quick)")
    args = parser.parse_args(argv)
    n = args.n or (100_000 if args.quick else 1_000_000)
    p = 12
    k = 10
    repeats = 2 if args.quick else 3

    from sklearn.linear_model import LinearRegression
    from sklearn.model_selection import cross_val_score

    from afterfit.model.crossval import cross_validate, make_folds
    from afterfit.model.ols import fit_ols

    rng = np.random.default_rng(0)
    Z = rng.standard_normal((n, p - 1))
    X = np.column_stack([np.ones(n), Z])
    y = X @ rng.standard_normal(p) + rng.standard_normal(n)

    def ours():
        return cross_validate(X, y, make_folds(n, k=k, scheme="blocked"), scheme="blocked")

    def ours_kfold():
        return cross_validate(X, y, make_folds(n, k=k, seed=0))

    XF = np.asfortranarray(X)  # the Study's designs are column-major

    def ours_kfold_f():
        return cross_validate(XF, y, make_folds(n, k=k, seed=0))

    rows = []
    t_lstsq, _ = best_of(lambda: np.linalg.lstsq(X, y, rcond=None), repeats)
    rows.append(("one fit: numpy lstsq", t_lstsq))
    t_fit, _ = best_of(lambda: fit_ols(X, y), repeats)
    rows.append(("one fit: afterfit fit_ols", t_fit))
    t_cv, res = best_of(ours, repeats)
    rows.append(("10-fold CV: afterfit (blocked)", t_cv))
    t_cvk, _ = best_of(ours_kfold, repeats)
    rows.append(("10-fold CV: afterfit (kfold, shuffled)", t_cvk))
    t_cvf, _ = best_of(ours_kfold_f, repeats)
    rows.append(("10-fold CV: afterfit (kfold, shuffled, column-major X as in a Study)", t_cvf))
    t_sk, scores = best_of(
        lambda: cross_val_score(LinearRegression(), Z, y, cv=k, scoring="neg_root_mean_squared_error"),
        max(1, repeats - 1),
    )
    rows.append(("10-fold CV: scikit-learn cross_val_score", t_sk))

    agree = np.max(np.abs(-scores - res.per_fold["rmse_test"].to_numpy()))
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"\n10-fold cross-validation, n = {n:,}, p = {p} (best of {repeats}; same run; "
          f"{os.cpu_count()} CPUs, 1-minute load {load:.1f} at the end)\n")
    print("| method | seconds | vs numpy lstsq | vs afterfit CV |")
    print("|---|---:|---:|---:|")
    for name, t in rows:
        print(f"| {name} | {t:.3f} | {t / t_lstsq:.2f}x | {t / t_cv:.2f}x |")
    print(f"\nper-fold RMSE, afterfit vs scikit-learn: max abs difference {agree:.1e}")
    print(f"goal (CV <= 2x one numpy lstsq fit): {'met' if t_cv <= 2 * t_lstsq else 'NOT met'} "
          f"({t_cv / t_lstsq:.2f}x)")


if __name__ == "__main__":
    main()
