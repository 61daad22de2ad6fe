"""Candidate terms: catalogue, evidence, multiplicity, tags, residual pattern scores.

Reference sources, named beside each check:
- statsmodels ``RegressionResults.compare_f_test`` of the full refit (current model + term) against
  the current model: the F statistic, its p-value and the numerator degrees of freedom;
- statsmodels ``multipletests`` (Holm, Benjamini-Hochberg);
- scipy ``stats.f_oneway`` and ``stats.t.interval`` for the residual pattern scores and bands;
- scikit-learn ``LinearRegression`` refitted per fold for the cross-validated RMSE change.
Data are invented (seeded) and serve only as inputs to those comparisons.
"""
from __future__ import annotations

import os
import warnings

import numpy as np
import pandas as pd
import patsy
import pytest
import statsmodels.formula.api as smf
from scipy import stats
from statsmodels.stats.multitest import multipletests
from statsmodels.tools.sm_exceptions import SingularMatrixWarning

from afterfit.model.candidates import (
    RANK_COLUMNS,
    Candidate,
    adjust_pvalues,
    binned_means,
    catalogue,
    delta_cv,
    pattern_scores,
    rank_candidates,
    score_candidates,
    score_candidates_in_groups,
)
from afterfit.model.crossval import make_folds
from afterfit.model.ols import fit_ols
from afterfit.model.terms import Declarations, quote_name, split_formula


# ---------------------------------------------------------------------------------------------
# helpers


def _frame(n=240, seed=7):
    rng = np.random.default_rng(seed)
    df = pd.DataFrame({
        "x": rng.uniform(1, 10, n),
        "z": rng.normal(size=n),
        "u": rng.normal(size=n),
        "g": rng.choice(list("abcd"), n),
        "t": 2015 + np.arange(n) / 12,
        "w": rng.uniform(0.3, 3.0, n),
    })
    df["y"] = (1 + 0.5 * df.x + 0.08 * (df.x - 5) ** 2 + df.z
               + 0.4 * np.sin(2 * np.pi * df.t) + rng.normal(size=n))
    return df


def _fit(formula, df, weights=None):
    y, X = patsy.dmatrices(formula, df, NA_action="raise")
    w = None if weights is None else df[weights].to_numpy()
    return fit_ols(np.asarray(X), np.asarray(y).ravel(), weights=w,
                   names=X.design_info.column_names)


def _block(term, df):
    return np.asarray(patsy.dmatrix("0 + " + term, df, NA_action="raise"))


def _reference(formula, term, df, weights=None):
    """F, p, df_num of the nested-model test from statsmodels' full refit."""
    with warnings.catch_warnings():
        # the full design repeats a direction for some terms (a spline holds the line; C(g):x
        # with x present); statsmodels warns and handles it with its pseudo-inverse
        warnings.simplefilter("ignore", SingularMatrixWarning)
        if weights is None:
            small = smf.ols(formula, df).fit()
            full = smf.ols(formula + " + " + term, df).fit()
        else:
            small = smf.wls(formula, df, weights=df[weights]).fit()
            full = smf.wls(formula + " + " + term, df, weights=df[weights]).fit()
        return full.compare_f_test(small)


def _catalogue(df, formula, decl=None, ls=None, **kw):
    response, terms, _ = split_formula(formula)
    decl = decl or Declarations.build(df.columns)
    return catalogue(df, response=response, model_terms=terms, declarations=decl, fit=ls, **kw)


# ---------------------------------------------------------------------------------------------
# evidence equals the full refit's nested F test


CASES = [
    ("y ~ x + z + C(g)", None),
    ("y ~ x + z + C(g)", "w"),  # weighted least squares
    ("y ~ x + t", None),  # time in decimal years: large offsets
    ("y ~ z + C(g) + x:z", "w"),
]


@pytest.mark.parametrize("formula,weights", CASES)
@pytest.mark.parametrize("algorithm", ["auto", "rows"])
def test_partial_f_equals_statsmodels_refit(formula, weights, algorithm):
    df = _frame()
    ls = _fit(formula, df, weights)
    decl = Declarations.build(df.columns, time="t", period=1.0, groups=["g"])
    cands = _catalogue(df, formula, decl, ls=ls, skip=("w",))
    extra = [Candidate('cr(u, df=4, constraints="center")', "u spline", "spline", ("u",)),
             Candidate("C(g):u", "g slope on u", "group_slope", ("g", "u"))]
    cands = cands + extra
    kinds = {c.kind for c in cands}
    assert {"power2", "spline", "hinge", "group_slope", "cycle"} <= kinds
    blocks = [_block(c.term, df) for c in cands]
    sc = score_candidates(ls, blocks, algorithm=algorithm)
    assert sc.attrs["examined"] == len(cands)
    for c, row in zip(cands, sc.itertuples()):
        F, p, d = _reference(formula, c.term, df, weights)  # source: statsmodels compare_f_test
        assert row.df_num == d, c.term
        np.testing.assert_allclose(row.statistic, F, rtol=1e-8, err_msg=c.term)
        np.testing.assert_allclose(row.pvalue, p, rtol=1e-8, atol=1e-300, err_msg=c.term)
        assert row.df_den == ls.df_resid - d


def test_group_slopes_count_the_right_degrees_of_freedom():
    # C(g):x with x in the model adds levels - 1 directions, without x all levels
    df = _frame()
    ls = _fit("y ~ x + C(g)", df)
    blocks = [_block("C(g):x", df), _block("C(g):z", df)]
    sc = score_candidates(ls, blocks)
    assert sc["df_num"].tolist() == [3.0, 4.0]
    for term, row in zip(["C(g):x", "C(g):z"], sc.itertuples()):
        F, p, d = _reference("y ~ x + C(g)", term, df)  # source: statsmodels compare_f_test
        assert d == row.df_num
        np.testing.assert_allclose(row.statistic, F, rtol=1e-8)


def test_term_already_spanned_adds_nothing():
    df = _frame()
    ls = _fit("y ~ x + C(g)", df)
    sc = score_candidates(ls, [_block("C(g)", df), 3.0 * df["x"].to_numpy()])
    assert sc["statistic"].isna().all()
    assert sc["note"].str.contains("adds nothing").all()
    assert sc.attrs["examined"] == 0


def test_data_chosen_positions_are_bonferroni_corrected():
    df = _frame()
    formula = "y ~ x + t"
    ls = _fit(formula, df)
    cands = _catalogue(df, formula, Declarations.build(df.columns, time="t"), ls=ls, skip=("w",))
    step = next(c for c in cands if c.kind == "step")
    hinge = next(c for c in cands if c.kind == "hinge" and c.sources == ("x",))
    assert step.searched > 1 and hinge.searched == 9
    sc = score_candidates(ls, [_block(step.term, df), _block(hinge.term, df)],
                          searched=[step.searched, hinge.searched])
    for c, row in zip([step, hinge], sc.itertuples()):
        _, p, _ = _reference(formula, c.term, df)  # source: statsmodels compare_f_test
        np.testing.assert_allclose(row.pvalue, min(1.0, p * c.searched), rtol=1e-8)
        assert "Bonferroni" in row.note


def test_chosen_knot_maximises_the_refit_f():
    # the hinge knot must be the decile whose refit F (statsmodels) is largest
    df = _frame()
    formula = "y ~ x + z"
    ls = _fit(formula, df)
    cands = _catalogue(df, formula, ls=ls, skip=("w", "t"))
    hinge = next(c for c in cands if c.kind == "hinge" and c.sources == ("x",))
    knots = [float(k) for k in np.unique(np.quantile(df["x"], np.linspace(0.1, 0.9, 9)))]
    fs = [_reference(formula, f"np.maximum(x - {k!r}, 0)", df)[0] for k in knots]
    best = knots[int(np.argmax(fs))]
    assert hinge.term == f"np.maximum(x - {best!r}, 0)"


def test_missing_or_infinite_rows_give_nan_and_a_note():
    df = _frame()
    ls = _fit("y ~ x + z", df)
    good = df["u"].to_numpy()
    holes = good.copy()
    holes[[3, 50]] = np.nan
    with np.errstate(divide="ignore"):
        logs = np.log(np.where(np.arange(len(df)) == 9, 0.0, df["x"].to_numpy()))  # log of 0
    sc = score_candidates(ls, [good, holes, logs, np.column_stack([good, good * np.inf])])
    assert np.isfinite(sc.loc[0, "statistic"])
    assert sc.loc[1:, "statistic"].isna().all() and sc.loc[1:, "p_adjusted"].isna().all()
    assert "2 of 240 rows" in sc.loc[1, "note"]
    assert "1 of 240 rows" in sc.loc[2, "note"]
    assert sc.attrs["examined"] == 1
    # the valid candidate's number is unchanged by its neighbours (source: statsmodels)
    F, _, _ = _reference("y ~ x + z", "u", df)
    np.testing.assert_allclose(sc.loc[0, "statistic"], F, rtol=1e-8)


def test_block_shape_errors_say_what_to_do():
    df = _frame()
    ls = _fit("y ~ x", df)
    with pytest.raises(ValueError, match="one row per fitted row"):
        score_candidates(ls, [np.ones(10)])
    with pytest.raises(ValueError, match="'holm' or 'bh'"):
        score_candidates(ls, [df["z"].to_numpy()], method="bonferroni")
    with pytest.raises(ValueError, match="searched"):
        score_candidates(ls, [df["z"].to_numpy()], searched=[0])


# ---------------------------------------------------------------------------------------------
# multiplicity


@pytest.mark.parametrize("method,sm_method", [("holm", "holm"), ("bh", "fdr_bh")])
def test_adjustment_matches_statsmodels_multipletests(method, sm_method):
    rng = np.random.default_rng(2)
    p = np.concatenate([rng.uniform(size=25), rng.uniform(0, 1e-3, 10), [0.02, 0.02, 1.0, 0.0]])
    rng.shuffle(p)
    ref = multipletests(p, method=sm_method)[1]  # source: statsmodels multipletests
    np.testing.assert_allclose(adjust_pvalues(p, method=method), ref, rtol=1e-12, atol=1e-15)
    # NaN entries (candidates not examined) are left out of the family
    with_nan = np.concatenate([p, [np.nan, np.nan]])
    out = adjust_pvalues(with_nan, method=method)
    assert np.isnan(out[-2:]).all()
    np.testing.assert_allclose(out[:-2], ref, rtol=1e-12, atol=1e-15)


def test_score_frame_adjusts_over_examined_candidates():
    df = _frame()
    ls = _fit("y ~ x + z", df)
    blocks = [_block(t, df) for t in ["I(x ** 2)", "u", "C(g)", "np.log(x)"]]
    for method, sm in [("holm", "holm"), ("bh", "fdr_bh")]:
        sc = score_candidates(ls, blocks, method=method)
        ref = multipletests(sc["pvalue"], method=sm)[1]  # source: statsmodels multipletests
        np.testing.assert_allclose(sc["p_adjusted"], ref, rtol=1e-12)
        assert sc.attrs["examined"] == 4 and sc.attrs["method"] == method


# ---------------------------------------------------------------------------------------------
# catalogue


def test_catalogue_kinds_labels_and_stated_rules():
    df = _frame()
    decl = Declarations.build(df.columns, time="t", period=[1.0], groups=["g"],
                              plausible={"x": "growth slows with age", "u": ""})
    cands = _catalogue(df, "y ~ x + z + C(g) + t", decl, skip=("w",))
    by = {(c.kind, c.sources): c for c in cands}
    assert by[("power2", ("x",))].stated
    assert "growth slows with age" in by[("power2", ("x",))].grounds
    assert not by[("power2", ("z",))].stated and by[("power2", ("z",))].grounds == ""
    assert by[("linear", ("u",))].stated
    assert by[("cycle", ("t",))].stated and "period 1" in by[("cycle", ("t",))].grounds
    assert by[("cycle2", ("t",))].stated
    assert not by[("step", ("t",))].stated  # a data-chosen change point needs its own grounds
    assert by[("group_slope", ("g", "x"))].stated
    assert by[("group_slope", ("g", "x"))].label == "g-specific slope on x"
    assert by[("interaction", ("x", "z"))].label == "x × z interaction"
    assert not by[("interaction", ("x", "z"))].stated  # z is not declared plausible
    assert by[("step", ("t",))].label.startswith("step change in t near 20")
    assert by[("spline", ("x",))].term == 'cr(x, df=4, constraints="center")'
    assert {c.kind for c in cands} <= {
        "linear", "power2", "spline", "log", "hinge", "trend", "step", "cycle", "cycle2",
        "group", "group_slope", "interaction"}
    # the time variable gets a centred square and no log
    assert by[("power2", ("t",))].term.startswith("I((t - 20")
    assert ("log", ("t",)) not in by


def test_trend_is_stated_when_time_is_declared():
    df = _frame()
    decl = Declarations.build(df.columns, time="t")
    trend = [c for c in _catalogue(df, "y ~ x", decl, skip=("w",)) if c.kind == "trend"]
    assert len(trend) == 1 and trend[0].stated and trend[0].term == "t"


def test_datetime_time_uses_the_numeric_twin_and_names_calendar_cycles():
    df = _frame()
    df["when"] = pd.Timestamp("2015-01-01") + pd.to_timedelta(np.arange(len(df)) * 30, "D")
    df["when_years"] = df["when"].dt.year + (df["when"].dt.day_of_year - 1) / 365.25
    decl = Declarations.build(df.columns, time="when", period=[1.0, 0.25])
    cands = _catalogue(df, "y ~ x", decl, time="when_years", skip=("w", "t"))
    labels = {c.label for c in cands if c.kind == "cycle"}
    assert labels == {"yearly cycle", "quarterly cycle"}
    assert all("when_years" in c.term for c in cands if c.kind in ("cycle", "trend", "step"))
    assert not any("when)" in c.term or c.term == "when" for c in cands)


def test_never_proposes_a_term_already_in_the_model():
    df = _frame()
    formula = "y ~ x + z + I(x ** 2) + x:C(g) + C(g) + x:z + np.log(x)"
    cands = _catalogue(df, formula, Declarations.build(df.columns, groups=["g"]),
                       skip=("w", "t"))
    terms = [c.term for c in cands]
    for present in ["I(x ** 2)", "C(g):x", "x:C(g)", "C(g)", "x:z", "np.log(x)", "x", "z"]:
        assert present not in terms
    # x is in the model, so its hinge is the hinge alone
    assert any(c.kind == "hinge" and c.term.startswith("np.maximum(x") for c in cands)
    # u is not: its square comes with its line
    assert any(c.term == "u + I(u ** 2)" for c in cands)


def test_constant_all_missing_and_two_valued_columns():
    df = _frame()
    df["const"] = 4.0
    df["empty"] = np.nan
    df["two"] = np.tile([0.0, 1.0], len(df) // 2)
    df["one_level"] = "same"
    cands = _catalogue(df, "y ~ x", skip=("w", "t"))  # no error
    sources = {s for c in cands for s in c.sources}
    assert not {"const", "empty", "one_level"} & sources
    assert {c.kind for c in cands if c.sources == ("two",)} == {"linear"}


def test_categorical_detection():
    df = _frame()
    df["flag"] = df["z"] > 0
    df["site"] = pd.Categorical(np.where(df["u"] > 0, "north", "south"))
    df["code"] = np.where(df["u"] > 1, 2, 1)  # few-valued integers: numeric unless declared
    cands = _catalogue(df, "y ~ x", skip=("w", "t"))
    groups = {c.sources[0] for c in cands if c.kind == "group"}
    assert groups == {"g", "flag", "site"}
    decl = Declarations.build(df.columns, groups=["code"])
    cands = _catalogue(df, "y ~ x", decl, skip=("w", "t"))
    assert any(c.kind == "group" and c.term == "C(code)" and c.stated for c in cands)


HOSTILE = ['a"b', "sp ace", "back\\slash", '__import__("os").system("touch canary")', "1 + 1",
           "new\nline", "ünï", "x') + eval('1"]


def test_hostile_names_are_quoted_and_evaluate_to_their_column(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    rng = np.random.default_rng(4)
    n = 120
    df = pd.DataFrame({name: rng.uniform(1, 5, n) for name in HOSTILE})
    df["grp ' x"] = rng.choice(["p", "q"], n)
    df["y"] = rng.normal(size=n)
    formula = "y ~ " + " + ".join(quote_name(c) for c in HOSTILE[:3])
    y, X = patsy.dmatrices(formula, df)
    ls = fit_ols(np.asarray(X), np.asarray(y).ravel())
    decl = Declarations.build(df.columns, plausible={HOSTILE[3]: 'reason "quoted"'})
    cands = _catalogue(df, formula, decl, ls=ls)
    assert cands
    seen = set()
    for c in cands:
        assert all(s in df.columns for s in c.sources)
        block = _block(c.term, df)  # patsy evaluates the text: it must read only the data
        assert np.isfinite(block).all()
        src = df[c.sources[0]]
        if c.kind == "linear":
            np.testing.assert_array_equal(block[:, 0], src.to_numpy())
            seen.add(c.sources[0])
        if c.kind == "power2":
            # an exact square of the column: (x - c)^2 = x^2 - 2cx + c^2
            x = src.to_numpy()
            coef, *_ = np.linalg.lstsq(np.column_stack([np.ones(n), x, x**2]), block[:, -1],
                                       rcond=None)
            np.testing.assert_allclose(coef[2], 1.0, rtol=1e-9)
            np.testing.assert_allclose(np.column_stack([np.ones(n), x, x**2]) @ coef,
                                       block[:, -1], rtol=1e-9)
        if c.kind == "log":
            np.testing.assert_allclose(block[:, 0], np.log(src.to_numpy()))
        if c.kind == "group":
            assert block.shape[1] == 2
    assert set(HOSTILE[3:]) <= seen
    stated = [c for c in cands if c.stated]
    assert stated and all(c.sources == (HOSTILE[3],) for c in stated)
    # and the tests themselves run through patsy without executing the text
    blocks = [_block(c.term, df) for c in cands]
    sc = score_candidates(ls, blocks)
    assert sc["statistic"].notna().sum() == len(cands)
    assert not (tmp_path / "canary").exists()
    assert not os.path.exists("canary")


def test_declarations_must_be_built():
    df = _frame()
    with pytest.raises(TypeError, match="Declarations.build"):
        catalogue(df, response="y", model_terms=["x"], declarations={"time": "t"})
    with pytest.raises(ValueError, match="numeric"):
        catalogue(df, response="y", model_terms=["x"], declarations=Declarations.build(df.columns),
                  time="g")


def test_catalogue_with_residuals_only_picks_the_same_step():
    # with resid= (no fit) the step is chosen by a simple regression on the residuals; for a
    # model holding only an intercept both choices see the same centred columns
    df = _frame()
    df["y2"] = np.where(df["t"] >= 2025, 2.0, 0.0) + np.random.default_rng(1).normal(size=len(df))
    ls = _fit("y2 ~ 1", df)
    decl = Declarations.build(df.columns, time="t")
    a = _catalogue(df, "y2 ~ 1", decl, ls=ls, skip=("w", "y"))
    b = _catalogue(df, "y2 ~ 1", decl, resid=ls.resid, skip=("w", "y"))
    step_a = next(c for c in a if c.kind == "step")
    step_b = next(c for c in b if c.kind == "step")
    assert step_a.term == step_b.term
    # the planted change is at 2025 (with 140 possible positions, all are tried)
    assert abs(float(step_a.term[len("I(t >= "):-1]) - 2025) < 0.3


# ---------------------------------------------------------------------------------------------
# ranking


def test_rank_columns_tags_and_order():
    df = _frame()
    formula = "y ~ x + z + C(g)"
    ls = _fit(formula, df)
    decl = Declarations.build(df.columns, time="t", period=1.0, plausible={"u": "sensor drift"})
    cands = _catalogue(df, formula, decl, ls=ls, skip=("w",))
    sc = score_candidates(ls, [_block(c.term, df) for c in cands],
                          searched=[c.searched for c in cands])
    ranked = rank_candidates(cands, sc)
    assert tuple(ranked.columns) == RANK_COLUMNS
    assert ranked["delta_cv"].isna().all()
    tags = ranked["tag"].tolist()
    order = {"stated": 0, "evident": 1, "speculative": 2}
    assert [order[t] for t in tags] == sorted(order[t] for t in tags)
    for tag, part in ranked.groupby("tag", sort=False):
        p = part["pvalue"].to_numpy()
        finite = p[np.isfinite(p)]
        assert (np.diff(finite) >= 0).all()
        assert not np.isfinite(p[len(finite):]).any()  # missing evidence last
    stated = ranked[ranked.tag == "stated"]
    assert set(stated["kind"]) >= {"cycle", "linear"}
    evident = ranked[ranked.tag == "evident"]
    assert (evident["p_adjusted"] < 0.05).all()
    assert (ranked[ranked.tag == "speculative"]["p_adjusted"] >= 0.05).all()
    # the planted curvature in x is found (the frame's y has 0.08 (x - 5)^2)
    assert evident["sources"].iloc[0] == ("x",)


def test_rank_requires_one_score_row_per_candidate():
    c = Candidate("x", "x, linear", "linear", ("x",))
    with pytest.raises(ValueError, match="same order"):
        rank_candidates([c, c], pd.DataFrame({"statistic": [1.0], "df_num": [1.0],
                                              "df_den": [9.0], "pvalue": [0.3],
                                              "p_adjusted": [0.3], "note": [""]}))
    with pytest.raises(ValueError, match="kind"):
        Candidate("x", "x", "cubic", ("x",))


# ---------------------------------------------------------------------------------------------
# cross-validated change


def test_delta_cv_matches_refits_per_fold():
    from sklearn.linear_model import LinearRegression

    df = _frame(n=150)
    ls = _fit("y ~ x + z", df)
    folds = make_folds(len(df), k=5, seed=1)
    blocks = [_block("I(x ** 2)", df), _block("u", df), _block("C(g)", df)]
    got = delta_cv(ls.X, ls.y, folds, blocks, top=2)
    assert np.isnan(got[2])

    def rmse_cv(X):
        # source: scikit-learn LinearRegression refitted on each training set (pooled RMSE)
        err = np.empty(len(df))
        for f in np.unique(folds):
            test = folds == f
            model = LinearRegression(fit_intercept=False).fit(X[~test], ls.y[~test])
            err[test] = ls.y[test] - model.predict(X[test])
        return np.sqrt(np.mean(err**2))

    base = rmse_cv(ls.X)
    for i in range(2):
        np.testing.assert_allclose(got[i], rmse_cv(np.hstack([ls.X, blocks[i]])) - base,
                                   rtol=1e-7, atol=1e-12)


# ---------------------------------------------------------------------------------------------
# residual pattern scores


def test_pattern_scores_equal_one_way_anova():
    rng = np.random.default_rng(5)
    n = 500
    x = rng.normal(size=n)
    g = rng.choice(["a", "b", "c"], n)
    e = 0.5 * x**2 + (g == "b") + rng.normal(size=n)
    out = pattern_scores(e, {"x": x, "g": g, "fitted": rng.normal(size=n)}, bins=8)
    assert list(out.index) == ["x", "g", "fitted"]
    assert out.loc["x", "kind"] == "numeric" and out.loc["g", "kind"] == "categorical"
    for name, labels in [("x", pd.qcut(x, 8, labels=False)), ("g", g)]:
        groups = [e[labels == k] for k in np.unique(labels)]
        ref = stats.f_oneway(*groups)  # source: scipy one-way ANOVA
        np.testing.assert_allclose(out.loc[name, "pvalue"], ref.pvalue, rtol=1e-9)
        grand = e.mean()
        ssb = sum(len(gr) * (gr.mean() - grand) ** 2 for gr in groups)
        np.testing.assert_allclose(out.loc[name, "score"], ssb / ((e - grand) ** 2).sum(),
                                   rtol=1e-12)
        assert out.loc[name, "bins_used"] == len(groups)
    assert out.loc["x", "score"] > out.loc["fitted", "score"]


def test_weighted_pattern_score_equals_wls_f_test():
    rng = np.random.default_rng(6)
    n = 300
    d = pd.DataFrame({"x": rng.uniform(size=n), "w": rng.uniform(0.5, 2, n)})
    d["e"] = np.sin(6 * d.x) + rng.normal(size=n)
    d["bin"] = pd.qcut(d.x, 5, labels=False)
    out = pattern_scores(d["e"], {"x": d["x"]}, bins=5, weights=d["w"])
    full = smf.wls("e ~ C(bin)", d, weights=d["w"]).fit()
    small = smf.wls("e ~ 1", d, weights=d["w"]).fit()
    F, p, _ = full.compare_f_test(small)  # source: statsmodels compare_f_test (weighted ANOVA)
    np.testing.assert_allclose(out.loc["x", "pvalue"], p, rtol=1e-9)
    np.testing.assert_allclose(out.loc["x", "score"], 1 - full.ssr / small.ssr, rtol=1e-9)


def test_pattern_scores_edge_cases():
    e = np.arange(10.0)
    out = pattern_scores(e, {"c": np.ones(10), "few": np.repeat([1.0, 2.0], 5),
                             "gap": np.r_[np.nan, np.arange(9.0)]}, bins=4)
    assert out.loc["c", "score"] == 0 and np.isnan(out.loc["c", "pvalue"])
    assert out.loc["few", "bins_used"] == 2  # few distinct values: one bin per value
    assert out.loc["gap", "n_used"] == 9
    with pytest.raises(ValueError, match="values but resid"):
        pattern_scores(e, {"x": np.ones(3)})


def test_binned_means_band_is_a_t_interval():
    rng = np.random.default_rng(8)
    x = rng.uniform(size=400)
    e = x + rng.normal(size=400)
    out = binned_means(x, e, bins=5)
    labels = pd.qcut(x, 5, labels=False)
    assert len(out) == 5 and out["count"].sum() == 400
    for k, row in out.iterrows():
        part = e[labels == k]
        lo, hi = stats.t.interval(0.95, len(part) - 1, loc=part.mean(),
                                  scale=stats.sem(part))  # source: scipy t interval
        np.testing.assert_allclose([row["mean"], row["lower"], row["upper"]],
                                   [part.mean(), lo, hi], rtol=1e-10)
        np.testing.assert_allclose(row["centre"], x[labels == k].mean())
    cat = binned_means(np.where(x > 0.5, "hi", "lo"), e)
    assert list(cat["centre"]) == ["hi", "lo"]


def test_zero_weight_rows_take_no_part():
    # rows with weight 0 are left out (as the kernel does); their block values may be missing
    df = _frame()
    df.loc[:19, "w"] = 0.0
    ls = _fit("y ~ x + z", df, weights="w")
    holes = df["u"].to_numpy().copy()
    holes[:5] = np.nan  # only on zero-weight rows
    sc = score_candidates(ls, [holes, _block("I(x ** 2)", df)])
    kept = df.iloc[20:]
    for term, row in zip(["u", "I(x ** 2)"], sc.itertuples()):
        # source: statsmodels compare_f_test on the positively weighted rows
        F, p, d = _reference("y ~ x + z", term, kept, weights="w")
        np.testing.assert_allclose([row.statistic, row.pvalue], [F, p], rtol=1e-8)
        assert row.df_den == len(kept) - 3 - 1


def test_rank_applies_a_missing_search_correction():
    # scoring without searched= must not let a data-chosen step look better than it is
    df = _frame()
    formula = "y ~ x + t"
    ls = _fit(formula, df)
    cands = _catalogue(df, formula, Declarations.build(df.columns, time="t"), ls=ls, skip=("w",))
    blocks = [_block(c.term, df) for c in cands]
    right = rank_candidates(cands, score_candidates(ls, blocks,
                                                    searched=[c.searched for c in cands]))
    forgot = rank_candidates(cands, score_candidates(ls, blocks))
    pd.testing.assert_frame_equal(right, forgot)
    step = right[right.kind == "step"].iloc[0]
    searched = next(c.searched for c in cands if c.kind == "step")
    assert searched > 1
    _, p, _ = _reference(formula, step.term, df)  # source: statsmodels compare_f_test
    np.testing.assert_allclose(step.pvalue, min(1.0, p * searched), rtol=1e-8)


@pytest.mark.parametrize("weights", [None, "w"])
def test_scoring_in_groups_equals_scoring_at_once(weights):
    # the Study makes candidates' columns a group at a time to bound memory; every number must
    # be the one from scoring all blocks together, and the evidence statsmodels' nested F test
    df = _frame()
    formula = "y ~ x + z"
    ls = _fit(formula, df, weights)
    terms = ["I(x ** 2)", "C(g)", "C(g):x", "u", "np.sin(2 * np.pi * t)", "x:z", "I(z ** 3)"]
    blocks = [_block(t, df) for t in terms]
    searched = [1, 1, 1, 1, 1, 3, 1]
    whole = score_candidates(ls, blocks, searched=searched, method="holm")
    grouped = score_candidates_in_groups(ls, [lambda b=b: b for b in blocks], searched=searched,
                                         method="holm", max_columns=3)
    assert grouped.attrs["examined"] == whole.attrs["examined"] == len(terms)
    pd.testing.assert_frame_equal(grouped.drop(columns="note"), whole.drop(columns="note"),
                                  rtol=1e-12)
    assert list(grouped["note"]) == list(whole["note"])
    F, p, d = _reference(formula, "C(g):x", df, weights)  # source: statsmodels compare_f_test
    assert grouped.loc[2, "statistic"] == pytest.approx(F, rel=1e-8)
    assert grouped.loc[2, "pvalue"] == pytest.approx(p, rel=1e-6)
