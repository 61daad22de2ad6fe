"""Invented demo scenarios: seeded tables with planted structure for afterfit to reveal.

Every table here is made up by the code below: the places, cultivars, units and numbers describe no
real site, trial or machine.  Each generator documents what it planted, in its docstring and in
``df.attrs["planted"]`` (a short dict), and suggests a natural first model in
``df.attrs["first_formula"]``: the model an analyst would state before looking at residuals.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["cold_store", "orchard", "sensors"]


def cold_store(*, seed=0) -> pd.DataFrame:
    """Monthly electricity use of an invented refrigerated warehouse over 15 years.

    Invented data: no real warehouse, meter or weather record is behind it.

    Parameters
    ----------
    seed : int
        Seed of the random parts (noise, meter errors); the same seed gives the same table.

    Returns
    -------
    DataFrame, 180 rows
        ``month`` (datetime, first day of each month from January 2009), ``t_month`` (months
        since the first month: 0, 1, ..., 179), ``outdoor_temp`` (monthly mean, deg C),
        ``throughput`` (tonnes handled in the month), ``kwh`` (metered electricity, kWh).

    Notes
    -----
    Planted truth (``attrs["planted"]``), with ``m`` = month of year (1-12) and
    ``a = 2 pi (m - 0.5) / 12``::

        kwh = 30000 + 1400 outdoor_temp + 5 throughput + 35 t_month
              - 6000 [month >= 2017-05]          # retrofit: a level drop, no column marks it
              + 2500 sin(a)                      # seasonal cycle beyond temperature, peak ~April
              + noise, sd = 4 % of (expected kwh - 25000)   # spread grows with load

    Three rows carry meter-reading errors: the ten-thousands digit was misread by one (a slip of
    +/-10,000 kWh).  ``outdoor_temp`` follows ``10 - 9 cos(a)`` plus noise and ``throughput``
    has a half-year cycle (busy in spring and autumn), so the extra yearly cycle (a sine) is
    orthogonal to what either explains.  First model:
    ``kwh ~ outdoor_temp + throughput``.
    """
    rng = np.random.default_rng(seed)
    n = 180
    month = pd.date_range("2009-01-01", periods=n, freq="MS")
    t = np.arange(n)
    a = 2 * np.pi * (month.month.to_numpy() - 0.5) / 12
    outdoor_temp = np.round(10 - 9 * np.cos(a) + rng.normal(0, 1.2, n), 1)
    # two busy seasons (spring and autumn shipments): a half-year cycle, so throughput cannot
    # stand in for the yearly cycle planted below
    throughput = np.round(1800 + 6 * t - 250 * np.cos(2 * a) + rng.normal(0, 120, n))
    retrofit = pd.Timestamp("2017-05-01")
    after = (month >= retrofit).astype(float)
    expected = (30000 + 1400 * outdoor_temp + 5 * throughput + 35 * t - 6000 * after
                + 2500 * np.sin(a))
    kwh = np.round(expected + 0.04 * (expected - 25000) * rng.standard_normal(n))
    # meter errors away from the ends and from the retrofit so each stands on its own
    candidates = np.setdiff1d(np.arange(6, n - 6), np.arange(95, 106))
    bad = np.sort(rng.choice(candidates, size=3, replace=False))
    slip = rng.choice([-10000, 10000], size=3)
    kwh[bad] += slip
    df = pd.DataFrame(
        {
            "month": month,
            "t_month": t,
            "outdoor_temp": outdoor_temp,
            "throughput": throughput,
            "kwh": kwh.astype(np.int64),
        }
    )
    df.attrs["planted"] = {
        "kwh_per_degree": 1400.0,
        "kwh_per_tonne": 5.0,
        "trend_kwh_per_month": 35.0,
        "retrofit_month": "2017-05",
        "retrofit_step_kwh": -6000.0,
        "seasonal": "2500*sin(2*pi*(month_of_year - 0.5)/12), beyond temperature",
        "noise_sd": "4% of (expected kwh - 25000)",
        "meter_error_rows": bad.tolist(),
        "meter_error_kwh": slip.tolist(),
    }
    df.attrs["first_formula"] = "kwh ~ outdoor_temp + throughput"
    return df


CULTIVARS = ("Orvelle", "Quintara", "Bellisk", "Duskmere")


def orchard(*, seed=0) -> pd.DataFrame:
    """Yield per tree in an invented irrigation trial: 240 trees, four invented cultivars.

    Invented data: the cultivar names are made-up words and no real trial is behind the numbers.

    Parameters
    ----------
    seed : int
        Seed of the layout randomisation and the noise; the same seed gives the same table.

    Returns
    -------
    DataFrame, 240 rows
        ``block`` ("B1"-"B4"), ``row`` (1-6 within a block), ``tree`` (1-10 along a row),
        ``cultivar`` (one of ``CULTIVARS``, 15 per block each, placed at random),
        ``irrigation_mm`` (seasonal water applied; each block gives its six rows the six levels
        300-700 mm in random order, and emitters vary by a few mm per tree), ``tree_age``
        (years, 3-22), ``soil_n`` (a soil nitrogen reading, mg/kg), ``yield_kg``, ``note``
        (missing except for damaged trees).

    Notes
    -----
    Planted truth (``attrs["planted"]``)::

        yield_kg = base[cultivar] + slope[cultivar] (irrigation_mm - 500)
                   + 28 (1 - exp(-(tree_age - 2) / 4))      # rises, then flattens
                   + 0.08 (soil_n - 30)                     # weakly relevant
                   + block offset + noise (sd 2.5)

    with ``base`` = 14, 11, 12, 16 and ``slope`` = 0.010, 0.025, 0.040, 0.003 kg per mm for
    Orvelle, Quintara, Bellisk, Duskmere (a cultivar-by-irrigation interaction), block offsets
    +1.0, -0.5, 0.0, -1.5.  Five damaged trees yield only 15-40 % of that and carry a ``note``.
    First model: ``yield_kg ~ irrigation_mm + tree_age + C(cultivar)``.
    """
    rng = np.random.default_rng(seed)
    blocks, rows, trees = 4, 6, 10
    n = blocks * rows * trees
    block = np.repeat(np.arange(blocks), rows * trees)
    row = np.tile(np.repeat(np.arange(rows), trees), blocks)
    tree = np.tile(np.arange(trees), blocks * rows)
    levels = np.array([300, 380, 460, 540, 620, 700], dtype=float)
    row_level = np.concatenate([rng.permutation(levels) for _ in range(blocks)])
    irrigation = np.round(row_level[block * rows + row] + rng.normal(0, 12, n), 1)
    per_block = rows * trees // len(CULTIVARS)
    cult = np.concatenate([rng.permutation(np.repeat(np.arange(len(CULTIVARS)), per_block))
                           for _ in range(blocks)])
    age = rng.integers(3, 23, n)
    soil_n = np.round(rng.normal(30, 6, n), 1)
    base = np.array([14.0, 11.0, 12.0, 16.0])
    slope = np.array([0.010, 0.025, 0.040, 0.003])
    offset = np.array([1.0, -0.5, 0.0, -1.5])
    expected = (base[cult] + slope[cult] * (irrigation - 500) + 28 * (1 - np.exp(-(age - 2) / 4))
                + 0.08 * (soil_n - 30) + offset[block])
    yield_kg = expected + rng.normal(0, 2.5, n)
    damaged = np.sort(rng.choice(n, size=5, replace=False))
    yield_kg[damaged] *= rng.uniform(0.15, 0.40, 5)
    notes = np.array(["storm damage", "bark split", "rodent damage at base"])
    note = pd.Series([None] * n, dtype=object)
    note.iloc[damaged] = notes[rng.integers(0, len(notes), 5)]
    df = pd.DataFrame(
        {
            "block": [f"B{b + 1}" for b in block],
            "row": row + 1,
            "tree": tree + 1,
            "cultivar": np.array(CULTIVARS)[cult],
            "irrigation_mm": irrigation,
            "tree_age": age,
            "soil_n": soil_n,
            "yield_kg": np.round(np.maximum(yield_kg, 0.0), 1),
            "note": note,
        }
    )
    df.attrs["planted"] = {
        "irrigation_slope_kg_per_mm": dict(zip(CULTIVARS, slope.tolist())),
        "cultivar_base_kg_at_500mm": dict(zip(CULTIVARS, base.tolist())),
        "age_curve": "28*(1 - exp(-(tree_age - 2)/4))",
        "soil_n_kg_per_unit": 0.08,
        "block_offset_kg": {"B1": 1.0, "B2": -0.5, "B3": 0.0, "B4": -1.5},
        "noise_sd_kg": 2.5,
        "damaged_rows": damaged.tolist(),
    }
    df.attrs["first_formula"] = "yield_kg ~ irrigation_mm + tree_age + C(cultivar)"
    return df


SITES = ("harbour", "quarry", "ridge", "valley")
MODES = ("eco", "normal", "boost")


def sensors(n=100_000, *, seed=0) -> pd.DataFrame:
    """Minute readings from an invented fleet of rooftop cooling units, for large-n work.

    Invented data, vectorised so that a million rows take well under a second.

    Parameters
    ----------
    n : int
        Number of rows (one reading per minute from 2024-01-01 00:00).
    seed : int
        Seed of every random column; the same seed and ``n`` give the same table.

    Returns
    -------
    DataFrame, n rows
        ``timestamp`` (datetime), ``site`` and ``mode`` (pandas Categorical), ten numeric columns
        ``ambient_temp``, ``inlet_temp``, ``flow_rate``, ``pressure``, ``humidity``,
        ``fan_speed``, ``vibration``, ``voltage``, ``light_level``, ``filter_age``, and the
        response ``power_kw``.

    Notes
    -----
    Planted truth (``attrs["planted"]``)::

        power_kw = 12 + 0.6 (inlet_temp - 22) + 0.05 (inlet_temp - 22)^2      # curvature
                   + flow_slope[site] (flow_rate - 50)   # 0.08, but 0.25 at "valley"
                   - 0.1 (pressure - 101) + 0.02 (humidity - 50)
                   + 0.004 (fan_speed - 1500) + 0.3 vibration
                   + 0.015 filter_age                    # matters, left out of the first model
                   + site offset (0, 0.8, -0.5, 1.2) + mode offset (-1.5, 0, 2.5)
                   + noise (sd 1)

    ``voltage`` and ``light_level`` are pure noise (no effect); ``ambient_temp`` has no direct
    effect but is correlated with ``inlet_temp`` (and ``fan_speed`` with both).  Time has no
    effect.  First model: every column but ``filter_age``, linear, plus ``C(site)`` and
    ``C(mode)`` (``attrs["first_formula"]``).
    """
    if isinstance(n, (bool, np.bool_)) or not isinstance(n, (int, np.integer)) or n < 1:
        raise ValueError(f"n must be a positive whole number of rows, got {n!r}")
    n = int(n)
    rng = np.random.default_rng(seed)
    cols = ["ambient_temp", "inlet_temp", "flow_rate", "pressure", "humidity", "fan_speed",
            "vibration", "voltage", "light_level", "filter_age", "power_kw"]
    # one (columns x rows) block filled in place: pandas adopts it without the copy it makes
    # when it stacks separate arrays, which would cost as much as drawing them
    block = np.empty((len(cols), n))
    (ambient, inlet, flow, pressure, humidity, fan, vibration, voltage, light, filter_age,
     power) = block
    for row in (ambient, inlet, flow, pressure, fan, voltage, power):
        rng.standard_normal(out=row)
    for row in (humidity, light, filter_age):
        rng.random(out=row)
    rng.standard_exponential(out=vibration)
    site = np.searchsorted(np.cumsum([0.4, 0.3, 0.2]), rng.random(n), side="right").astype(np.int8)
    mode = np.searchsorted(np.cumsum([0.3, 0.5]), rng.random(n), side="right").astype(np.int8)
    ambient *= 6
    ambient += 20
    inlet *= 1.5
    inlet += ambient + 2
    flow *= 10
    flow += 50
    pressure *= 2
    pressure += 101
    humidity *= 70
    humidity += 20
    fan *= 80
    fan += 900 + 25 * inlet
    vibration *= 0.8
    vibration += 0.2
    voltage *= 4
    voltage += 400
    light *= 1000
    filter_age *= 180
    flow_slope = np.array([0.08, 0.08, 0.08, 0.25])
    site_offset = np.array([0.0, 0.8, -0.5, 1.2])
    mode_offset = np.array([-1.5, 0.0, 2.5])
    d = inlet - 22
    power += (12 + 0.6 * d + 0.05 * d * d + flow_slope[site] * (flow - 50)
              - 0.1 * (pressure - 101) + 0.02 * (humidity - 50) + 0.004 * (fan - 1500)
              + 0.3 * vibration + 0.015 * filter_age + site_offset[site] + mode_offset[mode])
    df = pd.DataFrame(block.T, columns=cols, copy=False)
    start = np.datetime64("2024-01-01T00:00", "ns")
    df.insert(0, "timestamp", start + np.arange(n) * np.timedelta64(60, "s"))
    df.insert(1, "site", pd.Categorical.from_codes(site, categories=list(SITES)))
    df.insert(2, "mode", pd.Categorical.from_codes(mode, categories=list(MODES)))
    df.attrs["planted"] = {
        "curvature": "0.05*(inlet_temp - 22)**2",
        "flow_slope_by_site": dict(zip(SITES, flow_slope.tolist())),
        "noise_variables": ["voltage", "light_level"],
        "left_out_but_matters": "filter_age (0.015 kW per day)",
        "noise_sd": 1.0,
    }
    df.attrs["first_formula"] = (
        "power_kw ~ ambient_temp + inlet_temp + flow_rate + pressure + humidity + fan_speed"
        " + vibration + voltage + light_level + C(site) + C(mode)"
    )
    return df
