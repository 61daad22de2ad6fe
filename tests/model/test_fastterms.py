"""fastterms.evaluate_block: candidate columns up to span, checked against outside references.

Reference sources, named beside each check:
- statsmodels ``RegressionResults.compare_f_test`` of a full refit (current model + term, from
  the formula text, on the same data frame) against the current model: the partial F statistic
  and its numerator degrees of freedom;
- patsy itself: the term's columns as the Study's design cache evaluates them
  (``_Model.term_block``), scored by the same ``score_candidates`` call, and patsy's ``cr()``
  columns for the spline basis.
The demo tables are invented (seeded) and serve only as inputs to those comparisons.
"""
from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from statsmodels.tools.sm_exceptions import SingularMatrixWarning

import afterfit as af
from afterfit.model.design import working_frame
from afterfit.model import candidates as cm  # not "C": formulas see this namespace
from afterfit.model.fastterms import evaluate_block
from afterfit.model.terms import quote_name

RTOL = 1e-8


# ---------------------------------------------------------------------------------------------
# helpers


def _catalogue(study):
    """The candidates Study.candidates() scores, built the same way."""
    model = study._current
    skip = {study.response}
    if study.weights_name:
        skip.add(study.weights_name)
    if study.declarations.time is not None and study.time_column != study.declarations.time:
        skip.add(study.declarations.time)
    return cm.catalogue(model.frame(), response=study.response, model_terms=list(study.terms),
                       declarations=study.declarations, time=study.time_column,
                       skip=tuple(skip), fit=model.ls)


def _fast(study, term, *, terms=True):
    """evaluate_block as Study.candidates() calls it (``terms=False``: without model_terms)."""
    model = study._current
    return evaluate_block(term, model.cache.frame, model.finite, intercept=study.state.intercept,
                          model_terms=study.terms if terms else None)


def _score(study, block):
    return cm.score_candidates(study._current.ls, [block]).iloc[0]


def _statsmodels_f(study, term, restricted):
    """F and numerator df of adding ``term``: statsmodels refit on the same frame."""
    frame = study._current.cache.frame
    with warnings.catch_warnings():
        # a spline holds the line, C(g):x with x present: the full design repeats a direction;
        # statsmodels warns and counts the rank with its pseudo-inverse
        warnings.simplefilter("ignore", SingularMatrixWarning)
        full = smf.ols(f"{study.formula} + {term}", data=frame).fit()
    assert full.nobs == restricted.nobs  # same rows, or the test is not nested
    with np.errstate(divide="ignore", invalid="ignore"):  # df_diff 0: checked by the caller
        f, _, df_diff = full.compare_f_test(restricted)
    return f, df_diff


def _check_term(study, term, restricted):
    """fast F == patsy-block F == statsmodels F for a term whose columns are all finite.

    Both with and without ``model_terms``.
    """
    want = _score(study, study._current.term_block(term)[0])  # source: patsy's columns
    f, df_diff = _statsmodels_f(study, term, restricted)  # source: statsmodels
    for terms in (True, False):
        got = _score(study, _fast(study, term, terms=terms))
        if df_diff == 0:  # the term repeats the model's columns: no test from any source
            assert np.isnan(got.statistic) and np.isnan(want.statistic)
            assert "adds nothing" in got.note or "no columns" in got.note
            continue
        assert got.df_num == want.df_num == df_diff
        assert got.statistic == pytest.approx(want.statistic, rel=RTOL)
        assert got.statistic == pytest.approx(f, rel=RTOL)


def _check_study(study, *, refits_per_kind=None):
    """Every catalogue term: fast F == patsy-block F; == statsmodels F (finite blocks).

    ``refits_per_kind`` limits the statsmodels refits to the first few candidates of each kind
    (each refit of a large table costs a second); the patsy comparison covers every candidate.
    """
    model = study._current
    restricted = smf.ols(study.formula, data=model.cache.frame).fit()
    assert restricted.nobs == study.fit.nobs
    kinds: dict = {}
    compared = refitted = 0
    for cand in _catalogue(study):
        fast = _fast(study, cand.term)
        assert fast is not None, cand.term  # every catalogue shape is handled
        assert fast.dtype == np.float64 and fast.shape[0] == len(model.rows)
        bare = _fast(study, cand.term, terms=False)  # without model_terms: same span
        block = model.term_block(cand.term)[0]
        got, want = _score(study, fast), _score(study, block)  # source: patsy's columns
        got_bare = _score(study, bare)
        finite = np.isfinite(block).all()
        assert np.isfinite(fast).all() == np.isfinite(bare).all() == finite, cand.term
        if not finite:  # missing values: no evidence, never a number
            assert np.isnan(got.statistic) and np.isnan(want.statistic)
            assert np.isnan(got_bare.statistic)
            assert "missing or infinite" in got.note
            continue
        assert fast.shape == block.shape, cand.term  # with model_terms: patsy's column count
        assert got.df_num == want.df_num == got_bare.df_num, cand.term
        assert got.statistic == pytest.approx(want.statistic, rel=RTOL), cand.term
        assert got_bare.statistic == pytest.approx(want.statistic, rel=RTOL), cand.term
        compared += 1
        kinds[cand.kind] = kinds.get(cand.kind, 0) + 1
        if refits_per_kind is not None and kinds[cand.kind] > refits_per_kind:
            continue
        f, df_diff = _statsmodels_f(study, cand.term, restricted)  # source: statsmodels
        assert got.df_num == df_diff, cand.term
        assert got.statistic == pytest.approx(f, rel=RTOL), cand.term
        refitted += 1
    return set(kinds), compared, refitted


# ---------------------------------------------------------------------------------------------
# the catalogue on the demo studies


def test_cold_store_every_candidate_matches_patsy_and_statsmodels():
    df = af.demo.cold_store()
    study = af.Study(df, df.attrs["first_formula"], time="month", period=1,
                     plausible={"throughput": ""})
    kinds, compared, refitted = _check_study(study)
    assert refitted == compared
    # trend, step change, cycles, spline, hinge, log, curvature, interaction all occur here
    assert {"trend", "step", "cycle", "cycle2", "spline", "hinge", "log", "power2",
            "interaction"} <= kinds
    assert compared >= 15


def test_orchard_every_candidate_matches_patsy_and_statsmodels():
    df = af.demo.orchard()
    study = af.Study(df, df.attrs["first_formula"], groups=["cultivar"], plausible=["soil_n"])
    kinds, compared, refitted = _check_study(study)
    assert refitted == compared
    # group levels C(block) and group slopes C(cultivar):irrigation_mm occur here
    assert {"group", "group_slope", "linear", "spline", "log", "hinge", "power2",
            "interaction"} <= kinds
    assert compared >= 25


def test_orchard_missing_levels_give_no_evidence():
    df = af.demo.orchard()
    study = af.Study(df, df.attrs["first_formula"])
    terms = [c.term for c in _catalogue(study)]
    assert "C(note)" in terms  # note is missing except for damaged trees
    fast = _fast(study, "C(note)")
    missing = study.data["note"].iloc[study._current.rows].isna().to_numpy()
    assert np.isnan(fast[missing]).all() and np.isfinite(fast[~missing]).all()
    assert np.isnan(_score(study, fast).statistic)
    assert np.isnan(_score(study, study._current.term_block("C(note)")[0]).statistic)  # patsy


def test_sensors_every_candidate_matches_patsy_and_statsmodels():
    df = af.demo.sensors(20_000)
    study = af.Study(df, df.attrs["first_formula"], time="timestamp",
                     period=[1 / 365.25, 7 / 365.25])
    kinds, compared, refitted = _check_study(study, refits_per_kind=1)
    assert refitted == len(kinds)
    assert {"trend", "cycle", "cycle2", "spline", "hinge", "log", "power2", "group_slope",
            "interaction", "linear"} <= kinds
    assert compared >= 80


def test_every_kind_of_the_catalogue_is_covered():
    # the union of the three demo studies above covers every kind the catalogue knows
    seen = set()
    for df, kw in [(af.demo.cold_store(), dict(time="month", period=1)),
                   (af.demo.orchard(), dict(groups=["cultivar"])),
                   (af.demo.sensors(5_000), dict(time="timestamp", period=1 / 365.25))]:
        study = af.Study(df, df.attrs["first_formula"], **kw)
        for cand in _catalogue(study):
            assert _fast(study, cand.term) is not None, cand.term
            seen.add(cand.kind)
    assert seen == set(cm.KINDS)


# ---------------------------------------------------------------------------------------------
# state memorised on every frame row, evaluated on the fitted rows


def _data(n=400, seed=3):
    rng = np.random.default_rng(seed)
    df = pd.DataFrame({
        "x": rng.uniform(1, 9, n), "z": rng.normal(size=n), "u": rng.normal(size=n),
        "g": rng.choice(["north", "south", "east"], n), "h": rng.choice(["p", "q"], n),
        "t": np.arange(n, dtype=float),
    })
    df["y"] = (1 + 0.4 * df.x + 0.1 * (df.x - 5) ** 2 + df.z + (df.g == "south") * df.z
               + rng.normal(size=n))
    df.loc[rng.choice(n, 40, replace=False), "y"] = np.nan  # rows the model cannot use
    return df


@pytest.mark.parametrize("formula", ["y ~ z", "y ~ 0 + z", "y ~ x + C(g)"])
@pytest.mark.parametrize("term", [
    'cr(x, df=4, constraints="center")', "cr(x, df=5)", "center(x)", "standardize(x)",
    "I(center(x) ** 2)", "x + I(x ** 2)", "np.maximum(x - 4.5, 0)", "x:u", "np.exp(u)",
    "np.sqrt(x) + np.abs(u)", "np.minimum(x, 6)", "x + center(u)", "cr(x, df=3):u",
])
def test_stateful_terms_memorised_on_all_frame_rows(formula, term):
    df = _data()
    study = af.Study(df, formula)
    assert len(study._current.rows) < len(study._current.cache.frame)  # rows were dropped
    # statsmodels is given the same frame: patsy memorises on all rows it is given
    restricted = smf.ols(study.formula, data=study._current.cache.frame).fit()
    _check_term(study, term, restricted)


@pytest.mark.parametrize("term", [
    "I(x ** 2)", "I((x - 4.5) ** 2)", "I((x + -4.5) ** 2)", "np.log(x)", "np.exp(-z)",
    "np.maximum(x - 4.5, 0)", "np.minimum(x, 6) + np.abs(z)", "np.sqrt(x)", "x:z:u",
    "np.sin(2 * np.pi * t / 7) + np.cos(2 * np.pi * t / 7)",
    "np.sin(4 * np.pi * t / 7) + np.cos(4 * np.pi * t / 7)", "I(-x / 2 + 3 * z ** 2 - +u)",
    "I(2 ** 3 * x)", "center(x):z", "C(g):x", "C(g)", "I(t >= 150)", "C(h):x:z",
])
def test_numeric_values_equal_patsy_values(term):
    df = _data()
    study = af.Study(df, "y ~ z + x")
    block = study._current.term_block(term)[0]  # source: patsy's columns
    np.testing.assert_allclose(_fast(study, term), block, rtol=1e-13, atol=1e-13)


def test_spline_columns_equal_patsy_columns():
    df = _data()
    study = af.Study(df, "y ~ z")
    for term in ['cr(x, df=4, constraints="center")', "cr(x, df=6)",
                 'cr(x, df=2, constraints="center")', "cr(x, df=3)"]:
        fast = _fast(study, term)
        block = study._current.term_block(term)[0]  # source: patsy's cr()
        np.testing.assert_allclose(fast, block, rtol=1e-10, atol=1e-12)
    # two knots cannot carry a natural spline: patsy fails, so the term is left to it
    assert _fast(study, 'cr(x, df=1, constraints="center")') is None
    with pytest.raises(ValueError):  # source: patsy's own error through the design cache
        study._current.term_block('cr(x, df=1, constraints="center")')


# ---------------------------------------------------------------------------------------------
# categorical shapes


@pytest.mark.parametrize("formula,term", [
    ("y ~ z", "C(g):z"),              # z in the model: patsy drops a level
    ("y ~ x", "C(g):z"),              # z not in the model: patsy keeps every level
    ("y ~ 0 + x", "C(g):z"),
    ("y ~ z + C(h):z", "C(g):z"),     # z's column reached through another group's slopes
    ("y ~ x", "z:C(g)"),
    ("y ~ x", "C(h):x:z"),
    ("y ~ x", "C(g)"),
    ("y ~ x + C(h)", "C(g)"),
    ("y ~ x", "C(g) + C(g):z"),
    ("y ~ x", "C(k)"),                # a numeric column as levels: patsy sorts the values
    ("y ~ x", "C(k):z"),
    ("y ~ x", "C(b)"),                # a bool column: levels False, True
    ("y ~ x", "I(t >= 150)"),
    ("y ~ 0 + x", "I(t < 150):z"),
])
def test_group_terms_match_patsy_and_statsmodels(formula, term):
    df = _data()
    df["k"] = np.arange(len(df)) % 5 * 1.5
    df["b"] = df["z"] > 0.3
    study = af.Study(df, formula)
    restricted = smf.ols(study.formula, data=study._current.cache.frame).fit()
    _check_term(study, term, restricted)


def test_model_terms_leave_out_what_the_model_has():
    df = _data()
    study = af.Study(df, "y ~ z + x + C(g)")
    model = study._current
    # source: patsy's columns through the design cache (terms already present are left out)
    for term in ["C(h):z", "x + I(x ** 2)", "C(h):z + C(h):x", "z:x + C(g):x"]:
        np.testing.assert_allclose(_fast(study, term), model.term_block(term)[0], rtol=0,
                                   atol=1e-15)
    assert _fast(study, "x + z").shape == (len(model.rows), 0)
    assert _fast(study, "C(h):z", terms=False).shape[1] == 2  # every level when not told
    frame = model.cache.frame
    assert evaluate_block("x", frame, None, intercept=True, model_terms=["x +"]) is None


def test_shapes_whose_coding_depends_on_other_terms_without_intercept_are_left_to_patsy():
    df = _data()
    study = af.Study(df, "y ~ 0 + x")
    assert _fast(study, "C(g)") is None
    assert _fast(study, "I(t >= 150)") is None
    assert _fast(study, "x:z") is not None  # numeric terms do not depend on the intercept


# ---------------------------------------------------------------------------------------------
# missing and non-finite values


def test_missing_values_give_nan_rows_and_no_evidence():
    df = _data()
    miss = np.zeros(len(df), bool)
    miss[[5, 50, 120]] = True
    df.loc[miss, "u"] = np.nan  # u is not in the model: the model keeps these rows
    df.loc[[7, 9], "t"] = np.nan
    study = af.Study(df, "y ~ x + z")
    used = study._current.rows
    for term in ["u", "I(u ** 2)", "x:u", "C(g):u", 'cr(x, df=4, constraints="center") + u',
                 "np.maximum(u - 0.5, 0)"]:
        fast = _fast(study, term)
        bad = ~np.isfinite(fast).all(axis=1)
        np.testing.assert_array_equal(bad, miss[used])
        assert np.isnan(fast[bad]).any(axis=1).all()
        got = _score(study, fast)
        assert np.isnan(got.statistic) and "missing or infinite" in got.note
        # source: patsy's block has the same missing rows and gives no evidence either
        assert np.isnan(_score(study, study._current.term_block(term)[0]).statistic)
    # the reference level's rows too, when that level's columns are left out
    model = study._current
    fast = evaluate_block("C(g):u", model.cache.frame, model.finite, intercept=True,
                          model_terms=["u"])
    assert fast.shape[1] == 2
    np.testing.assert_array_equal(np.isnan(fast).all(axis=1), miss[used])
    # a comparison with a missing operand is missing (patsy would read it as False)
    fast = _fast(study, "I(t >= 150)")
    sel = np.isin(used, [7, 9])
    assert sel.sum() == 2 and np.isnan(fast[sel]).all() and np.isfinite(fast[~sel]).all()
    assert np.isnan(_score(study, fast).statistic)


def test_non_finite_results_give_no_evidence():
    df = _data()
    df["k"] = np.r_[0.0, np.linspace(1, 5, len(df) - 1)]  # log(0) = -inf on one row
    df["m"] = df["z"]  # negative values: log and sqrt are NaN there
    study = af.Study(df, "y ~ x")
    for term in ["np.log(k)", "np.log(m)", "np.sqrt(m)", "I(1 / (k * 0))", "np.exp(x * 1000)"]:
        fast = _fast(study, term)
        assert not np.isfinite(fast).all()
        assert np.isnan(_score(study, fast).statistic)
        # source: patsy's block is not finite either
        assert np.isnan(_score(study, study._current.term_block(term)[0]).statistic)


# ---------------------------------------------------------------------------------------------
# unsupported shapes and hostile text


@pytest.mark.parametrize("term", [
    "bs(x, df=4)", "cc(x, df=4)", "C(g, Sum)", "C(g, levels=['north', 'south', 'east'])",
    "C(g):C(h)", "g", "g:x", "np.log10(x)", "I(x % 2)", "I(x // 2)", "x ** 2 > 3 > 1",
    'cr(x, df=4, constraints="center", lower_bound=0)', "cr(x, knots=[3, 5])",
    'cr(x, df=4.0, constraints="center")', "cr(x, df=True)", "cr(x, df=4) * 2",
    "I(2 * cr(x, df=4))", "nosuch", 'Q("nosuch")', "I(3)", "np.pi", "center(x, 2)",
    "standardize(x, ddof=1)", "np.sin(x=x)", "I(x if x else z)", "I(-x[0])",
    "np.linalg.norm(x)", "x.mean()", "I(True * x)", "I(1j * x)", "I('a')",
    "__import__('os').system('echo no')", "(lambda: x)()", "getattr(np, 'log')(x)",
    "I(x ** 2) | z", "", "   ", "center(g)", "center(u)", "C(Q('x y'))",
])
def test_unsupported_shapes_return_none(term):
    df = _data()
    df.loc[3, "u"] = np.nan  # center() of a column with a missing value: patsy's state decides
    study = af.Study(df, "y ~ z")
    assert _fast(study, term) is None


def test_reserved_names_shadowed_by_data_are_left_to_patsy():
    df = _data()
    df["np"] = df["x"] + 1.0
    df["I"] = df["z"]
    # a Study refuses such columns with advice (see tests/model/test_study.py); the evaluator,
    # used on its own, must still not claim shapes whose names the data shadows
    with pytest.raises(ValueError, match="rename"):
        af.Study(df, 'y ~ z + Q("np")')
    frame = working_frame(df)
    assert evaluate_block("np.log(x)", frame, None, intercept=True) is None
    assert evaluate_block("I(x ** 2)", frame, None, intercept=True) is None
    frame_q = frame.assign(Q=1.0)  # a column named Q shadows patsy's Q()
    assert evaluate_block('Q("x")', frame_q, None, intercept=True) is None
    assert evaluate_block("x", frame_q, None, intercept=True) is not None


HOSTILE = [  # "np", "C", "I", "Q" as columns shadow patsy's own names: see the test above
    "tree age (years)", 'a"b\\c', "x y", "lambda", "if", "1st", "ünïcødé ✓", "x\ny",
    '__import__("os").system("touch canary_a")',
    "open('canary_b', 'w').write('x')",
    '"); open("canary_c", "w"); ("',
]


def test_hostile_column_names_match_and_never_run(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    rng = np.random.default_rng(11)
    n = 300
    data = {name: rng.uniform(1, 5, n) for name in HOSTILE}
    data["grp"] = rng.choice(["a", "b", "c"], n)
    df = pd.DataFrame(data)
    df["resp onse"] = (df[HOSTILE[0]] + 0.3 * df[HOSTILE[0]] ** 2 + df[HOSTILE[1]]
                       + rng.normal(size=n))
    rhs = [quote_name(HOSTILE[0]), quote_name(HOSTILE[1]), quote_name(HOSTILE[8])]
    study = af.Study(df, f"{quote_name('resp onse')} ~ " + " + ".join(rhs),
                     plausible=HOSTILE, groups=["grp"])
    kinds, compared, refitted = _check_study(study)  # sources: patsy's columns, statsmodels
    assert refitted == compared
    assert {"linear", "power2", "spline", "log", "hinge", "group", "group_slope",
            "interaction"} <= kinds
    assert compared >= 40
    for code in HOSTILE[8:]:  # the names themselves given as term text: never executed
        assert _fast(study, code) is None
    assert list(tmp_path.iterdir()) == []  # no canary file anywhere


def test_code_like_term_text_is_never_executed(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    df = _data()
    study = af.Study(df, "y ~ z")
    for term in ['__import__("pathlib").Path("canary_d").touch()',
                 'I(__import__("os").system("touch canary_e"))',
                 'np.log(open("canary_f", "w").write("1") + x)',
                 'Q("x") + np.sin(eval("open(\'canary_g\', \'w\')"))']:
        assert _fast(study, term) is None
    assert list(tmp_path.iterdir()) == []


# ---------------------------------------------------------------------------------------------
# arguments


def test_bad_rows_argument_says_what_to_pass():
    df = _data()
    study = af.Study(df, "y ~ z")
    frame = study._current.cache.frame
    with pytest.raises(ValueError, match="boolean mask"):
        evaluate_block("x", frame, np.arange(3), intercept=True)
    with pytest.raises(ValueError, match="one value per frame row"):
        evaluate_block("x", frame, np.ones(3, bool), intercept=True)
    with pytest.raises(TypeError, match="DataFrame"):
        evaluate_block("x", frame.to_numpy(), None, intercept=True)
    bare = evaluate_block("x", frame, None, intercept=True)
    assert not np.shares_memory(bare, frame["x"].to_numpy())  # a copy, never a view
    assert evaluate_block("I(x * 1" + "0" * 400 + ")", frame, None, intercept=True) is None
    full = evaluate_block("x:z", frame, None, intercept=True)  # None: every frame row
    assert full.shape == (len(frame), 1) and full.flags.c_contiguous
    np.testing.assert_array_equal(full[:, 0], frame["x"].to_numpy() * frame["z"].to_numpy())
