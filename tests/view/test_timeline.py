"""Timeline widget on a recording comm: steps, undo/redo requests, comparisons."""
import pytest

from afterfit.view.timeline import Timeline, comparison_table, step_records


@pytest.fixture
def grown(orchard_study):
    """The study after two additions (three steps)."""
    orchard_study.add("I(tree_age ** 2)")
    orchard_study.add("C(block)", reason="blocks differ in soil")
    return orchard_study


def test_opening_state(wire, grown):
    line = Timeline(grown)
    state = wire.state(line)
    assert state["steps"] == step_records(grown.steps)
    assert [s["kind"] for s in state["steps"]] == ["start", "add", "add"]
    assert state["steps"][2]["reason"] == "blocks differ in soil"
    assert state["steps"][2]["time"] == grown.steps[2].time
    assert state["position"] == 2
    assert (state["can_undo"], state["can_redo"]) == (True, False)
    assert state["comparison"] == {}


def test_undo_and_redo_requests(wire, grown):
    line = Timeline(grown)
    wire.from_page(line, custom={"kind": "undo"})
    assert grown.position == 1
    assert (line.position, line.can_undo, line.can_redo) == (1, True, True)
    wire.from_page(line, custom={"kind": "redo"})
    assert (grown.position, line.position, line.can_redo) == (2, 2, False)


def test_undo_at_the_start_is_an_error_message(wire, orchard_study):
    line = Timeline(orchard_study)
    wire.from_page(line, custom={"kind": "undo"})
    assert "nothing to undo" in line.error
    wire.from_page(line, custom={"kind": "redo"})
    assert "nothing to redo" in line.error
    assert wire.state(line)["error"] == line.error


def test_compare_request_shows_the_study_comparison(wire, grown):
    line = Timeline(grown)
    wire.clear(line)
    wire.from_page(line, custom={"kind": "compare", "i": 1, "j": 0})  # order does not matter
    result = grown.compare(0, 1)
    shown = line.comparison
    assert (shown["i"], shown["j"]) == (0, 1)
    assert shown["columns"] == ["quantity", "value"]
    rows = dict(shown["rows"])
    assert rows["\u0394AIC (second \u2212 first)"] == format(result["delta_aic"], ".6g")
    assert rows["\u0394CV RMSE (second \u2212 first)"] == format(result["delta_cv"], ".6g")
    assert rows["nested models"] == "yes"
    assert rows["p-value (nested F test)"] == format(result["pvalue"], ".6g")
    assert rows["F numerator df"] == "1"
    assert rows["formula (second step)"] == result["formula_b"]
    assert wire.updates(line)[-1]["comparison"] == shown


def test_non_nested_comparison_leaves_the_f_test_out(wire, orchard_study):
    orchard_study.add("I(tree_age ** 2)")
    orchard_study.remove("tree_age")
    result = orchard_study.compare(0, 2)  # tree_age against I(tree_age ** 2): neither contains the other
    assert result["nested"] is False
    table = comparison_table(result, 0, 2)
    names = [name for name, _ in table["rows"]]
    assert "F (nested test)" not in names
    assert "\u0394BIC (second \u2212 first)" in names


@pytest.mark.parametrize(
    "content, words",
    [
        ({"kind": "compare", "i": 0}, "'j'"),
        ({"kind": "compare", "i": 0, "j": 0}, "two different steps"),
        ({"kind": "compare", "i": 0, "j": 9}, "between 0 and 2"),
        ({"kind": "compare", "i": True, "j": 1}, "'i'"),
        ({"kind": "compare", "i": 0.0, "j": 1}, "'i'"),
    ],
)
def test_bad_compare_requests(wire, grown, content, words):
    line = Timeline(grown)
    wire.from_page(line, custom=content)
    assert words in line.error
    assert line.comparison == {}


def test_comparison_is_dropped_when_its_steps_are_replaced(wire, grown):
    line = Timeline(grown)
    line.compare(1, 2)
    grown.add("np.log(tree_age)", reason="a second look at the age curve")  # appended: kept
    assert line.comparison != {}
    grown.undo()
    grown.undo()
    grown.add("C(cultivar):irrigation_mm")  # replaces steps 2 and 3
    assert line.comparison == {}
    assert [s["kind"] for s in line.steps] == ["start", "add", "add"]


def test_page_closes_the_comparison(wire, grown):
    line = Timeline(grown)
    line.compare(0, 2)
    wire.from_page(line, state={"comparison": {}})
    assert line.comparison == {}


def test_run_hook_gets_undo_and_compare(wire, grown):
    calls = []
    line = Timeline(grown, run=lambda fn, label: calls.append((fn, label)))
    wire.from_page(line, custom={"kind": "undo"})
    wire.from_page(line, custom={"kind": "compare", "i": 0, "j": 2})
    assert [label for _, label in calls] == ["Undo", "Compare steps 0 and 2"]
    assert grown.position == 2
    calls[1][0]()
    assert (line.comparison["i"], line.comparison["j"]) == (0, 2)
