"""Hand-off: runnable statsmodels code and a Markdown audit log.

Column names, row labels and reasons are data.  In code they appear only inside escaped string
literals (``terms.string_literal``) or in formula text already quoted with ``Q("...")``; in comments
only after every non-printable character (line breaks included) is replaced, so no text from the
data can start a new line of code.  In Markdown they are escaped.
"""
from __future__ import annotations

import datetime as _dt
import math
import re

import numpy as np
import pandas as pd

from afterfit.model.terms import string_literal

__all__ = ["to_code", "audit", "CAUTIONS"]

CAUTIONS = (
    "Observational data: a term that improves the fit describes an association in these rows; "
    "it does not show that changing the variable would change the response.",
    "Extrapolation: the model describes the range of the data it was fitted on; predictions "
    "outside that range (or after the last time point) rest on assumptions the data cannot check.",
    "Small samples and searching: with few rows per parameter, or after examining many "
    "candidate terms, p-values and in-sample fit are optimistic; the cross-validated error and "
    "the sealed holdout are the honest guides.",
)


def _comment(text: str) -> str:
    """Text safe inside a one-line ``#`` comment (no line breaks of any kind)."""
    return "".join(ch if ch.isprintable() else " " for ch in str(text))


def _label_literal(label) -> str | None:
    if isinstance(label, (bool, np.bool_)):
        return None
    if isinstance(label, (int, np.integer)):
        return str(int(label))
    if isinstance(label, str):
        return string_literal(label)
    if isinstance(label, pd.Timestamp):
        return f"pd.Timestamp({string_literal(label.isoformat())})"
    return None


def _labels_code(labels, positions, var: str, reasons=None) -> list[str]:
    """Code that binds ``var`` to the given row labels (by label, else by position)."""
    lits = [_label_literal(x) for x in labels]
    if all(l is not None for l in lits):
        if reasons is None:
            body = ", ".join(lits)
            return [f"{var} = [{body}]"]
        lines = [f"{var} = {{"]
        for lit, r in zip(lits, reasons):
            lines.append(f"    {lit}: {string_literal(r)},")
        lines.append("}")
        return lines
    # labels that have no plain literal (tuples, floats, ...): refer to them by position
    pos = ", ".join(str(int(p)) for p in positions)
    lines = [f"{var} = df.index[[{pos}]]  # row positions in df"]
    if reasons is not None:
        lines = [f"{var} = dict(zip(df.index[[{pos}]], ["]
        lines += [f"    {string_literal(r)}," for r in reasons] + ["]))"]
    return lines


def to_code(study) -> str:
    """Python that reproduces ``study``'s current model with pandas and statsmodels only.

    The user's data must be in a variable ``df``; the result is assigned to ``result`` and its
    parameters are printed.
    """
    state = study.state
    model = study._current
    lines: list[str] = []
    today = _dt.date.today().isoformat()
    lines.append(f"# Model exported by afterfit on {today}; needs pandas and statsmodels, "
                 "with the data in `df`.")
    uses_np = bool(study.derived) or "np." in study.formula or len(model_nonfinite(model)) > 0
    if uses_np:
        lines.append("import numpy as np")
    lines += ["import pandas as pd", "import statsmodels.formula.api as smf", ""]
    lines.append("data = df")
    for name in study.derived:
        src = string_literal(study.declarations.time)
        lines += [
            f"# decimal years from the datetime column {_comment(study.declarations.time)}",
            f"_t = pd.to_datetime(df[{src}])",
            "data = data.assign(**{" + string_literal(name) + ": (_t.dt.year + (_t.dt.day_of_year - 1 "
            "+ (_t.dt.hour * 3600 + _t.dt.minute * 60 + _t.dt.second) / 86400.0) "
            "/ np.where(_t.dt.is_leap_year, 366.0, 365.0)).astype(float)})",
        ]
    if study._holdout_mask.any():
        frac = study.holdout_fraction
        lines.append(f"# sealed holdout ({frac:g} of the rows), kept out of the fit")
        if study._time is not None:
            k = int(study._holdout_mask.sum())
            tcol = string_literal(study.time_column)
            lines += [
                f"_order = data[{tcol}].reset_index(drop=True).sort_values(kind=\"stable\").index",
                f"holdout = data.index[_order[len(data) - {k}:]]",
            ]
        else:
            lines.append(f"holdout = data.sample(frac={frac!r}, random_state={study.seed}).index")
        lines.append("data = data.drop(index=holdout)")
    if state.excluded:
        pos = [p for p, _ in state.excluded]
        labels = study.data.index[pos]
        lines.append("# rows excluded during the study, each with its reason")
        lines += _labels_code(labels, pos, "excluded", reasons=[r for _, r in state.excluded])
        lines.append("data = data.drop(index=list(excluded))")
    bad = model_nonfinite(model)
    if len(bad):
        lines.append("# rows with an infinite value in a model column (statsmodels would refuse them)")
        lines += _labels_code(study.data.index[bad], bad, "nonfinite")
        lines.append("data = data.drop(index=nonfinite)")
    lines.append("")
    # term provenance as comments
    tags = _term_tags(study)
    lines.append("# terms (tag: reason)")
    for t in state.terms:
        tag, reason = tags.get(t, ("initial", ""))
        lines.append(f"#   {_comment(t)} ({tag}{': ' + _comment(reason) if reason else ''})")
    formula = study.formula
    lines.append(f"formula = {string_literal(formula)}")
    fit_args = "" if study.cov_type == "nonrobust" else f"cov_type={study.cov_type!r}"
    if study.weights_name is not None:
        w = string_literal(study.weights_name)
        lines.append(f"result = smf.wls(formula, data=data, weights=data[{w}]).fit({fit_args})")
    else:
        lines.append(f"result = smf.ols(formula, data=data).fit({fit_args})")
    lines.append("print(result.params)")
    return "\n".join(lines) + "\n"


def model_nonfinite(model) -> np.ndarray:
    """Positions of rows the Study dropped for ±inf (patsy only drops NaN by itself)."""
    cached = getattr(model, "_nonfinite", None)
    if cached is not None:
        return cached
    dropped = model.dropped
    if len(dropped) == 0:
        out = np.empty(0, dtype=np.intp)
    else:
        sel = np.isin(model.avail, dropped)
        y = model.cache.response(model.study.response)[sel]
        has_inf = np.isinf(y)
        for tc in model.term_columns:
            has_inf |= np.isinf(tc.values[sel]).any(axis=1)
        out = model.avail[sel][has_inf]
    model._nonfinite = out
    return out


def _term_tags(study) -> dict:
    out = {}
    for s in study.steps[: study.position + 1]:
        if s.kind == "add":
            for t in s.detail[len("add "):].split(" + "):
                out[t] = (s.tag or "added", s.reason)
        elif s.kind == "remove":
            for t in s.detail[len("remove "):].split(" + "):
                out.pop(t, None)
    return out


_MD_ESC = str.maketrans({"<": "&lt;", ">": "&gt;", "&": "&amp;", "|": "\\|", "`": "\\`",
                         "*": "\\*", "_": "\\_", "[": "\\[", "]": "\\]", "#": "\\#"})


def _md(text) -> str:
    s = "".join(ch if ch.isprintable() else " " for ch in str(text))
    return s.translate(_MD_ESC)


def _num(x, digits=4) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "–"
    return f"{x:.{digits}g}"


def audit(study) -> str:
    """Markdown: data and declarations, every step with its reason, CV, holdout, checks, cautions."""
    fit = study.fit
    out: list[str] = []
    out.append("# afterfit audit")
    out.append("")
    out.append(f"Generated {_dt.datetime.now(_dt.timezone.utc).isoformat(timespec='seconds')}.")
    out.append("")
    out.append("## Data")
    out.append(f"- rows in the data: {len(study.data)}; used in the final fit: {fit.nobs}")
    out.append(f"- dropped for missing or non-finite values: {len(study.dropped)}")
    out.append(f"- excluded by the analyst: {len(study.state.excluded)}")
    if study.holdout_fraction > 0:
        out.append(f"- sealed holdout: {len(study.holdout_rows)} rows "
                   f"({'latest in time' if study._time is not None else 'random, seed ' + str(study.seed)})")
    out.append(f"- data fingerprint (SHA-256): `{study.fingerprint()[:16]}…`")
    out.append("")
    d = study.declarations
    out.append("## Declarations")
    out.append(f"- time: {_md(d.time) if d.time else 'none'}"
               + (f" (read as decimal years in {_md(study.time_column)})"
                  if study.time_column and study.time_column != d.time else ""))
    out.append(f"- period: {', '.join(_num(p) for p in d.period) or 'none'}")
    out.append(f"- groups: {', '.join(_md(g) for g in d.groups) or 'none'}")
    if d.plausible:
        for k, v in d.plausible.items():
            out.append(f"- plausible: {_md(k)}" + (f" — {_md(v)}" if v else ""))
    else:
        out.append("- plausible: none")
    out.append(f"- cross-validation: {study.cv_scheme}, {study.k_folds} folds, seed {study.seed}; "
               f"standard errors: {study.cov_type}; candidate multiplicity control: "
               f"{'Holm' if study.multiplicity == 'holm' else 'Benjamini–Hochberg'} at "
               f"alpha {study.alpha:g}")
    out.append("")
    out.append("## Steps")
    out.append("| # | time (UTC) | action | tag | reason | rows | train RMSE | CV RMSE | "
               "candidates examined | after holdout |")
    out.append("|---|---|---|---|---|---|---|---|---|---|")
    meter = study.meter()
    for s in study.steps:
        m = meter[meter["step"] == s.index]
        tr = _num(m["rmse_train"].iloc[0]) if len(m) else "(undone)"
        cv = _num(m["rmse_cv"].iloc[0]) if len(m) else "(undone)"
        out.append(f"| {s.index} | {s.time} | {_md(s.detail)} | {s.tag or ''} | {_md(s.reason)} | "
                   f"{s.n_rows} | {tr} | {cv} | {s.examined} | {'yes' if s.after_holdout else ''} |")
    if study.position < len(study.steps) - 1:
        out.append(f"\nCurrent position: step {study.position} (later steps were undone).")
    if study._discarded:
        out.append("")
        out.append("Steps undone and then replaced by other actions (kept for the record):")
        for s in study._discarded:
            out.append(f"- {s.time}: {_md(s.detail)}" + (f" — {_md(s.reason)}" if s.reason else ""))
    speculative = [s for s in study.steps[: study.position + 1] if s.tag == "speculative"]
    total_examined = int(meter["examined"].iloc[-1]) if len(meter) else 0
    out.append("")
    out.append(f"Candidate terms examined over the study: {total_examined}. "
               f"Speculative terms in the final model: {len(speculative)}.")
    out.append("")
    out.append("## Final model")
    out.append(f"`{_md(study.formula)}` — {fit.nobs} rows, R² {_num(fit.r2)}, "
               f"RMSE {_num(fit.rmse)}, AIC {_num(fit.aic, 6)}, BIC {_num(fit.bic, 6)}")
    if fit.aliased:
        out.append(f"\nAliased (dropped for rank deficiency): {', '.join(_md(a) for a in fit.aliased)}")
    out.append("")
    out.append("| term | estimate | std. error | p |")
    out.append("|---|---|---|---|")
    for name in fit.params.index:
        out.append(f"| {_md(name)} | {_num(fit.params[name], 6)} | {_num(fit.bse[name])} | "
                   f"{_num(fit.pvalues[name], 3)} |")
    out.append("")
    cv = study.cv
    last = meter.iloc[-1]
    pick = meter[meter["one_se"]]
    out.append("## Cross-validation")
    out.append(f"- training RMSE {_num(cv.rmse_train)}, cross-validated RMSE {_num(cv.rmse_cv)} "
               f"(± {_num(cv.rmse_cv_se)} s.e.), gap {_num(last['gap'])}")
    if len(pick):
        out.append(f"- one-standard-error rule picks step {int(pick['step'].iloc[0])}: "
                   f"{_md(pick['label'].iloc[0])}")
    rec = study.holdout_record
    if rec is not None:
        out.append(f"- sealed holdout opened at step {rec['step']}: RMSE {_num(rec['rmse_holdout'])} "
                   f"on {rec['n_holdout']} rows (CV RMSE then {_num(rec['rmse_cv'])})")
    elif study.holdout_fraction > 0:
        out.append("- sealed holdout: not opened yet")
    out.append("")
    out.append("## Checks on the final model")
    try:
        checks = study.checks()
        out.append("| test | statistic | df | p | reading |")
        out.append("|---|---|---|---|---|")
        for name, row in checks.iterrows():
            out.append(f"| {_md(name)} | {_num(row.get('statistic'))} | {_md(row.get('df', ''))} | "
                       f"{_num(row.get('pvalue'), 3)} | {_md(row.get('reading', ''))} |")
    except Exception as exc:  # the audit must still be written; say what is missing
        out.append(f"(checks could not be computed: {_md(exc)})")
    out.append("")
    out.append("## Cautions")
    for c in CAUTIONS:
        out.append(f"- {c}")
    if fit.nobs < 10 * max(fit.rank, 1):
        out.append(f"- Only {fit.nobs} rows for {fit.rank} parameters (fewer than 10 per parameter).")
    return "\n".join(out) + "\n"
