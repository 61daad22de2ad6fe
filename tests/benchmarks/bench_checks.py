"""Benchmark: ``run_checks`` against statsmodels doing the same tests, in one run.

Run ``python tests/benchmarks/bench_checks.py`` (n = 10^6, p = 12) or with ``--quick``
(n = 10^5); ``--threads 1`` caps BLAS threads (steadier numbers on a shared machine).  Every
timing comes from this one process: afterfit's checks (all of them, and the quick subset a
redraw asks for), afterfit's own fit (``fit_ols``) as a yardstick, and the statsmodels
functions that compute the same statistics on the same data.  Each statistic is also compared,
so the table shows both cost and agreement.  Data are synthetic (seeded), built only for timing.

statsmodels' ``acorr_ljungbox`` computes the autocorrelations by a direct full correlation,
O(n^2) (about 10^12 operations at n = 10^6), so at full size its row is timed at
``--lb-n`` rows (default 10^5) and marked; the agreement check uses that same subset.
Prints a Markdown table for the README.
"""
from __future__ import annotations

import argparse
import time
import warnings


import numpy as np
import statsmodels.api as sm
import statsmodels.stats.diagnostic as smd
from scipy import stats
from statsmodels.stats.outliers_influence import variance_inflation_factor
from statsmodels.stats.stattools import durbin_watson, jarque_bera

from afterfit.model import checks as _checks
from afterfit.model.checks import run_checks
from afterfit.model.ols import fit_ols


def make_data(n: int, p: int = 12, seed: int = 0):
    """Intercept plus p - 1 correlated inputs; mild curvature and spread growing with x1."""
    rng = np.random.default_rng(seed)
    Z = rng.standard_normal((n, p - 1))
    Z[:, 1] += 0.5 * Z[:, 0]  # some collinearity so VIFs are not all 1
    X = np.column_stack([np.ones(n), Z])
    y = X @ rng.normal(size=p) + 0.05 * Z[:, 0] ** 2 + rng.standard_normal(n) * (1 + 0.2 * np.abs(Z[:, 0]))
    return X, y


def timed(fn):
    t0 = time.perf_counter()
    out = fn()
    return time.perf_counter() - t0, out


def quiet(fn):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # statsmodels' own conditioning warnings
        return fn()


def rel(a, b):
    return abs(a - b) / max(abs(b), 1e-300)


def afterfit_parts(ls, lags: int) -> dict:
    """Seconds per check inside run_checks (private helpers, timing only)."""
    out = {}
    t, d = timed(lambda: _checks._prepare(ls, has_const=True, order=None))
    out["(shared preparation)"] = t
    out["RESET"] = timed(lambda: _checks._reset(d, has_const=True, alpha=0.05))[0]
    out["Breusch-Pagan (both forms, one pass)"] = timed(
        lambda: _checks._breusch_pagan(d, alpha=0.05))[0]
    out["White"] = timed(lambda: _checks._white(d, alpha=0.05))[0]
    out["Durbin-Watson"] = timed(lambda: _checks._durbin_watson(d))[0]
    out["Ljung-Box"] = timed(lambda: _checks._ljung_box(d, lags=lags, alpha=0.05))[0]
    out["Jarque-Bera"] = timed(lambda: _checks._jarque_bera(d, alpha=0.05))[0]
    out["Harvey-Collier"] = timed(lambda: _checks._harvey_collier(d, alpha=0.05))[0]
    out["VIF"] = timed(lambda: _checks._vif_values(d, ls, has_const=True))[0]
    return out


# the checks a quick redraw asks for (``run_checks(only=QUICK)``)
QUICK = ("Jarque-Bera", "Breusch-Pagan (Koenker)", "Ljung-Box", "Durbin-Watson")


def run(n: int, lb_n: int, *, afterfit_only: bool = False) -> None:
    X, y = make_data(n)
    k = X.shape[1]
    t_fit, ls = timed(lambda: fit_ols(X, y))
    t_checks, r = timed(lambda: run_checks(ls))
    t_quick, quick = timed(lambda: run_checks(ls, only=QUICK))
    assert quick.equals(r.loc[quick.index])  # a subset is the full table's rows, exactly
    lags = min(10, n // 5)
    parts = afterfit_parts(ls, lags)
    from threadpoolctl import threadpool_info

    threads = ",".join(str(i["num_threads"]) for i in threadpool_info()
                       if i["user_api"] == "blas") or "unknown"
    print(f"\nn = {n:,}, p = {k} (BLAS threads: {threads}): afterfit run_checks {t_checks:.2f} s, "
          f"fit_ols {t_fit:.2f} s; only={QUICK}: {t_quick:.3f} s")
    print("| afterfit part | seconds |\n|---|---:|")
    for name, secs in parts.items():
        print(f"| {name} | {secs:.3f} |")
    if afterfit_only:
        return

    rows = []  # (test, statsmodels seconds, relative difference, remark)
    t_smfit, res = timed(lambda: sm.OLS(y, X).fit())
    e = res.resid
    rows.append(("(fit: statsmodels OLS vs fit_ols)", t_smfit, rel(ls.ssr, res.ssr),
                 f"afterfit {t_fit:.2f} s"))
    t, reset = timed(lambda: smd.linear_reset(res, power=3, use_f=True))
    rows.append(("RESET", t, rel(r.loc["RESET", "statistic"], float(reset.fvalue)), ""))
    t, bp = timed(lambda: smd.het_breuschpagan(e, X))
    rows.append(("Breusch-Pagan (Koenker)", t, rel(r.loc["Breusch-Pagan (Koenker)", "statistic"], bp[0]), ""))
    t, bp0 = timed(lambda: smd.het_breuschpagan(e, X, robust=False))
    rows.append(("Breusch-Pagan (original)", t, rel(r.loc["Breusch-Pagan (original)", "statistic"], bp0[0]), ""))
    t, hw = timed(lambda: quiet(lambda: smd.het_white(e, X)))
    rows.append(("White", t, rel(r.loc["White", "statistic"], hw[0]), f"{r.loc['White', 'df']} aux. columns"))
    t, dw = timed(lambda: durbin_watson(e))
    rows.append(("Durbin-Watson", t, rel(r.loc["Durbin-Watson", "statistic"], dw), ""))
    if n <= lb_n:
        t, lb = timed(lambda: smd.acorr_ljungbox(e, lags=lags))
        rows.append(("Ljung-Box", t, rel(r.loc["Ljung-Box", "statistic"], lb["lb_stat"].iloc[-1]), ""))
    else:
        r_sub = run_checks(fit_ols(X[:lb_n], y[:lb_n]))
        e_sub = sm.OLS(y[:lb_n], X[:lb_n]).fit().resid
        t, lb = timed(lambda: smd.acorr_ljungbox(e_sub, lags=min(10, lb_n // 5)))
        rows.append(("Ljung-Box", t, rel(r_sub.loc["Ljung-Box", "statistic"], lb["lb_stat"].iloc[-1]),
                     f"statsmodels timed at n = {lb_n:,} only (O(n^2)); afterfit's value compared there"))
    t, jb = timed(lambda: jarque_bera(e))
    rows.append(("Jarque-Bera", t, rel(r.loc["Jarque-Bera", "statistic"], jb[0]), ""))

    def harvey_collier():
        rr = smd.recursive_olsresiduals(res)
        return stats.ttest_1samp(rr[4][k:], 0)

    t, hc = timed(harvey_collier)
    rows.append(("Harvey-Collier", t, rel(r.loc["Harvey-Collier", "statistic"], hc.statistic),
                 "recursive_olsresiduals + t test"))
    t, vifs = timed(lambda: quiet(lambda: [variance_inflation_factor(X, j) for j in range(1, k)]))
    worst = max(rel(r.loc[f"VIF: x{j}", "statistic"], v) for j, v in zip(range(1, k), vifs))
    rows.append((f"VIF ({k - 1} regressors)", t, worst, ""))

    total_sm = sum(row[1] for row in rows[1:] if not row[3].startswith("statsmodels timed at"))
    print(f"\nn = {n:,}, p = {k}: afterfit run_checks {t_checks:.2f} s (fit_ols {t_fit:.2f} s); "
          f"statsmodels, same tests: {total_sm:.1f} s (excluding its OLS fit {t_smfit:.2f} s"
          f"{' and Ljung-Box, timed at a smaller n' if n > lb_n else ''})\n")
    print("| test | statsmodels (s) | relative difference of the statistic | remark |")
    print("|---|---:|---:|---|")
    for name, secs, diff, remark in rows:
        print(f"| {name} | {secs:.2f} | {diff:.1e} | {remark} |")
    print(f"| **all checks** | **{total_sm:.1f}** | | afterfit **{t_checks:.2f} s**, "
          f"ratio {total_sm / t_checks:.0f}x |")


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="n = 10^5 instead of 10^6")
    ap.add_argument("--n", type=int, default=None)
    ap.add_argument("--afterfit-only", action="store_true", help="time afterfit's side only")
    ap.add_argument("--threads", type=int, default=None,
                    help="cap BLAS threads for both contenders (threadpoolctl)")
    ap.add_argument("--lb-n", type=int, default=100_000,
                    help="largest n at which statsmodels' O(n^2) Ljung-Box is timed")
    args = ap.parse_args()
    n = args.n or (100_000 if args.quick else 1_000_000)
    if args.threads:
        from threadpoolctl import threadpool_limits

        with threadpool_limits(args.threads, user_api="blas"):
            run(n, args.lb_n, afterfit_only=args.afterfit_only)
    else:
        run(n, args.lb_n, afterfit_only=args.afterfit_only)


def test_bench_checks_quick():
    """Entry point for ``pytest tests/benchmarks -s``: the quick size."""
    run(100_000, 100_000)


if __name__ == "__main__":
    main()
