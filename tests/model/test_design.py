"""Design matrices: column names and values must be exactly statsmodels' (reference: statsmodels
``smf.ols(formula, df).exog`` / ``exog_names``, which use patsy)."""
import numpy as np
import pandas as pd
import patsy
import pytest
import statsmodels.formula.api as smf

from afterfit.model.design import DesignCache, design_for, working_frame
from afterfit.model.terms import Declarations, normalise_term, quote_name, split_formula


def _frame(n=240, seed=3):
    rng = np.random.default_rng(seed)
    df = pd.DataFrame({
        "y": rng.normal(size=n), "x": rng.normal(size=n), "z": rng.uniform(1, 3, size=n),
        "g": rng.choice(["b", "a", "c"], n), "h": rng.choice([1, 2], n),
        "a b": rng.normal(size=n), 'q"uote': rng.normal(size=n),
    })
    df.loc[3, "x"] = np.nan
    df.loc[5, "g"] = None
    return df


FORMULAS = [
    "y ~ x + C(g) + C(g):x + np.log(z) + I(x**2)",
    "y ~ C(g)*x",
    'y ~ x:z + cr(z, df=4, constraints="center") + C(h) + Q("a b")',
    "y ~ 0 + C(g) + x",
    "y ~ center(z) + standardize(h) + C(g, Sum)",  # stateful transforms (no NaN inputs)
    "y ~ " + quote_name('q"uote') + " + x",
]


@pytest.mark.parametrize("formula", FORMULAS)
def test_columns_equal_statsmodels(formula):
    df = _frame()
    ref = smf.ols(formula, df)  # source: statsmodels' own design matrix
    cache = DesignCache(working_frame(df))
    _, names, tcs = design_for(cache, patsy.ModelDesc.from_formula(formula).rhs_termlist)
    X = np.column_stack([tc.values for tc in tcs])
    ok = np.isfinite(X).all(axis=1) & np.isfinite(cache.response("y"))
    assert names == ref.exog_names
    assert ok.sum() == ref.nobs
    np.testing.assert_array_equal(X[ok], ref.exog)


def test_adding_a_term_evaluates_only_that_term():
    df = _frame()
    cache = DesignCache(working_frame(df))
    design_for(cache, patsy.ModelDesc.from_formula("y ~ x + C(g)").rhs_termlist)
    before = set(cache._terms)
    design_for(cache, patsy.ModelDesc.from_formula("y ~ x + C(g) + C(g):x").rhs_termlist)
    added = set(cache._terms) - before
    assert [k[0].name() for k in added] == ["C(g):x"]


def test_user_frame_is_not_modified():
    df = _frame()
    copy = df.copy(deep=True)
    cache = DesignCache(working_frame(df))
    design_for(cache, patsy.ModelDesc.from_formula(FORMULAS[0]).rhs_termlist)
    pd.testing.assert_frame_equal(df, copy)


def test_unknown_name_gives_advice():
    df = _frame()
    cache = DesignCache(working_frame(df))
    with pytest.raises(ValueError, match="Q\\(\"name\"\\)"):
        design_for(cache, patsy.ModelDesc.from_formula("y ~ nosuch").rhs_termlist)


@pytest.mark.parametrize("name", ["a b", 'q"uote', "back\\slash", "new\nline", "x+y", "import",
                                  "__import__('os').system('touch canary')", "ünï", "C"])
def test_quote_name_round_trips_through_patsy(name, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    df = pd.DataFrame({name: [1.0, 2.0, 4.0], "y": [0.0, 1.0, 3.0]})
    text = quote_name(name)
    m = patsy.dmatrix("0 + " + text, df, return_type="dataframe")
    np.testing.assert_array_equal(m.iloc[:, 0].to_numpy(), [1.0, 2.0, 4.0])
    assert not (tmp_path / "canary").exists()


def test_split_and_normalise():
    assert split_formula("y ~ x*z") == ("y", ["x", "z", "x:z"], True)
    assert split_formula("y ~ 0 + x") == ("y", ["x"], False)
    assert normalise_term("C(g):x") == ["C(g):x"]
    with pytest.raises(ValueError, match="~"):
        split_formula("x + z")
    with pytest.raises(ValueError):
        normalise_term("   ")


def test_declarations_validate_columns():
    with pytest.raises(ValueError, match="not in the data"):
        Declarations.build(["a", "b"], groups=["c"])
    with pytest.raises(ValueError, match="time="):
        Declarations.build(["a"], period=12)
    d = Declarations.build(["t", "g", "x"], time="t", period=[12, 6], groups="g",
                           plausible={"x": "physics"})
    assert d.period == (12.0, 6.0) and d.groups == ("g",) and d.plausible == {"x": "physics"}
