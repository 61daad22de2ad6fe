"""Benchmark: a whole Study step against getting the same numbers the usual way, in one run.

Run ``python tests/benchmarks/bench_study.py`` (n = 10^4, 10^5, 10^6) or ``--quick``
(n = 10^4, 10^5).  Prints two markdown tables for the README:

1. *Construction*: ``Study(df, formula)`` with ``.fit``, ``.influence`` and ``.checks()`` against
   statsmodels: ``smf.ols(formula, df).fit()``, ``get_influence()`` (leverage, internally
   studentized residuals, Cook's distance; externally studentized residuals and DFFITS by the closed
   form from statsmodels' own internal ones, because statsmodels itself refits once per row), RESET, Breusch–Pagan (both forms),
   White, Durbin–Watson, Ljung–Box, Jarque–Bera, Harvey–Collier and VIF.  Also a refit after adding
   one declared term against one Gram pass (X'X) over the same design matrix.
2. *Whole refit step* (issue "proven at scale"): add a term, then fit, influence, checks, 10-fold
   CV and candidate scores, against statsmodels + scikit-learn doing the same: OLS + influence +
   the same tests + ``cross_val_score(LinearRegression(), X, y, cv=10)`` + one statsmodels refit
   and F test per candidate (the peer is given each candidate's columns ready-made, so its time
   excludes formula parsing for candidates).

Data: p = 12 columns (intercept, 9 numeric, a 3-level categorical); invented for timing only.
Harvey–Collier in statsmodels is a Python loop over rows; above ``--hc-max`` rows it is left out of
BOTH sides' timed work (afterfit's run_checks then reports it on a documented subsample, so its
time is included on our side anyway).
"""
from __future__ import annotations

import argparse
import gc
import time
import warnings

import numpy as np
import pandas as pd


def _data(n, seed=0):
    rng = np.random.default_rng(seed)
    df = pd.DataFrame({f"x{i}": rng.standard_normal(n) for i in range(10)})
    df["g"] = pd.Categorical(rng.choice(["a", "b", "c"], n))
    df["y"] = (1 + df[[f"x{i}" for i in range(9)]].to_numpy() @ rng.uniform(-1, 1, 9)
               + 0.3 * df["x0"] ** 2 + (df["g"] == "b") * 0.5 + rng.standard_normal(n))
    return df


FORMULA = "y ~ " + " + ".join(f"x{i}" for i in range(9)) + " + C(g)"


def _timed(fn):
    gc.collect()
    t0 = time.perf_counter()
    out = fn()
    return time.perf_counter() - t0, out


def statsmodels_way(df, *, hc: bool):
    import statsmodels.api as sm
    import statsmodels.formula.api as smf
    import statsmodels.stats.diagnostic as dg
    from statsmodels.stats.outliers_influence import variance_inflation_factor
    from statsmodels.stats.stattools import durbin_watson, jarque_bera

    res = smf.ols(FORMULA, df).fit()
    infl = res.get_influence()
    r = infl.resid_studentized_internal
    # statsmodels' resid_studentized_external refits once per row (leave-one-out); to be fair to
    # the peer we give it the closed form from its own internal studentized residuals instead
    dfr = res.df_resid
    ext = r * np.sqrt((dfr - 1) / (dfr - r**2))
    out = [infl.hat_matrix_diag, r, ext, infl.cooks_distance[0],
           ext * np.sqrt(infl.hat_matrix_diag / (1 - infl.hat_matrix_diag))]
    exog = res.model.exog
    e = res.resid
    out.append(dg.linear_reset(res, power=3, use_f=True))
    out.append(dg.het_breuschpagan(e, exog, robust=True))
    out.append(dg.het_breuschpagan(e, exog, robust=False))
    out.append(dg.het_white(e, exog))
    out.append(durbin_watson(e))
    out.append(dg.acorr_ljungbox(e, lags=[10]))
    out.append(jarque_bera(e))
    if hc:
        out.append(dg.linear_harvey_collier(res))
    out.append([variance_inflation_factor(exog, j) for j in range(1, exog.shape[1])])
    return res, out


def afterfit_way(df):
    import afterfit as af

    s = af.Study(df, FORMULA, plausible=["x9"])
    s.fit, s.influence, s.checks()
    return s


def construction_table(sizes, hc_max):
    rows = []
    for n in sizes:
        df = _data(n)
        t_sm, _ = _timed(lambda: statsmodels_way(df, hc=n <= hc_max))
        t_af, s = _timed(lambda: afterfit_way(df))
        # refit after adding one declared term vs one Gram pass over the same matrix
        t_add, _ = _timed(lambda: (s.add("x9"), s.fit))
        X = s._current.X
        t_gram, _ = _timed(lambda: X.T @ X)
        rows.append((n, t_sm, t_af, t_sm / t_af, t_add, t_gram, t_add / t_gram))
        print(f"n={n}: statsmodels {t_sm:.2f}s afterfit {t_af:.2f}s; refit {t_add:.3f}s, "
              f"Gram {t_gram:.4f}s", flush=True)
        del s, df, X
    lines = ["| n | statsmodels fit+influence+checks (s) | afterfit Study+fit+influence+checks (s) "
             "| speed-up | refit after adding a term (s) | one Gram pass X'X (s) | refit / Gram |",
             "|---|---|---|---|---|---|---|"]
    for n, a, b, r, c, d, q in rows:
        lines.append(f"| {n:,} | {a:.2f} | {b:.2f} | {r:.1f}× | {c:.3f} | {d:.4f} | {q:.1f} |")
    return "\n".join(lines)


def refit_step_table(sizes, hc_max, n_cand_peer):
    import statsmodels.api as sm
    from sklearn.linear_model import LinearRegression
    from sklearn.model_selection import cross_val_score

    import afterfit as af

    rows = []
    for n in sizes:
        df = _data(n)
        s = af.Study(df, FORMULA, plausible=["x9"])
        s.fit

        def ours():
            s.add("x9")
            s.fit, s.influence, s.checks(), s.cv, s.candidates()
            return s

        t_af, _ = _timed(ours)
        table = s.candidates()
        model = s._current
        blocks = []
        for term in table["term"][:n_cand_peer]:
            blocks.append(model.term_block(term)[0])
        X = model.X
        y = model.y
        df2 = df.assign()

        def peer():
            res, _ = statsmodels_way(df2.assign(), hc=n <= hc_max)
            cross_val_score(LinearRegression(fit_intercept=False), X, y, cv=10,
                            scoring="neg_root_mean_squared_error")
            base = sm.OLS(y, X).fit()
            for B in blocks:
                big = sm.OLS(y, np.column_stack([X, B])).fit()
                big.compare_f_test(base)

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t_peer, _ = _timed(peer)
        scale = len(table) / max(len(blocks), 1)
        rows.append((n, len(table), len(blocks), t_peer, t_af, t_peer / t_af, scale))
        print(f"n={n}: peer {t_peer:.2f}s ({len(blocks)} candidate refits) afterfit {t_af:.2f}s "
              f"({len(table)} candidates)", flush=True)
        del s, df, X
    lines = ["| n | candidates scored by afterfit | candidate refits by the peer | statsmodels + "
             "scikit-learn (s) | afterfit whole step (s) | speed-up |",
             "|---|---|---|---|---|---|"]
    for n, k, kp, a, b, r, _ in rows:
        lines.append(f"| {n:,} | {k} | {kp} | {a:.2f} | {b:.2f} | {r:.1f}× |")
    return "\n".join(lines)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--hc-max", type=int, default=100_000)
    ap.add_argument("--peer-candidates", type=int, default=50)
    ap.add_argument("--only", choices=["construction", "step"], default=None)
    ap.add_argument("--sizes", type=lambda t: [int(float(v)) for v in t.split(",")], default=None,
                    help="comma-separated row counts, e.g. 1e4,1e6")
    args = ap.parse_args(argv)
    sizes = [10_000, 100_000] if args.quick else [10_000, 100_000, 1_000_000]
    if args.sizes:
        sizes = args.sizes
    if args.only != "step":
        print(construction_table(sizes, args.hc_max))
    if args.only != "construction":
        print(refit_step_table(sizes, args.hc_max, args.peer_candidates))


if __name__ == "__main__":
    main()
