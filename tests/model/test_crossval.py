"""Cross-validation from per-fold R factors, checked against refits by statsmodels.

Every held-out prediction must equal what statsmodels OLS/WLS gives when refitted on that fold's
training rows (the naive k-fit procedure); Longley's certified values come from NIST StRD as
shipped by statsmodels (``statsmodels/regression/tests/results/results_regression.py``).
"""
import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from statsmodels.stats.outliers_influence import OLSInfluence

from afterfit.model.crossval import CVResult, cross_validate, make_folds
from afterfit.model.ols import fit_ols


def _design(n, p, seed):
    rng = np.random.default_rng(seed)
    X = np.column_stack([np.ones(n), rng.standard_normal((n, p - 1))])
    y = X @ np.arange(1.0, p + 1) + rng.standard_normal(n)
    return X, y, rng


def _naive(X, y, folds, scheme, weights=None, method="pinv"):
    """The k-fit procedure with statsmodels: refit on each training set, predict its fold."""
    pred = np.full(len(y), np.nan)
    for j in np.unique(folds[folds >= 0]):
        test = folds == j
        train = (folds < j) if scheme == "forward" else ~test
        if weights is None:
            model = sm.OLS(y[train], X[train])
        else:
            model = sm.WLS(y[train], X[train], weights=weights[train])
        pred[test] = model.fit(method=method).predict(X[test])
    return pred


def _pooled(y, pred, weights=None):
    ok = ~np.isnan(pred)
    w = np.ones(len(y)) if weights is None else weights
    e = y[ok] - pred[ok]
    return np.sqrt(np.sum(w[ok] * e**2) / np.sum(w[ok]))


# --- folds --------------------------------------------------------------------------------------


def test_kfold_labels_balanced_seeded():
    f = make_folds(103, k=10, seed=4)
    assert f.dtype.kind == "i" and f.shape == (103,)
    counts = np.bincount(f)
    assert len(counts) == 10 and counts.max() - counts.min() <= 1
    assert np.array_equal(f, make_folds(103, k=10, seed=4))
    assert not np.array_equal(f, make_folds(103, k=10, seed=5))


def test_blocked_labels_follow_time_order():
    rng = np.random.default_rng(0)
    times = pd.Series(pd.date_range("2001-01-01", periods=50, freq="D")).sample(frac=1, random_state=1)
    f = make_folds(50, k=5, order=times.to_numpy(), scheme="blocked")
    ordered = f[np.argsort(times.to_numpy(), kind="stable")]
    assert np.array_equal(ordered, np.repeat(np.arange(5), 10))
    # numbers as the key; without a key the rows are taken as already ordered
    t = rng.uniform(size=50)
    fb = make_folds(50, k=5, order=t, scheme="blocked")
    assert np.all(np.diff(fb[np.argsort(t)]) >= 0)
    assert np.array_equal(make_folds(7, k=3, scheme="blocked"), [0, 0, 0, 1, 1, 2, 2])


def test_forward_labels_first_block_train_only():
    f = make_folds(12, k=3, scheme="forward")
    # k + 1 = 4 blocks of 3; the first is never held out
    assert np.array_equal(f, [-1, -1, -1, 0, 0, 0, 1, 1, 1, 2, 2, 2])


@pytest.mark.parametrize("k, n, scheme, match", [
    (11, 10, "kfold", r"k <= 10"),
    (11, 10, "blocked", r"k <= 10"),
    (10, 10, "forward", r"k <= 9"),
    (1, 10, "kfold", r"at least 2 folds"),
    (0, 10, "blocked", r"at least 2 folds"),
])
def test_make_folds_bad_k(k, n, scheme, match):
    with pytest.raises(ValueError, match=match):
        make_folds(n, k=k, scheme=scheme)


def test_make_folds_bad_inputs():
    with pytest.raises(ValueError, match="scheme must be one of"):
        make_folds(10, k=2, scheme="loo")
    with pytest.raises(ValueError, match="whole number"):
        make_folds(10, k=2.5)
    with pytest.raises(ValueError, match="missing values"):
        make_folds(4, k=2, order=[1.0, np.nan, 3.0, 4.0], scheme="blocked")
    with pytest.raises(ValueError, match="one value per row"):
        make_folds(4, k=2, order=[1, 2, 3], scheme="blocked")
    with pytest.raises(ValueError, match="at least 2 rows"):
        make_folds(1, k=2)


# --- agreement with statsmodels refits (source: statsmodels OLS/WLS, fitted per training set) -----


@pytest.mark.parametrize("scheme", ["kfold", "blocked", "forward"])
@pytest.mark.parametrize("weighted", [False, True])
def test_matches_statsmodels_refits(scheme, weighted):
    X, y, rng = _design(257, 5, seed=1)
    w = rng.uniform(0.2, 3.0, len(y)) if weighted else None
    t = rng.uniform(0, 100, len(y))
    folds = make_folds(len(y), k=7, seed=2, order=t, scheme=scheme)
    res = cross_validate(X, y, folds, weights=w, scheme=scheme)
    ref = _naive(X, y, folds, scheme, weights=w)
    assert isinstance(res, CVResult)
    assert np.array_equal(np.isnan(res.predictions), np.isnan(ref))
    np.testing.assert_allclose(res.predictions, ref, rtol=1e-8, atol=1e-10)
    assert res.rmse_cv == pytest.approx(_pooled(y, ref, w), rel=1e-8)
    full = (sm.OLS(y, X) if w is None else sm.WLS(y, X, weights=w)).fit()
    wts = np.ones(len(y)) if w is None else w
    assert res.rmse_train == pytest.approx(np.sqrt(full.ssr / wts.sum()), rel=1e-8)
    # per-fold rows and the standard error across folds
    pf = res.per_fold
    assert list(pf.columns[:4]) == ["fold", "n_train", "n_test", "rmse_test"]
    assert pf["n_test"].sum() == np.sum(folds >= 0) and res.k == 7 == len(pf)
    for row in pf.itertuples():
        m = folds == row.fold
        assert row.rmse_test == pytest.approx(_pooled(y[m], ref[m], None if w is None else w[m]), rel=1e-8)
    assert res.rmse_cv_se == pytest.approx(pf["rmse_test"].std(ddof=1) / np.sqrt(7), rel=1e-12)
    assert (pf["rank"] == 5).all() and (pf["aliased"] == ()).all()


@pytest.mark.parametrize("scheme", ["kfold", "forward"])
@pytest.mark.parametrize("weighted", [False, True])
def test_column_major_design_read_in_windows_matches_statsmodels(monkeypatch, scheme, weighted):
    # the Study passes a column-major design; its rows are then read window by window, with
    # many windows here (small tiles), including windows where some folds have no rows
    from afterfit.model import crossval

    monkeypatch.setattr(crossval, "_TILE_ELEMENTS", 2**7)
    X, y, rng = _design(611, 4, seed=21)
    X = np.asfortranarray(X)
    w = rng.uniform(0.2, 3.0, len(y)) if weighted else None
    folds = make_folds(len(y), k=9, seed=3, scheme=scheme)
    res = cross_validate(X, y, folds, weights=w, scheme=scheme)
    ref = _naive(X, y, folds, scheme, weights=w)  # source: statsmodels OLS/WLS refits
    np.testing.assert_allclose(res.predictions, ref, rtol=1e-8, atol=1e-10)
    assert res.rmse_cv == pytest.approx(_pooled(y, ref, w), rel=1e-8)
    c_order = cross_validate(np.ascontiguousarray(X), y, folds, weights=w, scheme=scheme)
    np.testing.assert_allclose(res.predictions, c_order.predictions, rtol=1e-10, atol=1e-12)


def test_zero_weights_take_no_part_but_are_predicted():
    # statsmodels WLS with weight 0 drops a row's influence the same way (its whitened row is 0)
    X, y, rng = _design(90, 3, seed=12)
    w = rng.uniform(0.5, 2.0, 90)
    w[rng.choice(90, 9, replace=False)] = 0.0
    folds = make_folds(90, k=5, seed=3)
    res = cross_validate(X, y, folds, weights=w)
    ref = _naive(X, y, folds, "kfold", weights=w)
    np.testing.assert_allclose(res.predictions, ref, rtol=1e-8)
    assert np.isfinite(res.predictions[w == 0]).all()
    assert res.rmse_cv == pytest.approx(_pooled(y, ref, w), rel=1e-8)
    assert res.per_fold["n_test"].sum() == 90
    # a fold with only zero-weight rows has no error of its own
    w2 = np.where(folds == 0, 0.0, 1.0)
    res2 = cross_validate(X, y, folds, weights=w2)
    pf = res2.per_fold.set_index("fold")
    assert np.isnan(pf.loc[0, "rmse_test"]) and np.isfinite(pf.loc[[1, 2, 3, 4], "rmse_test"]).all()
    assert res2.rmse_cv_se == pytest.approx(pf["rmse_test"].iloc[1:].std(ddof=1) / 2, rel=1e-12)


def test_forward_training_set_is_the_past_only():
    X, y, _ = _design(80, 3, seed=3)
    folds = make_folds(80, k=4, scheme="forward")
    res = cross_validate(X, y, folds, scheme="forward")
    assert res.per_fold["n_train"].tolist() == [16, 32, 48, 64]
    assert np.isnan(res.predictions[folds == -1]).all()
    # the first held-out fold is predicted from the train-only block alone
    b = sm.OLS(y[:16], X[:16]).fit().params
    np.testing.assert_allclose(res.predictions[16:32], X[16:32] @ b, rtol=1e-10)


def test_train_only_rows_join_every_training_set_in_kfold():
    X, y, _ = _design(60, 3, seed=5)
    folds = make_folds(60, k=5, seed=0)
    folds[:6] = -1
    res = cross_validate(X, y, folds)
    np.testing.assert_allclose(res.predictions, _naive(X, y, folds, "kfold"), rtol=1e-8, atol=1e-10)
    assert np.isnan(res.predictions[:6]).all()


def test_leave_one_out_equals_press_residuals_on_longley():
    # LOO errors equal the PRESS residuals e_i / (1 - h_i) of the full fit (statsmodels
    # OLSInfluence.resid_press); Longley is NIST StRD "higher difficulty", cond(X) ~ 5e9.
    from statsmodels.datasets import longley
    from statsmodels.regression.tests.results.results_regression import Longley

    data = longley.load()
    X = sm.add_constant(np.asarray(data.exog, dtype=float), prepend=False)
    y = np.asarray(data.endog, dtype=float)
    n = len(y)
    res = cross_validate(X, y, make_folds(n, k=n, seed=0))
    press = OLSInfluence(sm.OLS(y, X).fit()).resid_press
    np.testing.assert_allclose(y - res.predictions, press, rtol=1e-7)
    np.testing.assert_allclose(res.predictions, _naive(X, y, res.folds, "kfold", method="qr"), rtol=1e-9)
    # NIST certified residual sum of squares (via statsmodels' copy): rmse_train = sqrt(SSR / n)
    assert res.rmse_train == pytest.approx(np.sqrt(Longley().ssr / n), rel=1e-9)


def test_ill_conditioned_design_stays_accurate():
    # Cubic in t with t in [100, 110]: cond(X) ~ 7e10, so a Gram (X'X) solve loses every digit;
    # R factors keep the held-out predictions at statsmodels' QR refits (method="qr").
    rng = np.random.default_rng(2)
    n = 300
    t = np.sort(rng.uniform(100, 110, n))
    X = np.column_stack([np.ones(n), t, t**2, t**3])
    y = np.sin(t) + 0.01 * rng.standard_normal(n)
    folds = make_folds(n, k=5, seed=0)
    res = cross_validate(X, y, folds)
    ref = _naive(X, y, folds, "kfold", method="qr")
    np.testing.assert_allclose(res.predictions, ref, rtol=0, atol=1e-8)
    assert (res.per_fold["rank"] == 4).all()
    assert not res.predictions.flags.writeable
    gram = np.full(n, np.nan)
    for j in range(5):
        tr = folds != j
        b = np.linalg.lstsq(X[tr].T @ X[tr], X[tr].T @ y[tr], rcond=None)[0]
        gram[~tr] = X[~tr] @ b
    # the test is sensitive: the squared-condition route misses by far more than our tolerance
    assert np.max(np.abs(gram - ref)) > 1e-4


# --- rank-deficient training sets ---------------------------------------------------------------


def test_dummy_all_zero_in_a_training_set_is_dropped_for_that_fold():
    # A step dummy that is 1 only in the last time block: blocked CV holding out that block has a
    # training set where the column is all zero.  The fold drops it (coefficient 0), which is the
    # minimum-norm answer statsmodels' default pinv fit gives as well.
    rng = np.random.default_rng(7)
    n = 90
    t = np.arange(n, dtype=float)
    step = (t >= 60).astype(float)
    X = np.column_stack([np.ones(n), t / n, step])
    y = 1 + 2 * t / n - 3 * step + 0.1 * rng.standard_normal(n)
    folds = make_folds(n, k=3, order=t, scheme="blocked")
    with warnings.catch_warnings():
        # statsmodels says the design is rank-deficient for that fold; that is the point here
        warnings.simplefilter("ignore")
        ref = _naive(X, y, folds, "blocked")
    res = cross_validate(X, y, folds, scheme="blocked", names=["Intercept", "t", "after_step"])
    np.testing.assert_allclose(res.predictions, ref, rtol=1e-8, atol=1e-10)
    pf = res.per_fold.set_index("fold")
    assert pf.loc[2, "rank"] == 2 and pf.loc[2, "aliased"] == ("after_step",)
    assert pf.loc[0, "rank"] == 3 and pf.loc[0, "aliased"] == ()
    assert np.isnan(res.params[2, 2]) and np.isfinite(res.params[0]).all()
    train = folds != 2
    assert fit_ols(X[train], y[train], names=["Intercept", "t", "after_step"]).aliased == ("after_step",)
    # the full-data fit estimates the step, so rmse_train reflects all three columns
    assert res.rmse_train == pytest.approx(np.sqrt(sm.OLS(y, X).fit().ssr / n), rel=1e-8)


def test_collinear_columns_in_a_training_set_match_a_refit_without_the_dropped_column():
    # x2 = x0 + x1 on the training rows of fold 0 only; the fold keeps the columns a pivoted QR
    # picks, and its predictions equal a statsmodels refit on exactly those columns.
    X, y, rng = _design(120, 3, seed=11)
    folds = make_folds(120, k=4, seed=1)
    X = np.column_stack([X, X[:, 0] + X[:, 1]])
    X[folds == 0, 3] += rng.standard_normal(np.sum(folds == 0))
    names = ["c", "a", "b", "a_plus_c"]
    res = cross_validate(X, y, folds, names=names)
    pf = res.per_fold.set_index("fold")
    # the later of the collinear columns goes, as in the kernel's own fit of those rows
    tr = folds != 0
    assert pf.loc[0, "rank"] == 3 and pf.loc[0, "aliased"] == ("a_plus_c",)
    assert fit_ols(X[tr], y[tr], names=names).aliased == ("a_plus_c",)
    ref = sm.OLS(y[tr], X[tr][:, :3]).fit().predict(X[~tr][:, :3])
    np.testing.assert_allclose(res.predictions[~tr], ref, rtol=1e-8)
    assert (pf.loc[[1, 2, 3], "rank"] == 4).all()


# --- small and hostile input --------------------------------------------------------------------


def test_small_n_leave_one_out():
    X = np.column_stack([np.ones(4), [0.0, 1.0, 2.0, 4.0]])
    y = np.array([1.0, 2.0, 2.5, 5.0])
    res = cross_validate(X, y, make_folds(4, k=4, seed=0))
    ref = _naive(X, y, res.folds, "kfold")
    np.testing.assert_allclose(res.predictions, ref, rtol=1e-10)
    assert res.per_fold["n_train"].tolist() == [3, 3, 3, 3]


def test_many_folds_and_sparse_labels():
    # 90 folds takes the per-fold prediction path; gaps and large labels are just labels
    X, y, _ = _design(90, 3, seed=8)
    loo = make_folds(90, k=90, seed=0)
    res = cross_validate(X, y, loo)
    np.testing.assert_allclose(res.predictions, _naive(X, y, loo, "kfold"), rtol=1e-8)
    press = OLSInfluence(sm.OLS(y, X).fit()).resid_press  # statsmodels PRESS residuals
    np.testing.assert_allclose(y - res.predictions, press, rtol=1e-8)
    sparse = np.array([3, 70_000, 10**9])[make_folds(90, k=3, seed=1)]
    res = cross_validate(X, y, sparse)
    np.testing.assert_allclose(res.predictions, _naive(X, y, sparse, "kfold"), rtol=1e-8)
    assert res.per_fold["fold"].tolist() == [3, 70_000, 10**9]


def test_hostile_inputs_raise_with_advice():
    X, y, _ = _design(20, 3, seed=0)
    f = make_folds(20, k=4)
    with pytest.raises(ValueError, match="at least 2 held-out folds"):
        cross_validate(X, y, np.zeros(20, dtype=int))
    with pytest.raises(ValueError, match="-1 \\(train only\\)"):
        cross_validate(X, y, np.where(f == 0, -2, f))
    with pytest.raises(ValueError, match="one label per row"):
        cross_validate(X, y, f[:-1])
    with pytest.raises(ValueError, match="whole-number labels"):
        cross_validate(X, y, f + 0.5)
    with pytest.raises(ValueError, match="2-D"):
        cross_validate(X[:, 1], y, f)
    with pytest.raises(ValueError, match="one value per row of X"):
        cross_validate(X, y[:-1], f)
    Xn = X.copy()
    Xn[5, 1] = np.nan
    with pytest.raises(ValueError, match="row 5"):
        cross_validate(Xn, y, f)
    with pytest.raises(ValueError, match="finite and non-negative"):
        cross_validate(X, y, f, weights=np.r_[-1.0, np.ones(19)])
    with pytest.raises(ValueError, match="at least one positive"):
        cross_validate(X, y, f, weights=np.zeros(20))
    with pytest.raises(ValueError, match="scheme must be one of"):
        cross_validate(X, y, f, scheme="shuffle")
    with pytest.raises(ValueError, match="rows labelled -1"):
        cross_validate(X, y, f, scheme="forward")
    with pytest.raises(ValueError, match="leaves 2 training rows"):
        cross_validate(X[:6], y[:6], np.array([-1, -1, 0, 0, 1, 1]), scheme="forward")
    with pytest.raises(ValueError, match="names has 2 entries"):
        cross_validate(X, y, f, names=["a", "b"])
