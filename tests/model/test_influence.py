"""Tests of per-row influence measures (afterfit.model.influence).

References (named beside each check): R's lm.influence / influence.measures results shipped
with statsmodels for its macrodata model; statsmodels OLSInfluence (leave-one-out refits for the
externally studentized residual) and GLMInfluence with var_weights for the weighted case.
"""
from __future__ import annotations

import json
import pathlib
import warnings

import numpy as np
import pandas as pd
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st

import statsmodels
import statsmodels.api as sm

from afterfit.model.influence import FLAG_COLUMNS, influence_frame
from afterfit.model.ols import fit_ols

R_RESULTS = pathlib.Path(statsmodels.__file__).parent / "stats" / "tests" / "results"
MEASURES = ["leverage", "student_int", "student_ext", "cooks_d", "dffits"]


def _macrodata_fit():
    """The model of statsmodels' test_diagnostic.TestDiagnosticG: 400*dlog(realinv) on a
    constant, 400*dlog(realgdp) and realint lagged one quarter (n = 202)."""
    from statsmodels.datasets import macrodata

    d = macrodata.load_pandas().data
    y = 400 * np.diff(np.log(d["realinv"].to_numpy()))
    gdp = 400 * np.diff(np.log(d["realgdp"].to_numpy()))
    lint = d["realint"].to_numpy()[:-1]
    X = np.column_stack([np.ones(len(y)), gdp, lint])
    return fit_ols(X, y, names=["const", "ggdp", "lint"])


def _rel(a, b):
    a, b = np.asarray(a, float), np.asarray(b, float)
    return np.max(np.abs(a - b) / np.abs(b))


# ------------------------------------------------------------------------------------------
# R reference values (shipped with statsmodels)
# ------------------------------------------------------------------------------------------
def test_r_lm_influence_all_rows():
    # Source: R lm.influence / influence.measures for statsmodels' macrodata model,
    # statsmodels/stats/tests/results/influence_lsdiag_R.json (all 202 rows)
    with open(R_RESULTS / "influence_lsdiag_R.json") as fh:
        lsdiag = json.load(fh)
    ls = _macrodata_fit()
    f = influence_frame(ls)
    assert len(f) == 202
    assert _rel(f["leverage"], lsdiag["hat"]) < 1e-8
    assert _rel(f["cooks_d"], lsdiag["cooks"]) < 1e-8
    assert _rel(f["student_int"], lsdiag["std.res"]) < 1e-8
    assert _rel(f["student_ext"], lsdiag["stud.res"]) < 1e-8
    assert _rel(f["dffits"], lsdiag["dfits"]) < 1e-8
    assert abs(np.sqrt(ls.sigma2) / lsdiag["std.dev"] - 1) < 1e-10
    # R's cov.unscaled is (X'X)^-1
    assert _rel(ls.xtx_inv.ravel(), np.array(lsdiag["cov.unscaled"])) < 1e-8
    assert not f.attrs["undefined"]


def test_r_influence_measures_csv_and_flag_rules():
    # Source: R influence.measures for the same model,
    # statsmodels/stats/tests/results/influence_measures_R.csv and influence_measures_bool_R.csv.
    # R's own flag rules (hat > 3p/n; |dffit| > 3 sqrt(p/(n-p)); F(p, n-p) cdf of Cook's D > 0.5)
    # applied to our values must reproduce R's flags: a check of the values near the cut-offs.
    ref = pd.read_csv(R_RESULTS / "influence_measures_R.csv")
    flags = pd.read_csv(R_RESULTS / "influence_measures_bool_R.csv")
    ls = _macrodata_fit()
    f = influence_frame(ls)
    assert _rel(f["leverage"], ref["hat"]) < 1e-8
    assert _rel(f["cooks_d"], ref["cook.d"]) < 1e-8
    assert _rel(f["dffits"], ref["dffit"]) < 1e-8
    n, p = ls.nobs, ls.rank
    assert np.array_equal(f["leverage"].to_numpy() > 3 * p / n, flags["hat"].to_numpy())
    assert np.array_equal(np.abs(f["dffits"].to_numpy()) > 3 * np.sqrt(p / (n - p)),
                          flags["dffit"].to_numpy())
    cook_flag = scipy.stats.f.cdf(f["cooks_d"].to_numpy(), p, n - p) > 0.5
    assert np.array_equal(cook_flag, flags["cook.d"].to_numpy())


def test_flags_follow_their_stated_common_practice_rules():
    # Source: common practice thresholds (Hoaglin & Welsch 1978; Cook 1977; Belsley, Kuh &
    # Welsch 1980; from memory), applied to the macrodata model's measures
    ls = _macrodata_fit()
    f = influence_frame(ls)
    n, p = ls.nobs, ls.rank
    assert list(f.columns) == MEASURES + list(FLAG_COLUMNS)
    assert set(f.attrs["rules"]) == set(FLAG_COLUMNS)
    assert all("common practice" in f.attrs["rules"][k] for k in FLAG_COLUMNS[:4])
    assert np.array_equal(f["flag_leverage"], f["leverage"] > 2 * p / n)
    assert np.array_equal(f["flag_cooks"], f["cooks_d"] > 4 / n)
    assert np.array_equal(f["flag_student"], f["student_ext"].abs() > 3)
    assert np.array_equal(f["flag_dffits"], f["dffits"].abs() > 2 * np.sqrt(p / n))
    assert not f["flag_leverage_one"].any()
    assert f[list(FLAG_COLUMNS)].dtypes.eq(bool).all()
    assert f["flag_cooks"].sum() > 0 and f["flag_leverage"].sum() > 0  # the rules do bite here


# ------------------------------------------------------------------------------------------
# statsmodels on random designs
# ------------------------------------------------------------------------------------------
def _problem(seed, n=80, p=4, weighted=False):
    rng = np.random.default_rng(seed)
    X = np.column_stack([np.ones(n), rng.normal(size=(n, p - 1)) * rng.uniform(0.5, 3, p - 1)])
    w = rng.uniform(0.2, 4, n) if weighted else None
    e = rng.standard_t(4, n)
    y = X @ rng.normal(size=p) + (e if w is None else e / np.sqrt(w))
    return X, y, w


@pytest.mark.parametrize("method", ["householder", "cholqr2", "extended"])
def test_ols_influence_matches_statsmodels(method):
    # Source: statsmodels OLSInfluence (external studentized residuals by leave-one-out refits)
    X, y, _ = _problem(1)
    f = influence_frame(fit_ols(X, y, method=method))
    infl = sm.OLS(y, X).fit().get_influence()
    assert _rel(f["leverage"], infl.hat_matrix_diag) < 1e-10
    assert _rel(f["student_int"], infl.resid_studentized_internal) < 1e-10
    assert _rel(f["student_ext"], infl.resid_studentized_external) < 1e-10
    assert _rel(f["cooks_d"], infl.cooks_distance[0]) < 1e-10
    assert _rel(f["dffits"], infl.dffits[0]) < 1e-10


def test_wls_influence_matches_statsmodels_whitened_and_glm():
    # Source: statsmodels OLSInfluence on the whitened data (sqrt(w) X, sqrt(w) y), and
    # statsmodels GLMInfluence of a Gaussian GLM with var_weights=w (its weighted definitions)
    X, y, w = _problem(2, weighted=True)
    f = influence_frame(fit_ols(X, y, weights=w))
    sw = np.sqrt(w)
    infl = sm.OLS(y * sw, X * sw[:, None]).fit().get_influence()
    assert _rel(f["leverage"], infl.hat_matrix_diag) < 1e-10
    assert _rel(f["student_int"], infl.resid_studentized_internal) < 1e-10
    assert _rel(f["student_ext"], infl.resid_studentized_external) < 1e-10
    assert _rel(f["cooks_d"], infl.cooks_distance[0]) < 1e-10
    assert _rel(f["dffits"], infl.dffits[0]) < 1e-10
    glm = sm.GLM(y, X, family=sm.families.Gaussian(), var_weights=w).fit().get_influence()
    assert _rel(f["leverage"], glm.hat_matrix_diag) < 1e-10
    assert _rel(f["student_int"], glm.resid_studentized) < 1e-10
    assert _rel(f["cooks_d"], glm.cooks_distance[0]) < 1e-10


@settings(max_examples=20, deadline=None)
@given(seed=st.integers(0, 10**6), n=st.integers(6, 25), p=st.integers(1, 4),
       weighted=st.booleans())
def test_closed_forms_equal_leave_one_out(seed, n, p, weighted):
    # Source: statsmodels OLSInfluence, whose external studentized residuals and DFFITS come
    # from n leave-one-out refits (on the whitened data for weights)
    X, y, w = _problem(seed, n=n, p=p, weighted=weighted)
    sw = np.ones(n) if w is None else np.sqrt(w)
    f = influence_frame(fit_ols(X, y, weights=w))
    infl = sm.OLS(y * sw, X * sw[:, None]).fit().get_influence()
    if n - p < 2:
        assert f["student_ext"].isna().all()
        return
    assert np.allclose(f["student_ext"], infl.resid_studentized_external, rtol=1e-9, atol=1e-12)
    assert np.allclose(f["dffits"], infl.dffits[0], rtol=1e-9, atol=1e-12)
    assert np.allclose(f["cooks_d"], infl.cooks_distance[0], rtol=1e-9, atol=1e-14)


# ------------------------------------------------------------------------------------------
# undefined cases: leverage one, exact fit, no residual degrees of freedom, zero weights
# ------------------------------------------------------------------------------------------
def _assert_no_warning(fn, *args, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with np.errstate(all="raise"):
            return fn(*args, **kw)


def test_leverage_one_row_is_nan_not_a_number():
    # Source: definition; the design mimics Anscombe's fourth set (a lone distinct x value),
    # invented numbers
    x = np.r_[np.full(10, 8.0), 19.0]
    y = np.r_[np.linspace(5.3, 8.8, 10), 12.5]
    ls = fit_ols(np.column_stack([np.ones(11), x]), y)
    f = _assert_no_warning(influence_frame, ls)
    assert f["flag_leverage_one"].tolist() == [False] * 10 + [True]
    assert abs(f["leverage"].iloc[-1] - 1) < 1e-12 and f["flag_leverage"].iloc[-1]
    assert f.iloc[-1][["student_int", "student_ext", "cooks_d", "dffits"]].isna().all()
    assert f.iloc[:10][MEASURES].notna().all().all()
    assert not f.iloc[-1][["flag_cooks", "flag_student", "flag_dffits"]].any()
    assert any("leverage 1" in u for u in f.attrs["undefined"])
    # the other rows match statsmodels on the rows it can handle
    infl = sm.OLS(y, np.column_stack([np.ones(11), x])).fit().get_influence()
    with np.errstate(invalid="ignore", divide="ignore"):  # statsmodels hits sqrt(1 - h < 0) at row 11
        ref = infl.resid_studentized_internal[:10]
    assert _rel(f["student_int"].iloc[:10], ref) < 1e-10


def test_lone_group_member_has_leverage_one():
    # Source: definition (the only row of a group is fitted exactly by its dummy)
    rng = np.random.default_rng(3)
    g = np.r_[np.zeros(12), np.ones(12), 2.0]
    X = np.column_stack([np.ones(25), g == 1, g == 2, rng.normal(size=25)]).astype(float)
    f = _assert_no_warning(influence_frame, fit_ols(X, rng.normal(size=25)))
    assert f["flag_leverage_one"].sum() == 1 and f["flag_leverage_one"].iloc[-1]
    assert np.isnan(f["cooks_d"].iloc[-1])


def test_exact_fit_gives_nan_measures_without_warnings():
    # Source: definition (zero residual variance: studentizing divides 0 by 0)
    x = np.linspace(0, 1, 12)
    X = np.column_stack([np.ones(12), x, x**2])
    ls = fit_ols(X, 1 + 2 * x - 3 * x**2)
    assert ls.exact_fit
    f = _assert_no_warning(influence_frame, ls)
    assert f[["student_int", "student_ext", "cooks_d", "dffits"]].isna().all().all()
    assert f["leverage"].notna().all()
    assert not f[["flag_cooks", "flag_student", "flag_dffits"]].any().any()
    assert any("exact fit" in u for u in f.attrs["undefined"])


def test_no_residual_degrees_of_freedom():
    # Source: definition (n == p: every row has leverage 1, nothing is studentizable)
    X = np.array([[1.0, 0.0], [1.0, 1.0]])
    f = _assert_no_warning(influence_frame, fit_ols(X, np.array([1.0, 5.0])))
    assert f["flag_leverage_one"].all() and f[MEASURES[1:]].isna().all().all()


def test_one_residual_degree_of_freedom():
    # Source: definition (deleting a row leaves df 0: s_(i) undefined)
    X = np.column_stack([np.ones(4), [0.0, 1.0, 2.0, 4.0], [1.0, 0.0, 1.0, 0.5]])
    f = _assert_no_warning(influence_frame, fit_ols(X, np.array([1.0, 2.5, 2.0, 7.0])))
    assert f["student_int"].notna().all() and f["student_ext"].isna().all()
    assert f["dffits"].isna().all() and f["cooks_d"].notna().all()


def test_row_whose_deletion_leaves_an_exact_fit_is_extreme():
    # Source: definition (s_(i) = 0 after deleting the only off-line point)
    x = np.arange(10.0)
    y = 1 + 2 * x
    y[4] += 3.0
    f = _assert_no_warning(influence_frame, fit_ols(np.column_stack([np.ones(10), x]), y))
    assert abs(f["student_ext"].iloc[4]) > 1e8 and f["flag_student"].iloc[4]
    assert f["flag_student"].sum() == 1


def test_zero_weight_rows():
    # Source: statsmodels OLSInfluence on the whitened, positively weighted rows
    X, y, w = _problem(4, n=40, weighted=True)
    w = w.copy()
    w[[3, 9]] = 0.0
    f = _assert_no_warning(influence_frame, fit_ols(X, y, weights=w), index=np.arange(100, 140))
    keep = w > 0
    sw = np.sqrt(w[keep])
    infl = sm.OLS(y[keep] * sw, X[keep] * sw[:, None]).fit().get_influence()
    sub = f[keep]
    assert _rel(sub["leverage"], infl.hat_matrix_diag) < 1e-10
    assert _rel(sub["student_ext"], infl.resid_studentized_external) < 1e-10
    assert _rel(sub["cooks_d"], infl.cooks_distance[0]) < 1e-10
    dropped = f.loc[[103, 109]]
    assert (dropped["leverage"] == 0).all() and dropped[MEASURES[1:]].isna().all().all()
    assert not dropped[list(FLAG_COLUMNS)].any().any()
    # thresholds use the 38 rows that take part in the fit
    assert f["flag_cooks"].equals(f["cooks_d"] > 4 / 38)


def test_index_and_scale_invariance():
    # Source: definitions (influence measures do not depend on units); statsmodels for values
    X, y, _ = _problem(5, n=30)
    labels = [f"r{i}" for i in range(30)]
    f = influence_frame(fit_ols(X, y), index=labels)
    assert list(f.index) == labels
    Xs = X.copy()
    Xs[:, 1:] *= 1e150
    g = influence_frame(fit_ols(Xs, y * 1e-150), index=labels)
    assert np.allclose(g[MEASURES].to_numpy(), f[MEASURES].to_numpy(), rtol=1e-11, atol=0)
    with pytest.raises(ValueError, match="index has 3 labels but the fit has 30 rows"):
        influence_frame(fit_ols(X, y), index=[1, 2, 3])
