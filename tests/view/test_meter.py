"""Fit meter widget on a recording comm: per-step records, position, JSON safety."""
import json
import math

from afterfit.view.meter import Meter, meter_records


def test_opening_state_is_one_record_per_step(wire, orchard_study):
    meter = Meter(orchard_study)
    state = wire.state(meter)
    table = orchard_study.meter()
    assert state["steps"] == meter_records(table)
    assert [r["step"] for r in state["steps"]] == table["step"].tolist() == [0]
    assert state["position"] == orchard_study.position == 0
    first = state["steps"][0]
    assert first["delta_cv"] is None  # NaN for the first step (nothing to compare) -> null
    assert math.isclose(first["rmse_cv"], table["rmse_cv"].iloc[0], rel_tol=1e-15)
    json.dumps(state, allow_nan=False, default=str)


def test_records_follow_each_step_with_the_flags_the_study_set(wire, orchard_study):
    meter = Meter(orchard_study)
    orchard_study.add("I(tree_age ** 2)")
    orchard_study.add("C(block)")
    table = orchard_study.meter()
    assert [r["step"] for r in meter.steps] == [0, 1, 2]
    assert [r["worse"] for r in meter.steps] == table["worse"].tolist()
    assert [r["one_se"] for r in meter.steps] == table["one_se"].tolist()
    assert sum(r["one_se"] for r in meter.steps) == 1
    assert [r["examined"] for r in meter.steps] == table["examined"].tolist()
    assert [r["terms_added"] for r in meter.steps] == table["terms_added"].tolist()
    assert meter.position == 2
    orchard_study.undo()
    assert meter.position == 1
    assert [r["step"] for r in meter.steps] == orchard_study.meter()["step"].tolist()


def test_values_are_plain_python_types(wire, orchard_study):
    orchard_study.add("I(tree_age ** 2)")
    meter = Meter(orchard_study)
    for record in meter.steps:
        for key in ("rmse_train", "rmse_cv", "rmse_cv_se", "gap", "delta_cv"):
            assert record[key] is None or type(record[key]) is float
        assert type(record["worse"]) is bool and type(record["one_se"]) is bool
        assert type(record["step"]) is int
    json.dumps(meter.steps, allow_nan=False)


def test_the_meter_takes_no_requests(wire, orchard_study):
    meter = Meter(orchard_study)
    wire.from_page(meter, custom={"kind": "add", "term": "I(tree_age ** 2)"})
    assert len(orchard_study.steps) == 1
    assert meter.error == ""
