"""Study: the public object.  References: statsmodels itself (OLS/WLS results, compare_f_test)."""
import json

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import afterfit as af


def _data(n=150, seed=0):
    rng = np.random.default_rng(seed)
    df = pd.DataFrame({
        "x": rng.normal(size=n), "z": rng.uniform(1, 4, size=n),
        "g": rng.choice(["north", "south", "east"], n), "w": rng.uniform(0.5, 2, size=n),
    })
    df["y"] = 1 + 2 * df.x - 0.7 * df.z + (df.g == "south") * df.x + rng.normal(size=n)
    df.index = [f"r{i}" for i in range(n)]
    return df


@pytest.mark.parametrize("cov_type", ["nonrobust", "HC0", "HC1", "HC2", "HC3"])
def test_fit_equals_statsmodels_ols(cov_type):
    df = _data()
    s = af.Study(df, "y ~ x + z + C(g)", cov_type=cov_type)
    ref = smf.ols("y ~ x + z + C(g)", df).fit(cov_type=cov_type)  # source: statsmodels
    f = s.fit
    pd.testing.assert_series_equal(f.params, ref.params, check_names=False, rtol=1e-10)
    pd.testing.assert_series_equal(f.bse, ref.bse, check_names=False, rtol=1e-10)
    np.testing.assert_allclose(f.pvalues.to_numpy(), ref.pvalues.to_numpy(), rtol=1e-8)
    for a, b in [(f.aic, ref.aic), (f.bic, ref.bic), (f.r2, ref.rsquared),
                 (f.r2_adj, ref.rsquared_adj), (f.llf, ref.llf)]:
        assert a == pytest.approx(b, rel=1e-10)
    assert f.nobs == ref.nobs and f.df_resid == ref.df_resid
    pd.testing.assert_series_equal(f.resid, ref.resid, check_names=False, rtol=1e-9, atol=1e-12)


def test_fit_equals_statsmodels_wls():
    df = _data()
    s = af.Study(df, "y ~ x + C(g)", weights="w")
    ref = smf.wls("y ~ x + C(g)", df, weights=df["w"]).fit()  # source: statsmodels
    pd.testing.assert_series_equal(s.fit.params, ref.params, check_names=False, rtol=1e-10)
    pd.testing.assert_series_equal(s.fit.bse, ref.bse, check_names=False, rtol=1e-10)
    assert s.fit.aic == pytest.approx(ref.aic, rel=1e-10)
    assert s.fit.r2 == pytest.approx(ref.rsquared, rel=1e-10)


def test_missing_rows_reported_and_data_untouched():
    df = _data()
    df.loc["r3", "x"] = np.nan
    df.loc["r7", "z"] = np.inf
    before = df.copy(deep=True)
    s = af.Study(df, "y ~ x + z")
    assert list(s.dropped) == ["r3", "r7"]
    assert s.fit.nobs == len(df) - 2
    pd.testing.assert_frame_equal(df, before)


def test_later_changes_to_the_users_frame_do_not_reach_the_study():
    # the Study shares the user's arrays (no copy) but keeps its data as it was: a refit after
    # the user edits the frame in place must equal statsmodels on the original values
    df = _data()
    original = df.copy(deep=True)
    s = af.Study(df, "y ~ x + z + C(g)")
    df.loc["r0", "x"] = 1e6
    df["z"] = 0.0
    s.add("I(x ** 2)", reason="checking the frame is kept")
    ref = smf.ols("y ~ x + z + C(g) + I(x ** 2)", original).fit()  # source: statsmodels
    pd.testing.assert_series_equal(s.fit.params, ref.params, check_names=False, rtol=1e-9)
    assert s.data.loc["r0", "x"] == original.loc["r0", "x"]


def test_bad_inputs_say_what_to_do():
    df = _data()
    with pytest.raises(ValueError, match="~"):
        af.Study(df, "y + x")
    with pytest.raises(ValueError, match="Q\\(\"name\"\\)"):
        af.Study(df, "y ~ nosuch")
    with pytest.raises(ValueError, match="reset_index"):
        af.Study(pd.concat([df, df]), "y ~ x")
    with pytest.raises(ValueError, match="numeric"):
        af.Study(df, "g ~ x")
    with pytest.raises(ValueError, match="parameters"):
        af.Study(df.iloc[:3], "y ~ x + z + C(g)")
    with pytest.raises(TypeError):
        af.Study(df.to_numpy(), "y ~ x")
    s = af.Study(df, "y ~ x")
    with pytest.raises(ValueError, match="reason"):
        s.exclude(["r1"], "")
    with pytest.raises(ValueError, match="not in the data"):
        s.exclude(["nope"], "typo")
    with pytest.raises(ValueError, match="not in the model"):
        s.remove("z")
    with pytest.raises(ValueError, match="nothing to undo"):
        s.undo()
    assert len(s.steps) == 1  # failed actions leave the history as it was


def test_exclude_include_undo_redo_exact():
    df = _data()
    s = af.Study(df, "y ~ x + z")
    p0 = s.fit.params.copy()
    s.exclude(["r1", "r2"], "sensor fault")
    ref = smf.ols("y ~ x + z", df.drop(index=["r1", "r2"])).fit()  # source: statsmodels
    pd.testing.assert_series_equal(s.fit.params, ref.params, check_names=False, rtol=1e-10)
    assert s.excluded == {"r1": "sensor fault", "r2": "sensor fault"}
    s.undo()
    pd.testing.assert_series_equal(s.fit.params, p0)
    s.redo()
    pd.testing.assert_series_equal(s.fit.params, ref.params, check_names=False, rtol=1e-10)
    s.include(["r1"])
    assert s.excluded == {"r2": "sensor fault"}


def test_compare_nested_equals_statsmodels_f_test():
    df = _data()
    s = af.Study(df, "y ~ x + z")
    s.add("C(g)", reason="regions differ by design")
    s.add("C(g):x", reason="regional slope")
    out = s.compare(0, 2)
    small = smf.ols("y ~ x + z", df).fit()
    big = smf.ols("y ~ x + z + C(g) + C(g):x", df).fit()
    f, p, dfd = big.compare_f_test(small)  # source: statsmodels compare_f_test
    assert out["nested"] and out["f"] == pytest.approx(f, rel=1e-9)
    assert out["pvalue"] == pytest.approx(p, rel=1e-8) and out["df_num"] == dfd
    assert out["delta_aic"] == pytest.approx(big.aic - small.aic, rel=1e-9)


def test_holdout_is_sealed_and_opened_once():
    df = _data(n=200)
    s = af.Study(df, "y ~ x + z", holdout=0.25, seed=4)
    hold = set(s.holdout_rows)
    assert len(hold) == 50 and not hold & set(s.rows)
    with pytest.raises(ValueError, match="holdout"):
        s.exclude([next(iter(hold))], "peek")
    rec = s.open_holdout()
    assert rec["n_holdout"] == 50 and not rec["already_opened"]
    again = s.open_holdout()
    assert again["already_opened"] and again["rmse_holdout"] == rec["rmse_holdout"]
    # the holdout RMSE equals statsmodels' prediction error on those rows
    train = df.drop(index=list(hold))
    ref = smf.ols("y ~ x + z", train).fit()
    err = df.loc[list(hold), "y"] - ref.predict(df.loc[list(hold)])
    assert rec["rmse_holdout"] == pytest.approx(float(np.sqrt((err**2).mean())), rel=1e-10)
    s.add("C(g)", reason="regions")
    assert s.steps[-1].after_holdout and not s.steps[0].after_holdout


def test_save_load_round_trip(tmp_path):
    df = _data()
    s = af.Study(df, "y ~ x", plausible={"z": "heat loss"})
    s.add("z")
    s.exclude(["r5"], 'odd "value"\nsecond line')
    s.undo()
    path = tmp_path / "study.json"
    s.save(path)
    t = af.Study.load(path, df)
    assert [x.detail for x in t.steps] == [x.detail for x in s.steps]
    assert t.position == s.position
    pd.testing.assert_series_equal(t.fit.params, s.fit.params)
    t.redo()
    assert t.excluded == {"r5": 'odd "value"\nsecond line'}
    with pytest.raises(ValueError, match="fingerprint"):
        af.Study.load(path, df.assign(x=df.x + 1))
    assert json.loads(path.read_text())["afterfit"] == 1


def test_subscribers_hear_every_change():
    df = _data()
    s = af.Study(df, "y ~ x")
    events = []
    off = s.subscribe(lambda study, ev: events.append(ev))
    s.exclude(["r0"], "test")
    s.undo()
    s.redo()
    off()
    s.include(["r0"])
    assert events == ["exclude", "undo", "redo"]


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.sampled_from(["ex", "inc", "undo", "redo", "add", "rm"]), min_size=1,
                max_size=20), st.integers(0, 10_000))
def test_undo_redo_random_sequences_restore_exact_fits(actions, seed):
    """Property: after any sequence, the fit at each position equals a fresh fit of that state."""
    df = _data(n=60, seed=1)
    s = af.Study(df, "y ~ x", plausible=["z"])
    rng = np.random.default_rng(seed)
    for a in actions:
        try:
            if a == "ex":
                s.exclude([f"r{rng.integers(60)}"], "random")
            elif a == "inc" and s.excluded:
                s.include([next(iter(s.excluded))])
            elif a == "undo" and s.can_undo:
                s.undo()
            elif a == "redo" and s.can_redo:
                s.redo()
            elif a == "add" and "z" not in s.terms:
                s.add("z")
            elif a == "rm" and "z" in s.terms:
                s.remove("z")
        except ValueError:
            pass  # e.g. the row was already excluded: refused, history unchanged
    params = s.fit.params
    fresh = smf.ols(s.formula, df.drop(index=list(s.excluded))).fit()  # source: statsmodels
    pd.testing.assert_series_equal(params, fresh.params, check_names=False, rtol=1e-10)
    while s.can_undo:
        s.undo()
    pd.testing.assert_series_equal(s.fit.params, smf.ols("y ~ x", df).fit().params,
                                   check_names=False, rtol=1e-10)


def test_shared_design_buffer_never_changes_an_earlier_model():
    """Adding a term reuses the parent's column buffer; siblings must not overwrite each other."""
    df = _data()
    s = af.Study(df, "y ~ x", plausible=["z", "w"])
    base = s._current
    s.add("z")
    child_a = s._current
    Xa = child_a.X.copy()
    s.undo()
    s.add("w")  # a sibling of child_a on the same rows
    child_b = s._current
    np.testing.assert_array_equal(child_a.X, Xa)
    assert child_a.X.shape[1] == child_b.X.shape[1] == 3
    ref = smf.ols("y ~ x + z", df).fit()  # source: statsmodels
    np.testing.assert_allclose(child_a.X, ref.model.exog, rtol=0, atol=0)
    np.testing.assert_allclose(base.X, smf.ols("y ~ x", df).fit().model.exog, rtol=0, atol=0)


def test_column_named_like_a_formula_function_is_refused_with_advice():
    df = _data()
    with pytest.raises(ValueError, match="rename"):
        af.Study(df.rename(columns={"z": "C"}), "y ~ x")
