"""Benchmark: how much memory a Study holds and needs, as a multiple of its design matrix.

Run ``python tests/benchmarks/bench_memory.py`` (``sensors(10**6)``) or ``--rows 100000``.
Prints a markdown table for the README.

What is measured (one process, ``tracemalloc``, which sees numpy's and pandas' allocations):

* **held**: memory allocated since just before ``Study(...)`` and still alive after a stage, i.e.
  everything the Study keeps (design, factor, influence, cross-validation, caches), but not the
  user's data frame, which exists before and after;
* **peak**: the most allocated at any moment during the stage, on top of what was held before it.

Stages follow the workbench: building the Study; the first look (fit, influence, pattern scores
and smoothers, cross-validation, every specification check, candidate terms); then one whole
refit step (add the leading term, then all of the above again).  Every figure is divided by the
bytes of the current design matrix (float64, rows x columns).  The goal in design terms is a peak
of at most 3x the design.  For scale, statsmodels' ``OLS(...).fit()`` of the same design alone is
also measured (its peak over the design it is given).

Data are invented and seeded (``afterfit.demo.sensors``).
"""
from __future__ import annotations

import argparse
import gc
import os
import resource
import time
import tracemalloc

MB = 2**20


def _stage(label, fn, rows, design_bytes):
    gc.collect()
    before, _ = tracemalloc.get_traced_memory()
    tracemalloc.reset_peak()
    t0 = time.perf_counter()
    out = fn()
    seconds = time.perf_counter() - t0
    held, peak = tracemalloc.get_traced_memory()
    d = design_bytes()
    rows.append({"stage": label, "seconds": seconds, "held_mb": held / MB,
                 "peak_extra_mb": (peak - before) / MB, "peak_mb": peak / MB,
                 "design_mb": d / MB})
    return out


def run(n: int) -> list[dict]:
    import afterfit as af

    df = af.demo.sensors(n)
    formula = df.attrs["first_formula"]
    box = {}
    rows: list[dict] = []
    gc.collect()
    tracemalloc.start()

    def design():
        s = box.get("study")
        return s._current.X.nbytes if s is not None else 1

    def first_look(s):
        s.fit, s.influence, s.pattern_scores(), s.meter(), s.checks()
        return s.candidates()

    def step(s, term):
        s.add(term, reason="benchmark step")
        return first_look(s)

    def build():
        box["study"] = af.Study(df, formula, seed=0)
        return box["study"]

    s = _stage("build the Study", build, rows, design)
    table = _stage("first look: fit, influence, profiles, CV, checks, candidates",
                   lambda: first_look(s), rows, design)
    term = table["term"].iloc[0]
    _stage(f"refit step: add {term}, then all of the above", lambda: step(s, term), rows, design)
    tracemalloc.stop()

    # for scale: statsmodels fitting the same design (no Study around it)
    import numpy as np
    import statsmodels.api as sm

    X = np.array(s._current.X)
    y = np.array(s._current.y)
    gc.collect()
    tracemalloc.start()
    t0 = time.perf_counter()
    sm.OLS(y, X).fit()
    seconds = time.perf_counter() - t0
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    rows.append({"stage": "for scale: statsmodels OLS(y, X).fit() alone", "seconds": seconds,
                 "held_mb": float("nan"), "peak_extra_mb": peak / MB, "peak_mb": peak / MB,
                 "design_mb": X.nbytes / MB})
    return rows


def table(rows: list[dict], n: int) -> str:
    out = [f"n = {n:,} (design {rows[-1]['design_mb']:.0f} MB at the last step)", "",
           "| stage | held after (× design) | peak during, above what was held (× design) | "
           "time |", "|---|---|---|---|"]
    for r in rows:
        held = ("–" if r["held_mb"] != r["held_mb"]
                else f"{r['held_mb']:,.0f} MB ({r['held_mb'] / r['design_mb']:.2f}×)")
        out.append(f"| {r['stage']} | {held} | {r['peak_extra_mb']:,.0f} MB "
                   f"({r['peak_extra_mb'] / r['design_mb']:.2f}×) | {r['seconds']:.1f} s |")
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024  # kB on Linux
    out += ["", f"Process peak resident memory (data, libraries and all): {rss:,.0f} MB; "
            f"{os.cpu_count()} CPUs."]
    return "\n".join(out)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=10**6)
    args = parser.parse_args()
    rows = run(args.rows)
    print(table(rows, args.rows))


if __name__ == "__main__":
    main()
