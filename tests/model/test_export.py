"""Exported code and audit.  Reference: statsmodels itself (the exported code runs statsmodels;
its parameters must equal the Study's)."""
import numpy as np
import pandas as pd
import pytest

import afterfit as af
from afterfit.model.export import _comment

HOSTILE = [
    'say "hi"', "back\\slash", "new\nline", "tab\tchar", "__import__('os').system('touch canary')",
    "'); import os; os.system('touch canary'); ('", "<img src=x onerror=alert(1)>", "ünïcødé λ",
    "line\u2028separator", "x + y",
]


def _run(code, df):
    ns = {"df": df}
    exec(compile(code, "<exported>", "exec"), ns)  # the exported code is ours; df is the data
    return ns["result"]


def _frame(n=120, seed=2, names=("x", "z", "g")):
    rng = np.random.default_rng(seed)
    x, z, g = names
    df = pd.DataFrame({x: rng.normal(size=n), z: rng.uniform(1, 3, size=n),
                       g: rng.choice(["p", "q", "r"], n)})
    df["y"] = 1 + df[x] - df[z] + rng.normal(size=n)
    return df


def test_round_trip_with_exclusions_weights_and_robust_errors():
    df = _frame()
    df["w"] = np.linspace(0.5, 2, len(df))
    s = af.Study(df, "y ~ x + C(g)", weights="w", cov_type="HC3", plausible=["z"])
    s.add("z")
    s.exclude([3, 17], "pump restarted")
    s.add("C(g):x", reason="slopes may differ by site")
    result = _run(s.to_code(), df)
    pd.testing.assert_series_equal(result.params, s.fit.params, check_names=False, rtol=1e-8)
    pd.testing.assert_series_equal(result.bse, s.fit.bse, check_names=False, rtol=1e-8)
    assert result.nobs == s.fit.nobs


def test_round_trip_time_derived_column_and_holdout():
    df = _frame(n=150)
    df["when"] = pd.date_range("2012-01-01", periods=len(df), freq="MS")
    s = af.Study(df, "y ~ x", time="when", period=1, holdout=0.2)
    s.add(f"np.sin(2 * np.pi * {s.time_column} / 1)", reason="yearly cycle")
    result = _run(s.to_code(), df)
    pd.testing.assert_series_equal(result.params, s.fit.params, check_names=False, rtol=1e-8)
    assert result.nobs == s.fit.nobs == 120


@pytest.mark.parametrize("name", HOSTILE)
def test_hostile_names_and_reasons_are_never_executed(name, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    df = _frame(names=(name, "z", "g"))
    df.index = [f"row {i}" if i % 2 else i for i in range(len(df))]  # mixed labels
    s = af.Study(df, f"y ~ {af.model.terms.quote_name(name)} + z")
    s.exclude([df.index[1], df.index[2]], reason=name)
    code = s.to_code()
    result = _run(code, df)
    pd.testing.assert_series_equal(result.params, s.fit.params, check_names=False, rtol=1e-8)
    assert not (tmp_path / "canary").exists()
    audit = s.audit()
    assert "<img" not in audit
    assert not (tmp_path / "canary").exists()


def test_comment_text_cannot_break_lines():
    for text in HOSTILE + ["a\rb", "a\x0bb", "a\x85b"]:
        assert len(("# " + _comment(text)).splitlines()) == 1


def test_infinite_values_are_dropped_explicitly():
    df = _frame()
    df.loc[4, "z"] = 0.0  # np.log(0) = -inf: statsmodels would refuse the row
    s = af.Study(df, "y ~ x + np.log(z)")
    assert 4 in list(s.dropped)
    result = _run(s.to_code(), df)
    pd.testing.assert_series_equal(result.params, s.fit.params, check_names=False, rtol=1e-8)


def test_audit_lists_steps_reasons_and_cautions():
    df = _frame()
    s = af.Study(df, "y ~ x", plausible={"z": "heat loss through walls"})
    s.add("z")
    s.exclude([5], "meter swapped")
    s.undo()
    s.add("C(g)", reason="sites were run by different crews")
    text = s.audit()
    for needle in ["## Steps", "meter swapped", "sites were run by different crews",
                   "heat loss through walls", "## Cautions", "Observational data",
                   "## Cross-validation", "## Checks on the final model"]:
        assert needle in text, needle
