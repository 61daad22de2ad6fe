"""The invented demo generators: seeded, well-formed, and their planted structure really is there.

These tests are about the generators themselves, so invented data is what they check.  Planted
effects are recovered with statsmodels fits of the true model; the tolerance is 4 standard errors
(heteroscedasticity-robust HC3 where the noise is planted unequal), a choice of ours, not a
reference value.
"""
import re

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import statsmodels.formula.api as smf
from statsmodels.stats.diagnostic import het_breuschpagan

from afterfit import demo

SNAKE = re.compile(r"^[a-z][a-z0-9_]*$")


def _small_sensors(seed=0):
    return demo.sensors(2_000, seed=seed)


@pytest.mark.parametrize("make", [demo.cold_store, demo.orchard, _small_sensors])
def test_seeded_reproducible_and_documented(make):
    a, b, c = make(seed=0), make(seed=0), make(seed=1)
    pd.testing.assert_frame_equal(a, b)
    assert a.attrs == b.attrs
    assert not a.equals(c)
    assert all(SNAKE.match(col) for col in a.columns)
    assert isinstance(a.attrs["planted"], dict) and a.attrs["planted"]
    # the natural first model is valid formula text for this table
    fit = smf.ols(a.attrs["first_formula"], a).fit()
    assert np.isfinite(fit.params).all()


@pytest.mark.parametrize("fn", [demo.cold_store, demo.orchard, demo.sensors])
def test_docstrings_say_invented(fn):
    assert "Invented data" in fn.__doc__


# --- cold_store ------------------------------------------------------------------------------------


def _cold_store_terms(df):
    a = 2 * np.pi * (df["month"].dt.month - 0.5) / 12
    return df.assign(after=(df["month"] >= pd.Timestamp(df.attrs["planted"]["retrofit_month"]))
                     .astype(float), s=np.sin(a), c=np.cos(a))


def test_cold_store_shape_and_types():
    df = demo.cold_store()
    assert df.shape == (180, 5)
    assert list(df.columns) == ["month", "t_month", "outdoor_temp", "throughput", "kwh"]
    assert pd.api.types.is_datetime64_any_dtype(df["month"])
    assert (df["month"].dt.day == 1).all() and df["month"].is_monotonic_increasing
    assert df["month"].diff().dt.days.iloc[1:].between(28, 31).all()
    assert df["t_month"].tolist() == list(range(180))
    assert df["kwh"].dtype == np.int64 and (df["kwh"] > 0).all()


@pytest.mark.parametrize("seed", [0, 1])
def test_cold_store_true_model_recovers_planted_coefficients(seed):
    df = _cold_store_terms(demo.cold_store(seed=seed))
    planted = df.attrs["planted"]
    clean = df.drop(index=planted["meter_error_rows"])
    fit = smf.ols("kwh ~ outdoor_temp + throughput + t_month + after + s + c", clean).fit(cov_type="HC3")
    truth = {"outdoor_temp": planted["kwh_per_degree"], "throughput": planted["kwh_per_tonne"],
             "t_month": planted["trend_kwh_per_month"], "after": planted["retrofit_step_kwh"],
             "s": 2500.0, "c": 0.0}
    for name, value in truth.items():
        assert abs(fit.params[name] - value) < 4 * fit.bse[name], name


def test_cold_store_seasonal_cycle_beyond_temperature():
    df = _cold_store_terms(demo.cold_store())
    clean = df.drop(index=df.attrs["planted"]["meter_error_rows"])
    base = smf.ols("kwh ~ outdoor_temp + throughput + t_month + after", clean).fit()
    aux = smf.ols("r ~ s + c", clean.assign(r=base.resid)).fit()
    amplitude = np.hypot(aux.params["s"], aux.params["c"])
    assert aux.f_pvalue < 1e-10
    assert 2000 < amplitude < 3000  # planted 2500


def test_cold_store_retrofit_step_found_from_time_alone():
    # scanning the month of a level shift: the best fit is at the planted retrofit month
    df = _cold_store_terms(demo.cold_store())
    clean = df.drop(index=df.attrs["planted"]["meter_error_rows"])
    X = sm.add_constant(clean[["outdoor_temp", "throughput", "t_month", "s", "c"]].to_numpy())
    y = clean["kwh"].to_numpy(float)
    ssr = {}
    for b in range(24, 157):
        Xb = np.column_stack([X, clean["t_month"].to_numpy() >= b])
        ssr[b] = sm.OLS(y, Xb).fit().ssr
    planted = int(df.index[df["month"] == pd.Timestamp("2017-05-01")][0])
    assert abs(min(ssr, key=ssr.get) - planted) <= 2


def test_cold_store_meter_errors_and_growing_spread():
    df = _cold_store_terms(demo.cold_store())
    planted = df.attrs["planted"]
    fit = smf.ols("kwh ~ outdoor_temp + throughput + t_month + after + s + c", df).fit()
    student = fit.get_influence().resid_studentized_external
    assert sorted(np.argsort(-np.abs(student))[:3].tolist()) == planted["meter_error_rows"]
    assert np.all(np.abs(planted["meter_error_kwh"]) == 10000)
    clean = fit.model.data.frame.drop(index=planted["meter_error_rows"])
    cfit = smf.ols("kwh ~ outdoor_temp + throughput + t_month + after + s + c", clean).fit()
    # Breusch-Pagan against the fitted value (statsmodels het_breuschpagan, Koenker form)
    pvalue = het_breuschpagan(cfit.resid, sm.add_constant(cfit.fittedvalues))[1]
    assert pvalue < 0.01


# --- orchard ---------------------------------------------------------------------------------------


def test_orchard_shape_and_layout():
    df = demo.orchard()
    assert df.shape == (240, 9)
    assert df["cultivar"].value_counts().tolist() == [60, 60, 60, 60]
    assert set(df["cultivar"]) == set(demo.CULTIVARS)
    assert sorted(df["block"].unique()) == ["B1", "B2", "B3", "B4"]
    assert df.groupby(["block", "row"]).size().eq(10).all()
    assert df["tree_age"].between(3, 22).all() and (df["yield_kg"] >= 0).all()
    damaged = df.attrs["planted"]["damaged_rows"]
    assert df.index[df["note"].notna()].tolist() == damaged and len(damaged) == 5


@pytest.mark.parametrize("seed", [0, 1])
def test_orchard_per_cultivar_irrigation_slopes(seed):
    df = demo.orchard(seed=seed)
    planted = df.attrs["planted"]
    clean = df.drop(index=planted["damaged_rows"]).assign(
        age_curve=lambda d: 28 * (1 - np.exp(-(d["tree_age"] - 2) / 4)))
    fit = smf.ols("yield_kg ~ C(cultivar) + C(cultivar):irrigation_mm + age_curve + soil_n + C(block)",
                  clean).fit()
    for cultivar, slope in planted["irrigation_slope_kg_per_mm"].items():
        name = f"C(cultivar)[{cultivar}]:irrigation_mm"
        assert abs(fit.params[name] - slope) < 4 * fit.bse[name], cultivar
    assert abs(fit.params["age_curve"] - 1) < 4 * fit.bse["age_curve"]
    assert abs(fit.params["soil_n"] - planted["soil_n_kg_per_unit"]) < 4 * fit.bse["soil_n"]
    same = ", ".join(f"C(cultivar)[{c}]:irrigation_mm = C(cultivar)[Duskmere]:irrigation_mm"
                     for c in ("Orvelle", "Quintara", "Bellisk"))
    assert fit.f_test(same).pvalue < 1e-8  # the slopes differ, as planted


def test_orchard_age_curvature_and_damaged_trees_show_in_first_model():
    df = demo.orchard()
    damaged = df.attrs["planted"]["damaged_rows"]
    clean = df.drop(index=damaged)
    quad = smf.ols("yield_kg ~ irrigation_mm + tree_age + I(tree_age**2) + C(cultivar)", clean).fit()
    assert quad.params["I(tree_age ** 2)"] < 0 and quad.pvalues["I(tree_age ** 2)"] < 1e-8
    first = smf.ols(df.attrs["first_formula"], df).fit()
    student = first.get_influence().resid_studentized_external
    assert sorted(np.argsort(student)[:5].tolist()) == damaged


# --- sensors ---------------------------------------------------------------------------------------


def test_sensors_shape_and_types():
    df = demo.sensors(5_000, seed=3)
    assert df.shape == (5_000, 14)
    assert isinstance(df["site"].dtype, pd.CategoricalDtype)
    assert list(df["site"].cat.categories) == list(demo.SITES)
    assert isinstance(df["mode"].dtype, pd.CategoricalDtype)
    assert pd.api.types.is_datetime64_any_dtype(df["timestamp"])
    assert df["timestamp"].is_monotonic_increasing
    numeric = df.select_dtypes("number").columns
    assert len(numeric) == 11 and np.isfinite(df[numeric].to_numpy()).all()
    assert df.attrs["planted"]["noise_variables"] == ["voltage", "light_level"]
    assert "filter_age" not in df.attrs["first_formula"]
    with pytest.raises(ValueError, match="positive whole number"):
        demo.sensors(0)
    with pytest.raises(ValueError, match="positive whole number"):
        demo.sensors(10.5)


def test_sensors_true_model_recovers_planted_structure():
    df = demo.sensors(20_000, seed=0)
    planted = df.attrs["planted"]
    fit = smf.ols(
        "power_kw ~ I(inlet_temp - 22) + I((inlet_temp - 22)**2) + C(site) + C(site):I(flow_rate - 50)"
        " + pressure + humidity + fan_speed + vibration + filter_age + C(mode)"
        " + voltage + light_level + ambient_temp", df).fit()
    truth = {"I(inlet_temp - 22)": 0.6, "I((inlet_temp - 22) ** 2)": 0.05, "pressure": -0.1,
             "humidity": 0.02, "fan_speed": 0.004, "vibration": 0.3, "filter_age": 0.015,
             "C(mode)[T.normal]": 1.5, "C(mode)[T.boost]": 4.0, "C(site)[T.valley]": 1.2,
             "voltage": 0.0, "light_level": 0.0, "ambient_temp": 0.0}
    for site, slope in planted["flow_slope_by_site"].items():
        truth[f"C(site)[{site}]:I(flow_rate - 50)"] = slope
    for name, value in truth.items():
        assert abs(fit.params[name] - value) < 4 * fit.bse[name], name
    assert abs(fit.resid.std() - planted["noise_sd"]) < 0.03
    # left out of the first model but it matters: its residuals still track filter_age
    first = smf.ols(df.attrs["first_formula"], df).fit()
    assert np.corrcoef(first.resid, df["filter_age"])[0, 1] > 0.2
