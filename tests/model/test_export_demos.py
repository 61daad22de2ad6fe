"""Round trip on every demo scenario: random step sequences, then the exported code (pandas +
statsmodels only) must reproduce the Study's parameters to 1e-8 and its row count.
Reference: statsmodels itself (the exported code runs it)."""
import numpy as np
import pandas as pd
import pytest

import afterfit as af

SCENARIOS = {
    "cold_store": lambda: (af.demo.cold_store(), "kwh ~ outdoor_temp + throughput",
                           dict(time="month", period=1, plausible=["throughput"], holdout=0.1)),
    "orchard": lambda: (af.demo.orchard(), "yield_kg ~ irrigation_mm + tree_age + C(cultivar)",
                        dict(groups=["cultivar"], cov_type="HC3")),
    "sensors": lambda: (af.demo.sensors(3000, seed=2), None, dict()),
}


@pytest.mark.parametrize("name", sorted(SCENARIOS))
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_random_steps_round_trip(name, seed):
    df, formula, kw = SCENARIOS[name]()
    formula = formula or df.attrs["first_formula"]
    s = af.Study(df, formula, **kw)
    rng = np.random.default_rng(seed)
    for _ in range(6):
        action = rng.choice(["add", "add", "exclude", "undo", "remove"])
        if action == "add":
            table = s.candidates()
            row = table.iloc[int(rng.integers(min(6, len(table))))]
            s.add(row["term"], reason="random step in a round-trip test")
        elif action == "exclude":
            s.exclude(s.rows[rng.choice(len(s.rows), size=2, replace=False)], "random exclusion")
        elif action == "undo" and s.can_undo:
            s.undo()
        elif action == "remove" and len(s.terms) > 1:
            s.remove(s.terms[-1], reason="random removal")
    ns = {"df": df}
    exec(compile(s.to_code(), "<exported>", "exec"), ns)
    result = ns["result"]
    pd.testing.assert_series_equal(result.params, s.fit.params, check_names=False, rtol=1e-8,
                                   atol=1e-10 * float(np.abs(s.fit.params).max()))
    assert int(result.nobs) == s.fit.nobs
