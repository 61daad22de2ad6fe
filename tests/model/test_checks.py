"""Specification checks against reference values shipped with statsmodels and against statsmodels.

Sources, named beside each check:
- R ``lmtest``/``stats`` and gretl/EViews results stored in statsmodels' own test files
  (``statsmodels/stats/tests/test_diagnostic.py``, ``test_statstools.py``,
  ``statsmodels/regression/tests/test_glsar_gretl.py``), on the model built there from the
  ``macrodata`` set.
- statsmodels' functions on seeded random designs (``het_white``, ``het_breuschpagan``,
  ``linear_reset``, ``jarque_bera``, ``acorr_ljungbox``, ``durbin_watson``,
  ``recursive_olsresiduals``/``linear_harvey_collier``, ``variance_inflation_factor``).
Random designs here are test inputs for the comparison with statsmodels, not demo data.
"""
import math
import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.stats.diagnostic as smd
from scipy import stats
from statsmodels.datasets import longley, macrodata
from statsmodels.stats.outliers_influence import variance_inflation_factor
from statsmodels.stats.stattools import durbin_watson, jarque_bera

from afterfit.model.checks import CHECK_NAMES, _prepare, _recursive_residuals, run_checks, vif
from afterfit.model.ols import fit_ols

TESTS = ["RESET", "Breusch-Pagan (Koenker)", "Breusch-Pagan (original)", "White",
         "Durbin-Watson", "Ljung-Box", "Jarque-Bera", "Harvey-Collier"]


# ------------------------------------------------------------------------------------------
# fixtures


@pytest.fixture(scope="module")
def macro():
    """The model of statsmodels' TestDiagnosticG (stats/tests/test_diagnostic.py)."""
    d = macrodata.load_pandas().data
    y = 400 * np.diff(np.log(d["realinv"].to_numpy()))
    g = 400 * np.diff(np.log(d["realgdp"].to_numpy()))
    lint = d["realint"].to_numpy()[:-1]
    X = np.column_stack([np.ones_like(g), g, lint])
    ls = fit_ols(X, y, names=["const", "gdp_growth", "realint_lag"])
    return ls, run_checks(ls, lags=4)


def _random_design(seed, n=160, p=4, *, const=True, dummy=False):
    """Seeded random design with curvature and spread that grows with x1 (test input only)."""
    rng = np.random.default_rng(seed)
    cols = [rng.standard_normal(n) * (1 + j) + j for j in range(p - const - dummy)]
    if dummy:
        cols.append((rng.random(n) < 0.4).astype(float))
    X = np.column_stack(([np.ones(n)] if const else []) + cols)
    x1 = X[:, int(const)]
    y = X @ rng.standard_normal(X.shape[1]) + 0.15 * x1**2 \
        + rng.standard_normal(n) * (1 + 0.3 * np.abs(x1))
    return X, y


def _sm_ols(X, y, w=None):
    return (sm.OLS(y, X) if w is None else sm.WLS(y, X, weights=w)).fit()


def _quiet(fn, *args, **kwargs):
    """Call a statsmodels peer, silencing its own warnings about the design (rank, conditioning)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # SingularMatrixWarning is a UserWarning
        return fn(*args, **kwargs)


def _sm_harvey_collier(X, y, skip=None):
    """t test on recursive residuals from statsmodels (R harvtest convention).

    statsmodels' own ``linear_harvey_collier`` slices ``[3:]`` whatever the number of
    columns, so it only agrees with R when there are exactly 3; ``recursive_olsresiduals``
    gives the residuals themselves.
    """
    k = X.shape[1] if skip is None else skip
    rr = smd.recursive_olsresiduals(_sm_ols(X, y), skip=skip)
    return stats.ttest_1samp(rr[4][k:], 0)


# ------------------------------------------------------------------------------------------
# reference values (R, gretl, EViews) shipped with statsmodels


def test_frame_shape(macro):
    _, r = macro
    assert list(r.columns) == ["statistic", "df", "pvalue", "reading", "note"]
    assert r.index.name == "test"
    assert list(r.index) == TESTS + ["VIF: gdp_growth", "VIF: realint_lag"]
    assert r["reading"].map(len).gt(20).all()


def test_breusch_pagan_matches_r(macro):
    _, r = macro
    # R lmtest::bptest(fm) (studentized, Koenker), statsmodels test_diagnostic.py
    k = r.loc["Breusch-Pagan (Koenker)"]
    assert k.statistic == pytest.approx(0.709924388395087, rel=1e-10)
    assert k.pvalue == pytest.approx(0.701199952134347, rel=1e-10)
    assert k.df == "2"
    # R lmtest::bptest(fm, studentize=FALSE), statsmodels test_diagnostic.py
    o = r.loc["Breusch-Pagan (original)"]
    assert o.statistic == pytest.approx(1.302014063483341, rel=1e-10)
    assert o.pvalue == pytest.approx(0.5215203247110649, rel=1e-10)
    assert o.df == "2"


def test_reset_matches_gretl(macro):
    _, r = macro
    # gretl RESET (squares and cubes): F(2,197) = 5.219019, p 0.00619, printed digits;
    # statsmodels regression/tests/test_glsar_gretl.py
    row = r.loc["RESET"]
    assert row.statistic == pytest.approx(5.219019, abs=5e-7)
    assert row.pvalue == pytest.approx(0.00619, abs=5e-6)
    assert row.df == "2, 197"
    assert "Curvature not captured" in row.reading and "p = 0.006" in row.reading


def test_durbin_watson_matches_gretl(macro):
    _, r = macro
    # gretl Durbin-Watson 2.213805 (printed digits), statsmodels test_glsar_gretl.py
    row = r.loc["Durbin-Watson"]
    assert row.statistic == pytest.approx(2.213805, abs=5e-7)
    assert math.isnan(row.pvalue) and row.df == ""
    assert "order" in row.reading and "row order" in row.note


def test_ljung_box_matches_r(macro):
    _, r = macro
    # R Box.test(residuals(fm), lag=4, type="Ljung-Box"), statsmodels test_diagnostic.py
    row = r.loc["Ljung-Box"]
    assert row.statistic == pytest.approx(5.23587172795227, rel=1e-10)
    assert row.pvalue == pytest.approx(0.263940335284713, rel=1e-10)
    assert row.df == "4"


def test_harvey_collier_matches_r(macro):
    _, r = macro
    # R lmtest::harvtest(fm), statsmodels test_diagnostic.py
    row = r.loc["Harvey-Collier"]
    assert row.statistic == pytest.approx(0.494432160939874, rel=1e-10)
    assert row.pvalue == pytest.approx(0.6215491310408242, rel=1e-10)
    assert row.df == "198"


def test_white_matches_eviews(macro):
    _, r = macro
    # EViews White test (with cross terms): LM 33.503722896538441, p 2.9887960597830259e-06,
    # statsmodels test_diagnostic.py test_het_white
    row = r.loc["White"]
    assert row.statistic == pytest.approx(33.503722896538441, rel=1e-10)
    assert row.pvalue == pytest.approx(2.9887960597830259e-06, rel=1e-8)
    assert row.df == "5"


def _orthogonal_model(x):
    """A no-intercept fit whose residuals are exactly ``x``: one regressor orthogonal to it."""
    t = np.arange(x.size, dtype=float)
    z = t - x * (x @ t) / (x @ x)
    return fit_ols(z[:, None], x, names=["z"])


def test_jarque_bera_and_durbin_watson_on_r_vector():
    # the 20-value vector of statsmodels stats/tests/test_statstools.py, with its R results:
    # car::durbinWatsonTest(x) 1.95298958377419; Jarque-Bera 1.9662677226861689,
    # p 0.3741367669648314
    x = np.array([-0.1184, -1.3403, 0.0063, -0.612, -0.3869, -0.2313, -2.8485, -0.2167,
                  0.4153, 1.8492, -0.3706, 0.9726, -0.1501, -0.0337, -1.4423, 1.2489,
                  0.9182, -0.2331, -0.6182, 0.183])
    ls = _orthogonal_model(x)
    np.testing.assert_allclose(ls.resid, x, rtol=0, atol=1e-14)
    r = run_checks(ls, has_const=False)
    assert r.loc["Durbin-Watson", "statistic"] == pytest.approx(1.95298958377419, rel=1e-12)
    jb = r.loc["Jarque-Bera"]
    assert jb.statistic == pytest.approx(1.9662677226861689, rel=1e-10)
    assert jb.pvalue == pytest.approx(0.3741367669648314, rel=1e-10)
    assert "Small sample (n = 20)" in jb.reading


def _longley():
    d = longley.load_pandas()
    X = sm.add_constant(d.exog.to_numpy(dtype=float))
    return X, d.endog.to_numpy(dtype=float), ["const"] + list(d.exog.columns)


def test_longley_vif():
    X, y, names = _longley()
    ls = fit_ols(X, y, names=names)
    v = vif(ls)
    assert list(v.index) == names[1:]
    # references.md (computed values, printed to 3 decimals)
    np.testing.assert_allclose(v.to_numpy(), [135.532, 1788.513, 33.619, 3.589, 399.151, 758.981],
                               rtol=0, atol=5e-4)
    # statsmodels variance_inflation_factor (it warns about Longley's conditioning itself)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        ref = [variance_inflation_factor(X, j) for j in range(1, X.shape[1])]
    np.testing.assert_allclose(v.to_numpy(), ref, rtol=1e-7)
    r = run_checks(ls)
    row = r.loc["VIF: GNP"]
    assert row.statistic == pytest.approx(v["GNP"])
    assert "above 10, common practice" in row.reading
    assert "not strongly collinear" in r.loc["VIF: ARMED", "reading"]


# ------------------------------------------------------------------------------------------
# agreement with statsmodels on random designs


@pytest.mark.parametrize("seed,p,dummy", [(1, 2, False), (2, 4, False), (3, 5, True), (4, 6, True)])
def test_agrees_with_statsmodels(seed, p, dummy):
    X, y = _random_design(seed, p=p, dummy=dummy)
    n, k = X.shape
    ls = fit_ols(X, y)
    r = run_checks(ls)
    res = _sm_ols(X, y)
    e = res.resid

    reset = smd.linear_reset(res, power=3, test_type="fitted", use_f=True)
    assert r.loc["RESET", "statistic"] == pytest.approx(float(reset.fvalue), rel=1e-8)
    assert r.loc["RESET", "pvalue"] == pytest.approx(float(reset.pvalue), rel=1e-7)
    assert r.loc["RESET", "df"] == f"{int(reset.df_num)}, {int(reset.df_denom)}"

    for robust, row in ((True, "Breusch-Pagan (Koenker)"), (False, "Breusch-Pagan (original)")):
        lm, lmp, _, _ = smd.het_breuschpagan(e, X, robust=robust)
        assert r.loc[row, "statistic"] == pytest.approx(lm, rel=1e-8)
        assert r.loc[row, "pvalue"] == pytest.approx(lmp, rel=1e-7)

    lm, lmp, _, _ = _quiet(smd.het_white, e, X)
    aux = X[:, np.triu_indices(k)[0]] * X[:, np.triu_indices(k)[1]]
    assert r.loc["White", "df"] == str(np.linalg.matrix_rank(aux) - 1)
    assert r.loc["White", "statistic"] == pytest.approx(lm, rel=1e-8)
    assert r.loc["White", "pvalue"] == pytest.approx(lmp, rel=1e-7, abs=1e-300)
    if dummy:  # the indicator squared duplicates the indicator: dropped as in statsmodels' rank
        assert "dropped as duplicates" in r.loc["White", "note"]

    assert r.loc["Durbin-Watson", "statistic"] == pytest.approx(durbin_watson(e), rel=1e-10)

    lags = min(10, n // 5)
    lb = smd.acorr_ljungbox(e, lags=lags)
    assert r.loc["Ljung-Box", "df"] == str(lags)
    assert r.loc["Ljung-Box", "statistic"] == pytest.approx(lb["lb_stat"].iloc[-1], rel=1e-9)
    assert r.loc["Ljung-Box", "pvalue"] == pytest.approx(lb["lb_pvalue"].iloc[-1], rel=1e-8)

    jb, jbp, _, _ = jarque_bera(e)
    assert r.loc["Jarque-Bera", "statistic"] == pytest.approx(jb, rel=1e-9)
    assert r.loc["Jarque-Bera", "pvalue"] == pytest.approx(jbp, rel=1e-8)

    hc = _sm_harvey_collier(X, y)
    assert r.loc["Harvey-Collier", "statistic"] == pytest.approx(hc.statistic, rel=1e-8)
    assert r.loc["Harvey-Collier", "pvalue"] == pytest.approx(hc.pvalue, rel=1e-8)
    assert r.loc["Harvey-Collier", "df"] == str(n - k - 1)
    if k == 3:  # statsmodels' own wrapper is right for exactly three columns (see helper)
        t, pv = smd.linear_harvey_collier(res)
        assert r.loc["Harvey-Collier", "statistic"] == pytest.approx(t, rel=1e-8)

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        ref = [variance_inflation_factor(X, j) for j in range(1, k)]
    np.testing.assert_allclose(r.loc[[f"VIF: x{j}" for j in range(1, k)], "statistic"], ref,
                               rtol=1e-9)


def test_white_with_factors_and_two_valued_columns_agrees_with_statsmodels():
    # a five-level factor (four indicators that never both equal 1), a column taking the values
    # -1 and 3, an indicator nested in one level (never 1 outside it) and two numeric columns:
    # many products repeat the regressors exactly and are left out before the Gram matrix; the
    # statistic and the rank-based degrees of freedom must still be statsmodels' het_white's
    rng = np.random.default_rng(121)
    n = 400
    g = rng.integers(0, 5, n)
    two = np.where(rng.random(n) < 0.3, 3.0, -1.0)
    nested = ((g == 2) & (rng.random(n) < 0.5)).astype(float)
    x1, x2 = rng.standard_normal(n), rng.uniform(0, 4, n)
    X = np.column_stack([np.ones(n)] + [(g == j).astype(float) for j in range(1, 5)]
                        + [two, nested, x1, x2])
    y = X @ rng.standard_normal(X.shape[1]) + rng.standard_normal(n) * (1 + 0.4 * x2 + (g == 3))
    ls = fit_ols(X, y)
    r = run_checks(ls, only=["White"])
    res = _sm_ols(X, y)
    lm, lmp, _, _ = _quiet(smd.het_white, res.resid, X)
    k = X.shape[1]
    aux = X[:, np.triu_indices(k)[0]] * X[:, np.triu_indices(k)[1]]
    assert r.loc["White", "df"] == str(np.linalg.matrix_rank(aux) - 1)
    assert r.loc["White", "statistic"] == pytest.approx(lm, rel=1e-8)
    assert r.loc["White", "pvalue"] == pytest.approx(lmp, rel=1e-7, abs=1e-300)
    m = k - 1
    dropped = m * (m + 1) // 2 + m - int(r.loc["White", "df"])
    assert r.loc["White", "note"].startswith(f"{m * (m + 1) // 2 + m} auxiliary columns from {m} ")
    assert f"{dropped} dropped as duplicates" in r.loc["White", "note"]


def test_time_order_agrees_with_statsmodels_on_sorted_rows():
    X, y = _random_design(11, n=120, p=3)
    rng = np.random.default_rng(12)
    t = rng.permutation(X.shape[0]) * 7.0 + 1.5  # sort key, e.g. a time column
    perm = np.argsort(t)
    ls = fit_ols(X, y)
    r = run_checks(ls, order=t, lags=5)
    e_sorted = ls.resid[perm]
    # statsmodels on the residuals in time order
    assert r.loc["Durbin-Watson", "statistic"] == pytest.approx(durbin_watson(e_sorted), rel=1e-10)
    lb = smd.acorr_ljungbox(e_sorted, lags=5)
    assert r.loc["Ljung-Box", "statistic"] == pytest.approx(lb["lb_stat"].iloc[-1], rel=1e-9)
    hc = _sm_harvey_collier(X[perm], y[perm])
    assert r.loc["Harvey-Collier", "statistic"] == pytest.approx(hc.statistic, rel=1e-8)
    assert "time order" in r.loc["Durbin-Watson", "note"]
    assert "row order" not in r.loc["Durbin-Watson", "reading"]
    # datetimes sort the same way, and order-free checks do not move
    dt = np.datetime64("2020-01-01") + (t * 86400).astype("timedelta64[s]")
    r2 = run_checks(ls, order=dt, lags=5)
    pd.testing.assert_frame_equal(r, r2)
    r0 = run_checks(ls, lags=5)
    for name in ["RESET", "White", "Jarque-Bera", "Breusch-Pagan (Koenker)"]:
        assert r0.loc[name, "statistic"] == r.loc[name, "statistic"]


def test_statistics_do_not_depend_on_units_or_offsets():
    # every check here depends on the design only through its column space (with an intercept):
    # rescaling a regressor or moving it far from zero (a calendar year, say) changes nothing
    X, y = _random_design(15, n=150, p=4)
    X2 = X.copy()
    X2[:, 1] = X[:, 1] * 1e-3 + 2024.0
    X2[:, 2] = X[:, 2] * 1e4 - 5e5
    r1 = run_checks(fit_ols(X, y), lags=6)
    r2 = run_checks(fit_ols(X2, y), lags=6)
    tests = r1.index[~r1.index.str.startswith("VIF")]
    np.testing.assert_allclose(r2.loc[tests, "statistic"], r1.loc[tests, "statistic"], rtol=1e-8)
    np.testing.assert_allclose(r2["statistic"].iloc[len(tests):], r1["statistic"].iloc[len(tests):],
                               rtol=1e-8)


def _trending_design(seed, n):
    """Seeded design whose spread and one regressor drift over the rows (test input only)."""
    rng = np.random.default_rng(seed)
    t = np.arange(n)
    x1 = rng.standard_normal(n)
    x2 = rng.standard_normal(n) + 0.002 * t
    x3 = rng.standard_normal(n)
    X = np.column_stack([np.ones(n), x1, x2, x3])
    y = X @ [1.0, 0.5, -0.3, 0.2] + 0.1 * x1**2 + rng.standard_normal(n) * (1 + 0.5 * (t > n / 2))
    return X, y


def test_recursive_residuals_match_statsmodels_over_many_blocks():
    # 3,000 rows: the recursion runs through single-row steps, several outer blocks and padded
    # inner blocks; every recursive residual is compared with statsmodels'
    # recursive_olsresiduals (its scaled residuals, rresid_scaled)
    X, y = _trending_design(101, 3000)
    ls = fit_ols(X, y)
    w, start = _recursive_residuals(_prepare(ls, has_const=True, order=None))
    ref = smd.recursive_olsresiduals(_sm_ols(X, y))[4][4:]
    assert start == 4 and w.shape == ref.shape
    np.testing.assert_allclose(w, ref, rtol=0, atol=1e-10 * np.sqrt(np.mean(ref**2)))
    hc = _sm_harvey_collier(X, y)
    r = run_checks(ls, only=["Harvey-Collier"])
    assert r.loc["Harvey-Collier", "statistic"] == pytest.approx(hc.statistic, rel=1e-10)


@pytest.mark.parametrize("T", [
    # a calendar-year-like offset, a large offset with a big scale, and a near-duplicate column
    [[1, 2024.0, -7e3, 0], [0, 1e-2, 0, 1], [0, 0, 1e2, 1], [0, 0, 0, 1e-4]],
    [[1, 0, 0, 0], [0, 1, 0, 1], [0, 0, 1, 1], [0, 0, 0, 1e-5]],
])
def test_harvey_collier_on_ill_conditioned_design(T):
    # Recursive residuals depend on the columns only through the spaces the leading rows span,
    # so X @ T (T invertible) has the same ones as X.  statsmodels on the well-conditioned X is
    # the reference for afterfit on the ill-conditioned X @ T (condition number 1e6 to 1e13;
    # statsmodels' own update through inv(X'X) cannot be trusted there).
    X, y = _trending_design(102, 3000)
    Xi = X @ np.array(T)
    assert np.linalg.cond(Xi) > 1e5
    ref = smd.recursive_olsresiduals(_sm_ols(X, y))[4][4:]
    ls = fit_ols(Xi, y)
    w, _ = _recursive_residuals(_prepare(ls, has_const=True, order=None))
    np.testing.assert_allclose(w, ref, rtol=0, atol=1e-6 * np.sqrt(np.mean(ref**2)))
    hc = _sm_harvey_collier(X, y)
    r = run_checks(ls, only=["Harvey-Collier"])
    assert r.loc["Harvey-Collier", "statistic"] == pytest.approx(hc.statistic, rel=1e-7)


def test_harvey_collier_late_start_matches_statsmodels_skip():
    # an indicator that is 0 for the first 30 rows: the first k rows cannot fix its coefficient,
    # so the recursion starts at the first prefix that can (row 31), as statsmodels with skip=31
    X, y = _random_design(21, n=100, p=3)
    X = np.column_stack([X, (np.arange(100) >= 30) & (np.arange(100) % 3 == 0)]).astype(float)
    ls = fit_ols(X, y)
    r = run_checks(ls)
    hc = _sm_harvey_collier(X, y, skip=31)
    row = r.loc["Harvey-Collier"]
    assert row.statistic == pytest.approx(hc.statistic, rel=1e-8)
    assert row.df == str(100 - 31 - 1)
    assert "starts after 31 rows" in row.note


def test_weighted_fit_uses_whitened_residuals():
    X, y = _random_design(31, n=150, p=4)
    rng = np.random.default_rng(32)
    w = rng.uniform(0.2, 3.0, X.shape[0])
    ls = fit_ols(X, y, weights=w)
    r = run_checks(ls)
    res = _sm_ols(X, y, w)
    we = res.wresid  # sqrt(w) * e
    # RESET: statsmodels WLS with the powers of the fitted values added, F test on them
    # (statsmodels' linear_reset refits without the weights, so it is not the peer here)
    f = res.fittedvalues
    big = sm.WLS(y, np.column_stack([X, f**2, f**3]), weights=w).fit()
    ft = big.f_test(np.eye(2, X.shape[1] + 2, k=X.shape[1]))
    assert r.loc["RESET", "statistic"] == pytest.approx(float(ft.fvalue), rel=1e-8)
    lm = smd.het_breuschpagan(we, X)[0]
    assert r.loc["Breusch-Pagan (Koenker)", "statistic"] == pytest.approx(lm, rel=1e-8)
    assert r.loc["White", "statistic"] == pytest.approx(smd.het_white(we, X)[0], rel=1e-8)
    assert r.loc["Durbin-Watson", "statistic"] == pytest.approx(durbin_watson(we), rel=1e-10)
    assert r.loc["Jarque-Bera", "statistic"] == pytest.approx(jarque_bera(we)[0], rel=1e-9)
    sw = np.sqrt(w)
    hc = _sm_harvey_collier(X * sw[:, None], y * sw)
    assert r.loc["Harvey-Collier", "statistic"] == pytest.approx(hc.statistic, rel=1e-8)
    # weighted VIF = 1 / (1 - R^2) of the weighted regression of x_j on the others (statsmodels)
    for j in range(1, X.shape[1]):
        others = np.delete(X, j, axis=1)
        r2 = sm.WLS(X[:, j], others, weights=w).fit().rsquared
        assert r.loc[f"VIF: x{j}", "statistic"] == pytest.approx(1 / (1 - r2), rel=1e-9)
    assert "whitened" in r.loc["Jarque-Bera", "note"]


def test_zero_weight_rows_are_left_out():
    X, y = _random_design(41, n=90, p=3)
    w = np.ones(90)
    w[::9] = 0.0
    t = np.random.default_rng(42).permutation(90)
    full = run_checks(fit_ols(X, y, weights=w), order=t)
    keep = w > 0
    sub = run_checks(fit_ols(X[keep], y[keep], weights=w[keep]), order=t[keep])
    np.testing.assert_allclose(full["statistic"], sub["statistic"], rtol=1e-9)
    assert "10 rows with zero weight left out" in full.loc["RESET", "note"]


def test_no_constant_model():
    # documented difference: the auxiliary regressions keep a constant (statsmodels' het_white
    # uses the given columns only), so the peer here is statsmodels with the constant added
    X, y = _random_design(51, n=140, p=3, const=False)
    ls = fit_ols(X, y)
    r = run_checks(ls, has_const=False)
    res = _sm_ols(X, y)
    reset = smd.linear_reset(res, power=3, use_f=True)
    assert r.loc["RESET", "statistic"] == pytest.approx(float(reset.fvalue), rel=1e-8)
    Xc = sm.add_constant(X)
    lm = smd.het_breuschpagan(res.resid, Xc)[0]
    assert r.loc["Breusch-Pagan (Koenker)", "statistic"] == pytest.approx(lm, rel=1e-8)
    assert r.loc["White", "statistic"] == pytest.approx(smd.het_white(res.resid, Xc)[0], rel=1e-8)
    # uncentred VIF without intercept: statsmodels OLS without constant has an uncentred R^2
    for j in range(3):
        r2 = sm.OLS(X[:, j], np.delete(X, j, axis=1)).fit().rsquared
        assert r.loc[f"VIF: x{j}", "statistic"] == pytest.approx(1 / (1 - r2), rel=1e-9)


def test_one_regressor_without_constant():
    X, y = _random_design(61, n=60, p=1, const=False)
    ls = fit_ols(X, y)
    r = run_checks(ls, has_const=False)
    res = _sm_ols(X, y)
    lm = smd.het_breuschpagan(res.resid, sm.add_constant(X))[0]
    assert r.loc["Breusch-Pagan (Koenker)", "statistic"] == pytest.approx(lm, rel=1e-8)
    assert r.loc["RESET", "statistic"] == pytest.approx(
        float(smd.linear_reset(res, power=3, use_f=True).fvalue), rel=1e-8)
    assert r.loc["VIF: x0", "statistic"] == pytest.approx(1.0)


def test_intercept_only_model():
    rng = np.random.default_rng(71)
    y = rng.standard_normal(50)
    ls = fit_ols(np.ones((50, 1)), y, names=["Intercept"])
    r = run_checks(ls)
    for name in ["RESET", "Breusch-Pagan (Koenker)", "Breusch-Pagan (original)", "White"]:
        assert math.isnan(r.loc[name, "statistic"])
        assert r.loc[name, "reading"].startswith("Undefined")
    # residuals are y - mean: statsmodels on them
    e = y - y.mean()
    assert r.loc["Durbin-Watson", "statistic"] == pytest.approx(durbin_watson(e), rel=1e-10)
    assert r.loc["Jarque-Bera", "statistic"] == pytest.approx(jarque_bera(e)[0], rel=1e-9)
    hc = _sm_harvey_collier(np.ones((50, 1)), y)
    assert r.loc["Harvey-Collier", "statistic"] == pytest.approx(hc.statistic, rel=1e-8)
    assert not any(i.startswith("VIF") for i in r.index)


# ------------------------------------------------------------------------------------------
# hostile cases


def test_exact_fit_is_undefined_without_warnings():
    rng = np.random.default_rng(81)
    X = np.column_stack([np.ones(40), rng.standard_normal((40, 2))])
    y = X @ np.array([1.0, 2.0, -3.0])
    r = run_checks(fit_ols(X, y))  # warnings are errors under pytest
    for name in TESTS:
        assert math.isnan(r.loc[name, "statistic"]) and math.isnan(r.loc[name, "pvalue"])
        assert "fits these rows exactly" in r.loc[name, "reading"]
    assert np.isfinite(r.loc["VIF: x1", "statistic"])


def test_as_many_rows_as_columns():
    rng = np.random.default_rng(82)
    X = np.column_stack([np.ones(3), rng.standard_normal((3, 2))])
    r = run_checks(fit_ols(X, rng.standard_normal(3)))
    assert r.loc[TESTS, "statistic"].isna().all()


def test_tiny_sample():
    rng = np.random.default_rng(83)
    X = np.column_stack([np.ones(6), rng.standard_normal((6, 2))])
    y = rng.standard_normal(6)
    r = run_checks(fit_ols(X, y))
    # RESET: 6 rows - 3 columns - 2 powers leaves 1 degree of freedom: still defined
    assert r.loc["RESET", "df"] == "2, 1"
    # White: 1 + 2 + 3 auxiliary columns leave no degrees of freedom in 6 rows
    assert r.loc["White", "reading"].startswith("Undefined")
    for name in ["Breusch-Pagan (Koenker)", "Jarque-Bera", "Harvey-Collier", "Ljung-Box"]:
        assert np.isfinite(r.loc[name, "statistic"])
        assert "Small sample (n = 6)" in r.loc[name, "reading"]
    assert r.loc["Ljung-Box", "df"] == "1"  # max(1, min(10, 6 // 5))


def test_aliased_column_has_infinite_vif():
    X, y = _random_design(91, n=80, p=3)
    X = np.column_stack([X, X[:, 1] + 2 * X[:, 2]])
    ls = fit_ols(X, y, names=["const", "a", "b", "a_plus_2b"])
    assert ls.aliased  # the kernel dropped one of the three
    v = vif(ls)
    assert math.isinf(v[ls.aliased[0]])
    r = run_checks(ls)
    assert "aliased" in r.loc[f"VIF: {ls.aliased[0]}", "reading"]
    assert r.loc["RESET", "df"] == f"2, {80 - 3 - 2}"


def test_readings_follow_alpha_and_sample_size(macro):
    ls, r = macro
    assert "Curvature not captured" in r.loc["RESET", "reading"]
    strict = run_checks(ls, lags=4, alpha=0.001)
    assert strict.loc["RESET", "reading"].startswith("No sign of missed curvature")
    assert "Spread changes" in r.loc["White", "reading"]
    big = run_checks(ls, lags=4, large_n=100)
    assert "even a negligible departure" in big.loc["RESET", "reading"]
    assert "even a negligible departure" not in big.loc["Ljung-Box", "reading"]  # not significant
    assert "even a negligible departure" not in r.loc["RESET", "reading"]


def test_has_const_true_needs_a_constant_in_the_design():
    X, y = _random_design(95, n=50, p=2, const=False)
    with pytest.raises(ValueError, match="has_const=False"):
        run_checks(fit_ols(X, y))


def test_implied_constant_is_accepted():
    # indicators for every group reproduce the constant without an explicit column
    rng = np.random.default_rng(96)
    g = rng.integers(0, 3, 90)
    X = np.column_stack([(g == j).astype(float) for j in range(3)] + [rng.standard_normal(90)])
    y = X @ np.array([1.0, 2.0, 3.0, 0.5]) + rng.standard_normal(90)
    r = run_checks(fit_ols(X, y))
    res = _sm_ols(X, y)
    # statsmodels wants an explicit constant: the same column space as [1, g==1, g==2, x]
    Xc = np.column_stack([np.ones(90), X[:, 1:]])
    assert r.loc["White", "statistic"] == pytest.approx(
        _quiet(smd.het_white, res.resid, Xc)[0], rel=1e-8)
    ref = _quiet(variance_inflation_factor, Xc, 3)
    assert r.loc["VIF: x3", "statistic"] == pytest.approx(ref, rel=1e-9)


@pytest.mark.parametrize("kwargs,match", [
    ({"alpha": 1.5}, "alpha"),
    ({"alpha": 0}, "alpha"),
    ({"lags": 0}, "lags"),
    ({"lags": 2.5}, "lags"),
    ({"lags": 500}, "smaller lags"),
    ({"large_n": -1}, "large_n"),
    ({"order": np.arange(5)}, "one value per row"),
    ({"order": np.r_[np.nan, np.arange(201.0)]}, "missing"),
    ({"order": np.array(["a"] * 202)}, "numbers or datetimes"),
])
def test_bad_arguments_say_what_to_do(macro, kwargs, match):
    ls, _ = macro
    with pytest.raises(ValueError, match=match):
        run_checks(ls, **kwargs)


def test_not_a_fit():
    with pytest.raises(TypeError, match="fit_ols"):
        run_checks(np.zeros((3, 3)))
    with pytest.raises(TypeError, match="fit_ols"):
        vif("model")


# ------------------------------------------------------------------------------------------
# a subset of the checks


@pytest.mark.parametrize("only", [
    ("Jarque-Bera", "Breusch-Pagan (Koenker)", "Ljung-Box"),  # the workbench's quick set
    ("Ljung-Box", "Durbin-Watson", "Jarque-Bera", "Breusch-Pagan (Koenker)"),
    ("VIF", "White"),
    ("Breusch-Pagan (original)", "Harvey-Collier", "RESET"),
    CHECK_NAMES,
])
def test_subset_equals_rows_of_full_table(only):
    # weighted, with a time order and a zero-weight row, so every note and caveat is in play
    X, y = _random_design(111, n=300, p=4)
    rng = np.random.default_rng(112)
    w = rng.uniform(0.5, 2.0, 300)
    w[7] = 0.0
    t = rng.permutation(300)
    ls = fit_ols(X, y, weights=w)
    full = run_checks(ls, order=t, large_n=100)
    sub = run_checks(ls, order=t, large_n=100, only=only)
    wanted = [i for i in full.index if i in only or (i.startswith("VIF: ") and "VIF" in only)]
    pd.testing.assert_frame_equal(sub, full.loc[wanted], check_exact=True)


def test_subset_on_reference_model_keeps_reference_values(macro):
    ls, full = macro
    sub = run_checks(ls, lags=4, only=["Ljung-Box", "Breusch-Pagan (Koenker)", "Jarque-Bera"])
    assert list(sub.index) == ["Breusch-Pagan (Koenker)", "Ljung-Box", "Jarque-Bera"]
    pd.testing.assert_frame_equal(sub, full.loc[sub.index], check_exact=True)
    # R lmtest::bptest(fm) and Box.test(lag=4), statsmodels test_diagnostic.py
    assert sub.loc["Breusch-Pagan (Koenker)", "statistic"] == pytest.approx(0.709924388395087,
                                                                            rel=1e-10)
    assert sub.loc["Ljung-Box", "statistic"] == pytest.approx(5.23587172795227, rel=1e-10)


def test_empty_subset_is_an_empty_table(macro):
    ls, full = macro
    r = run_checks(ls, only=())
    assert r.shape == (0, 5) and r.index.name == "test"
    assert list(r.dtypes) == list(full.dtypes)


@pytest.mark.parametrize("only,exc,match", [
    (("White", "Whit"), ValueError, "'Whit'.*valid names: 'RESET'.*'VIF'"),
    (("VIF: gdp_growth",), ValueError, '"VIF" selects every VIF row'),
    ("Ljung-Box", ValueError, r"only=\('Ljung-Box',\)"),
    ((1,), ValueError, "unknown check name 1"),
    (3, TypeError, "collection of check names"),
])
def test_bad_subset_names_say_what_is_valid(macro, only, exc, match):
    ls, _ = macro
    with pytest.raises(exc, match=match):
        run_checks(ls, only=only)
