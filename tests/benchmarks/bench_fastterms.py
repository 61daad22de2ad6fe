"""Benchmark: evaluating every catalogue candidate's columns, patsy against evaluate_block.

``Study.candidates()`` needs each candidate's columns over the fitted rows.  The peer is the
design cache's patsy path (``_Model.term_block``, first evaluation of each term), timed in the same
process on the same study; the table gives seconds per kind of candidate and the ratio.  It also
times ``score_candidates`` on both sets of blocks (the blocks differ in basis, not span, so the
scorer's cost and its F statistics should not change) and reports the largest relative
difference of the F statistics.  One run each: the patsy path takes tens of seconds at 10^6.

Data: ``afterfit.demo.sensors`` (invented, seeded), with time and daily/weekly periods declared.

Run: ``python tests/benchmarks/bench_fastterms.py`` (n = 10^6) or ``--quick`` (n = 10^5).
Prints a Markdown table for the README.
"""
from __future__ import annotations

import argparse
import time
from collections import defaultdict

import numpy as np

import afterfit as af
from afterfit.model import candidates as cm
from afterfit.model.fastterms import evaluate_block


def _catalogue(study):
    """The candidates Study.candidates() scores, built the same way."""
    model = study._current
    skip = {study.response}
    if study.declarations.time is not None and study.time_column != study.declarations.time:
        skip.add(study.declarations.time)
    return cm.catalogue(model.frame(), response=study.response, model_terms=list(study.terms),
                        declarations=study.declarations, time=study.time_column,
                        skip=tuple(skip), fit=model.ls)


def run(n: int) -> dict:
    df = af.demo.sensors(n)
    t0 = time.perf_counter()
    study = af.Study(df, df.attrs["first_formula"], time="timestamp",
                     period=[1 / 365.25, 7 / 365.25])
    t_study = time.perf_counter() - t0
    model = study._current
    frame, rows = model.cache.frame, (None if model.all_finite else model.finite)
    cands = _catalogue(study)

    fast, t_fast = [], defaultdict(float)
    for c in cands:
        t0 = time.perf_counter()
        block = evaluate_block(c.term, frame, rows, intercept=study.state.intercept,
                               model_terms=study.terms)
        t_fast[c.kind] += time.perf_counter() - t0
        if block is None:
            raise AssertionError(f"not handled: {c.term}")
        fast.append(block)

    slow, t_slow = [], defaultdict(float)
    for c in cands:
        t0 = time.perf_counter()
        slow.append(model.term_block(c.term)[0])
        t_slow[c.kind] += time.perf_counter() - t0

    searched = [c.searched for c in cands]
    t0 = time.perf_counter()
    s_fast = cm.score_candidates(model.ls, fast, searched=searched)
    t_score_fast = time.perf_counter() - t0
    t0 = time.perf_counter()
    s_slow = cm.score_candidates(model.ls, slow, searched=searched)
    t_score_slow = time.perf_counter() - t0
    a, b = s_fast["statistic"].to_numpy(), s_slow["statistic"].to_numpy()
    same_nan = bool((np.isnan(a) == np.isnan(b)).all())
    ok = np.isfinite(a) & np.isfinite(b)
    rel = float(np.max(np.abs(a[ok] - b[ok]) / np.abs(b[ok]))) if ok.any() else float("nan")
    counts = defaultdict(int)
    for c in cands:
        counts[c.kind] += 1
    return {"n": n, "t_study": t_study, "counts": counts, "t_fast": t_fast, "t_slow": t_slow,
            "t_score_fast": t_score_fast, "t_score_slow": t_score_slow, "rel": rel,
            "same_nan": same_nan, "df_same": bool((s_fast["df_num"].fillna(-1)
                                                    == s_slow["df_num"].fillna(-1)).all()),
            "columns_fast": sum(x.shape[1] for x in fast),
            "columns_slow": sum(x.shape[1] for x in slow)}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="n = 10^5 instead of 10^6")
    args = ap.parse_args(argv)
    n = 100_000 if args.quick else 1_000_000
    r = run(n)
    print(f"n = {n:,}; Study construction (fit, for scale) {r['t_study']:.2f} s; "
          f"{sum(r['counts'].values())} candidates, {r['columns_slow']} columns through patsy, "
          f"{r['columns_fast']} through evaluate_block")
    print()
    print("| kind | candidates | patsy term_block (s) | evaluate_block (s) | × faster |")
    print("|---|---|---|---|---|")
    for kind in cm.KINDS:
        if kind not in r["counts"]:
            continue
        s, f = r["t_slow"][kind], r["t_fast"][kind]
        print(f"| {kind} | {r['counts'][kind]} | {s:.3f} | {f:.3f} | {s / f:.0f} |")
    s, f = sum(r["t_slow"].values()), sum(r["t_fast"].values())
    print(f"| **all** | {sum(r['counts'].values())} | {s:.2f} | {f:.2f} | {s / f:.0f} |")
    print(f"| score_candidates on those blocks | | {r['t_score_slow']:.2f} | "
          f"{r['t_score_fast']:.2f} | {r['t_score_slow'] / r['t_score_fast']:.2f} |")
    print()
    print(f"F statistics: largest relative difference {r['rel']:.1e}; same missing entries: "
          f"{r['same_nan']}; same numerator df: {r['df_same']}")


if __name__ == "__main__":
    main()
