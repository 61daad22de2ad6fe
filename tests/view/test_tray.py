"""Term tray widget on a recording comm: state sent to the page, requests from it, errors."""
import json

import pytest

from afterfit.model.terms import quote_name
from afterfit.view._static import esm_path
from afterfit.view.tray import Tray, candidate_records

HOSTILE = "<img src=x onerror=alert(1)>"
BASE = ["irrigation_mm", "tree_age", "C(cultivar)"]  # the orchard scenario's first model


def by_tag(study, tag):
    table = study.candidates()
    return table.loc[table["tag"] == tag, "term"].tolist()


def test_opening_state_mirrors_the_study(wire, orchard_study):
    tray = Tray(orchard_study)
    state = wire.state(tray)
    assert state["terms"] == orchard_study.terms == BASE
    assert state["formula"] == orchard_study.formula
    assert [c["term"] for c in state["candidates"]] == orchard_study.candidates()["term"].tolist()
    assert state["candidates"] == candidate_records(orchard_study.candidates())
    assert {c["tag"] for c in state["candidates"]} == {"stated", "evident", "speculative"}
    assert state["error"] == ""
    # the page gets the ES module text from js/ (or the wheel's static/)
    assert state["_esm"] == esm_path("tray.js").read_text()
    # JSON has no NaN: a missing delta_cv must arrive as null, not break the message
    json.dumps(state["candidates"], allow_nan=False)


def test_add_request_refits_and_sends_one_batched_update(wire, orchard_study):
    tray = Tray(orchard_study)
    term = by_tag(orchard_study, "evident")[0]
    wire.clear(tray)
    wire.from_page(tray, custom={"kind": "add", "term": term, "reason": None})
    assert orchard_study.terms == BASE + [term]
    assert orchard_study.steps[-1].kind == "add"
    assert tray.terms == BASE + [term]
    assert tray.candidates == candidate_records(orchard_study.candidates())  # screened afresh
    updates = wire.updates(tray)
    assert len(updates) == 1, "terms, formula and candidates travel in one message"
    assert {"terms", "formula", "candidates"} <= set(updates[0])
    assert tray.error == ""


def test_speculative_term_without_reason_is_refused_with_a_message(wire, orchard_study):
    tray = Tray(orchard_study)
    term = by_tag(orchard_study, "speculative")[0]
    steps = len(orchard_study.steps)
    wire.from_page(tray, custom={"kind": "add", "term": term, "reason": "   "})
    assert len(orchard_study.steps) == steps
    assert "reason" in tray.error
    assert tray.error.startswith("Add ")
    assert wire.state(tray)["error"] == tray.error  # the page was told


def test_speculative_term_with_reason_is_recorded_as_such(wire, orchard_study):
    tray = Tray(orchard_study)
    term = quote_name(HOSTILE)  # the renamed soil column, as formula text
    assert term in by_tag(orchard_study, "speculative")
    wire.from_page(tray, custom={"kind": "add", "term": term, "reason": "probe swapped mid-season"})
    step = orchard_study.steps[-1]
    assert (step.kind, step.tag, step.reason) == ("add", "speculative", "probe swapped mid-season")
    assert tray.terms[-1] == term
    # the hostile column name travels as plain text; escaping is the page's job (textContent)
    assert HOSTILE in term


def test_remove_request(wire, orchard_study):
    orchard_study.add("C(block)")
    tray = Tray(orchard_study)
    wire.from_page(tray, custom={"kind": "remove", "term": "C(block)"})
    assert orchard_study.terms == BASE
    assert tray.terms == BASE
    assert orchard_study.steps[-1].kind == "remove"


@pytest.mark.parametrize(
    "content, words",
    [
        ({"term": "x"}, "kind"),
        ({"kind": "add"}, "term"),
        ({"kind": "add", "term": 3}, "term"),
        ({"kind": "add", "term": "not_a_candidate"}, "stale"),
        ({"kind": "remove", "term": "C(block)"}, "not in the model"),
        ({"kind": "add", "term": "C(block)", "reason": ["a", "list"]}, "reason"),
    ],
)
def test_malformed_or_stale_requests_become_an_error_message(wire, orchard_study, content, words):
    tray = Tray(orchard_study)
    wire.from_page(tray, custom=content)
    assert words in tray.error
    assert len(orchard_study.steps) == 1
    assert wire.state(tray)["error"] == tray.error


def test_unknown_request_kinds_are_ignored(wire, orchard_study):
    tray = Tray(orchard_study)
    wire.from_page(tray, custom={"kind": "from-a-newer-page"})
    assert tray.error == ""


def test_run_hook_receives_the_action_and_a_label(wire, orchard_study):
    calls = []
    tray = Tray(orchard_study, run=lambda fn, label: calls.append((fn, label)))
    term = by_tag(orchard_study, "evident")[0]
    wire.from_page(tray, custom={"kind": "add", "term": term})
    assert len(orchard_study.steps) == 1, "nothing happens until the Explorer runs it"
    (fn, label), = calls
    label_text = next(c["label"] for c in tray.candidates if c["term"] == term)
    assert label == f"Add {label_text}"
    fn()
    assert orchard_study.terms == BASE + [term]
    # with a run hook the Explorer refreshes; the tray does not follow the Study by itself
    assert tray.terms == BASE
    tray.refresh()
    assert tray.terms == BASE + [term]


def test_standalone_tray_follows_the_study_until_closed(wire, orchard_study):
    tray = Tray(orchard_study)
    orchard_study.add("C(block)")
    assert tray.terms == BASE + ["C(block)"]
    tray.close()
    orchard_study.undo()  # must not reach the closed widget
    assert tray.terms == BASE + ["C(block)"]


def test_a_failing_refresh_is_reported_not_raised(wire, orchard_study):
    class Broken:
        terms = ["x"]
        formula = "y ~ x"

        def candidates(self):
            raise RuntimeError("candidate screening failed: singular block")

    tray = Tray(Broken())
    assert tray.error == "candidate screening failed: singular block"
    assert wire.state(tray)["error"] == tray.error


def test_a_missing_front_end_file_says_what_to_do():
    with pytest.raises(FileNotFoundError, match="reinstall afterfit"):
        esm_path("no-such-view.js")
