"""Benchmark: scoring candidate terms against the base fit, in one run.

Goal (design card): scoring 50 candidates at n = 10^6 with a 12-column base design costs at most
twice the base fit (``fit_ols``).  The 50 candidates of this table hold about 9 times as many
columns as the base design, and scoring must read each of them at least once, so the table also
gives the cost per candidate column against the fit's cost per design column.  The peer is the base fit timed in the same process, so the
ratio does not depend on the machine.  Data are synthetic (seeded), built only for timing.

Run: ``python tests/benchmarks/bench_candidates.py`` (n = 10^6) or ``--quick`` (n = 10^5).
Prints a Markdown table for the README.
"""
from __future__ import annotations

import argparse
import time

import numpy as np
import pandas as pd
import patsy

from afterfit.model.candidates import catalogue, rank_candidates, score_candidates
from afterfit.model.ols import fit_ols
from afterfit.model.terms import Declarations, split_formula

FORMULA = "y ~ x1 + x2 + x3 + x4 + x5 + x6 + x7 + x8 + C(g)"  # 12 columns with the intercept


def make_frame(n: int, seed: int = 0) -> pd.DataFrame:
    """Synthetic table: 8 numeric inputs, a 4-level group, a time column (decimal years)."""
    rng = np.random.default_rng(seed)
    df = pd.DataFrame({f"x{j}": rng.normal(size=n) for j in range(1, 9)})
    df["x1"] = rng.uniform(1, 10, n)  # positive: also gets a log candidate
    df["g"] = pd.Categorical(rng.choice(list("abcd"), n))
    df["t"] = 2010 + np.sort(rng.uniform(0, 12, n))
    beta = rng.normal(size=8)
    df["y"] = (df[[f"x{j}" for j in range(1, 9)]].to_numpy() @ beta
               + 0.1 * (df["x1"] - 5) ** 2 + np.sin(2 * np.pi * df["t"])
               + df["g"].cat.codes * 0.5 + rng.normal(size=n))
    return df


def best_of(fn, repeat):
    times = []
    out = None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return min(times), out


def run(n: int, *, n_candidates: int = 50, repeat: int = 3) -> list[dict]:
    df = make_frame(n)
    response, terms, _ = split_formula(FORMULA)
    y, X = patsy.dmatrices(FORMULA, df, return_type="matrix")
    X = np.asarray(X)
    y = np.asarray(y).ravel()
    t_fit, ls = best_of(lambda: fit_ols(X, y), repeat)
    decl = Declarations.build(df.columns, time="t", period=1.0, groups=["g"])
    t_cat, cands = best_of(
        lambda: catalogue(df, response=response, model_terms=terms, declarations=decl, fit=ls), 1
    )
    cands = cands[:n_candidates]
    t0 = time.perf_counter()
    blocks = [np.asarray(patsy.dmatrix("0 + " + c.term, df)) for c in cands]
    t_eval = time.perf_counter() - t0
    searched = [c.searched for c in cands]
    t_score, scores = best_of(lambda: score_candidates(ls, blocks, searched=searched), repeat)
    t_rows, _ = best_of(
        lambda: score_candidates(ls, blocks, searched=searched, algorithm="rows"), 1
    )
    ranked = rank_candidates(cands, scores)
    width = sum(b.shape[1] for b in blocks)
    return [
        {"n": n, "step": "base fit (fit_ols, peer)", "seconds": t_fit, "ratio": 1.0},
        {"n": n, "step": f"score {len(cands)} candidates ({width} columns), auto",
         "seconds": t_score, "ratio": t_score / t_fit},
        {"n": n, "step": f"score, per candidate column vs fit per design column "
                         f"({X.shape[1]})", "seconds": t_score / width,
         "ratio": (t_score / width) / (t_fit / X.shape[1])},
        {"n": n, "step": "same, every block row by row", "seconds": t_rows,
         "ratio": t_rows / t_fit},
        {"n": n, "step": "catalogue (knot/change-point search)", "seconds": t_cat,
         "ratio": t_cat / t_fit},
        {"n": n, "step": "evaluate blocks with patsy (caller's cost)", "seconds": t_eval,
         "ratio": t_eval / t_fit},
        {"n": n, "step": f"(candidates tagged evident: {(ranked.tag == 'evident').sum()})",
         "seconds": float("nan"), "ratio": float("nan")},
    ]


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="n = 10^5 instead of 10^6")
    ap.add_argument("--threads", type=int, default=0,
                    help="BLAS threads (0: library default); 1 gives steadier ratios on a "
                         "shared machine (needs threadpoolctl)")
    args = ap.parse_args(argv)
    n = 100_000 if args.quick else 1_000_000
    if args.threads:
        from threadpoolctl import threadpool_limits

        with threadpool_limits(args.threads):
            rows = run(n)
    else:
        rows = run(n)
    print(f"BLAS threads: {args.threads or 'default'}")
    print("| n | step | seconds | × base fit |")
    print("|---|---|---|---|")
    for r in rows:
        sec = "" if np.isnan(r["seconds"]) else f"{r['seconds']:.4f}"
        rat = "" if np.isnan(r["ratio"]) else f"{r['ratio']:.2f}"
        print(f"| {r['n']:,} | {r['step']} | {sec} | {rat} |")
    score = rows[1]["ratio"]
    print(f"\ngoal: scoring <= 2x the base fit; measured {score:.2f}x "
          f"({'met' if score <= 2 else 'NOT met'})")


if __name__ == "__main__":
    main()
