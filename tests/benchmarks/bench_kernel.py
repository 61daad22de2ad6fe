"""Benchmark: afterfit's fit + influence measures against statsmodels, in one run.

Run ``python tests/benchmarks/bench_kernel.py`` (n = 10^4, 10^5, 10^6; p = 12) or with
``--quick`` (n = 10^4, 10^5; fewer repeats).  ``--threads N`` caps the BLAS threads of both
contenders (set before numpy loads), which makes runs on a busy machine comparable.

Compared work, same data, same process:

- afterfit: ``fit_ols(X, y)`` then ``influence_frame(ls)`` (leverage, internal and external
  studentized residuals, Cook's distance, DFFITS and flags; all closed form).
- statsmodels: ``OLS(y, X).fit()`` then ``get_influence()`` and its closed-form measures
  ``hat_matrix_diag``, ``resid_studentized_internal``, ``cooks_distance``, ``dffits_internal``.
  Its external studentized residuals (and the DFFITS built on them) come from n leave-one-out
  refits; that cost is not timed but estimated as n times one refit, and shown separately.

Times are best-of-repeats seconds; ratios are statsmodels / afterfit (above 1: afterfit faster).
Peak memory is the largest extra allocation seen by ``tracemalloc`` while the step runs, as a
multiple of the design matrix's size (the design itself not counted).  Agreement: the largest
relative difference of coefficients and leverage, and of internally studentized residuals and
Cook's distances relative to their largest value.
"""
from __future__ import annotations

import argparse
import time


import tracemalloc

import numpy as np


def best_of(fn, repeats):
    times, out = [], None
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return min(times), out


def peak_extra(fn, base_bytes):
    tracemalloc.start()
    try:
        fn()
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    return peak / base_bytes


def make_data(n, p, seed=0):
    rng = np.random.default_rng(seed)
    X = np.column_stack([np.ones(n), rng.standard_normal((n, p - 1))])
    y = X @ rng.standard_normal(p) + rng.standard_normal(n)
    return X, y


def run(sizes, p=12, repeats=3, memory=True):
    """Time both contenders at each n; returns a list of result dicts."""
    import statsmodels.api as sm

    from afterfit.model.influence import influence_frame
    from afterfit.model.ols import fit_ols

    def ours(X, y):
        ls = fit_ols(X, y)
        return ls, influence_frame(ls)

    def peer(X, y):
        res = sm.OLS(y, X).fit()
        infl = res.get_influence()
        return res, (infl.hat_matrix_diag, infl.resid_studentized_internal,
                     infl.cooks_distance[0], infl.dffits_internal[0])

    rows = []
    for n in sizes:
        X, y = make_data(n, p)
        reps = repeats if n < 10**6 else max(1, repeats - 1)
        ours(X[:1000], y[:1000])  # warm imports and caches outside the timings
        peer(X[:1000], y[:1000])
        t_fit, ls = best_of(lambda: fit_ols(X, y), reps)
        t_inf, _ = best_of(lambda: influence_frame(fit_ols(X, y)), reps)
        t_inf -= t_fit  # influence alone (fit subtracted)
        t_ours, (ls, f) = best_of(lambda: ours(X, y), reps)
        t_sfit, _ = best_of(lambda: sm.OLS(y, X).fit(), reps)
        t_peer, (res, (hat, sint, cook, _)) = best_of(lambda: peer(X, y), reps)
        t_one_refit, _ = best_of(lambda: sm.OLS(y[1:], X[1:]).fit(), 1)
        # params and leverage elementwise; residual-based measures relative to their largest
        # value (a residual near 0 has few correct digits in any double computation)
        agree = max(
            np.max(np.abs(ls.params - res.params) / np.abs(res.params)),
            np.max(np.abs(f["leverage"].to_numpy() - hat) / hat),
            np.max(np.abs(f["student_int"].to_numpy() - sint)) / np.max(np.abs(sint)),
            np.max(np.abs(f["cooks_d"].to_numpy() - cook)) / np.max(cook),
        )
        row = dict(n=n, method=ls.method, t_fit=t_fit, t_inf=max(t_inf, 0.0), t_ours=t_ours,
                   t_sfit=t_sfit, t_peer=t_peer, t_loo=n * t_one_refit, agree=agree)
        if memory:
            row["mem_ours"] = peak_extra(lambda: ours(X, y), X.nbytes)
            row["mem_peer"] = peak_extra(lambda: peer(X, y), X.nbytes)
        rows.append(row)
        del X, y, ls, f, res
    return rows


def _duration(seconds):
    for unit, size in (("days", 86400), ("h", 3600), ("min", 60)):
        if seconds >= 2 * size:
            return f"{seconds / size:.0f} {unit}"
    return f"{seconds:.0f} s"


def table(rows, p=12):
    out = [
        f"| n (p = {p}) | afterfit path | afterfit fit | afterfit influence | afterfit total "
        "| statsmodels fit | statsmodels fit + influence | ratio (total) | statsmodels LOO "
        "for external studentized (estimate) | peak memory afterfit / statsmodels "
        "| max rel. difference |",
        "|---:|---|---:|---:|---:|---:|---:|---:|---:|---:|---:|",
    ]
    for r in rows:
        mem = (f"{r['mem_ours']:.2f}x / {r['mem_peer']:.2f}x" if "mem_ours" in r else "-")
        out.append(
            f"| {r['n']:,} | {r['method']} | {r['t_fit']:.3f} s | {r['t_inf']:.3f} s "
            f"| {r['t_ours']:.3f} s | {r['t_sfit']:.3f} s | {r['t_peer']:.3f} s "
            f"| {r['t_peer'] / r['t_ours']:.2f}x | ~{_duration(r['t_loo'])} | {mem} "
            f"| {r['agree']:.1e} |"
        )
    return "\n".join(out)


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="n = 10^4 and 10^5, fewer repeats")
    parser.add_argument("--threads", type=int, default=None,
                        help="cap BLAS threads for both contenders (threadpoolctl)")
    parser.add_argument("--no-memory", action="store_true", help="skip the tracemalloc runs")
    args = parser.parse_args(argv)
    sizes = [10**4, 10**5] if args.quick else [10**4, 10**5, 10**6]
    repeats = 2 if args.quick else 3
    if args.threads:
        from threadpoolctl import threadpool_limits

        with threadpool_limits(args.threads, user_api="blas"):
            rows = run(sizes, repeats=repeats, memory=not args.no_memory)
    else:
        rows = run(sizes, repeats=repeats, memory=not args.no_memory)
    threads = args.threads or "default"
    print(f"\nfit + influence measures, afterfit vs statsmodels (best of {repeats}, same run; "
          f"BLAS threads: {threads})\n")
    print(table(rows))


def test_bench_kernel_quick(capsys):
    """pytest entry (``python -m pytest tests/benchmarks -s``): the quick table; checks only that
    both contenders computed the same numbers, never a time."""
    rows = run([10**4], repeats=1, memory=False)
    print(table(rows))
    assert rows[0]["agree"] < 1e-9


if __name__ == "__main__":
    main()
