"""Term tray widget on a recording comm: state sent to the page, requests from it, errors."""
import json

import pytest

from afterfit.view._static import esm_path
from afterfit.view.tray import Tray, candidate_records

HOSTILE = "<img src=x onerror=alert(1)>"


def by_tag(study, tag):
    table = study.candidates()
    return table.loc[table["tag"] == tag, "term"].tolist()


def test_opening_state_mirrors_the_study(wire, view_study):
    tray = Tray(view_study)
    state = wire.state(tray)
    assert state["terms"] == view_study.terms == ["x"]
    assert state["formula"] == view_study.formula
    assert [c["term"] for c in state["candidates"]] == view_study.candidates()["term"].tolist()
    assert state["candidates"] == candidate_records(view_study.candidates())
    assert {c["tag"] for c in state["candidates"]} == {"stated", "evident", "speculative"}
    assert state["error"] == ""
    # the page gets the ES module text from js/ (or the wheel's static/)
    assert state["_esm"] == esm_path("tray.js").read_text()
    # JSON has no NaN: a missing delta_cv must arrive as null, not break the message
    json.dumps(state["candidates"], allow_nan=False)


def test_add_request_refits_and_sends_one_batched_update(wire, view_study):
    tray = Tray(view_study)
    term = by_tag(view_study, "evident")[0]
    wire.clear(tray)
    wire.from_page(tray, custom={"kind": "add", "term": term, "reason": None})
    assert view_study.terms == ["x", term]
    assert view_study.steps[-1].kind == "add"
    assert tray.terms == ["x", term]
    assert tray.candidates == candidate_records(view_study.candidates())  # screened afresh
    updates = wire.updates(tray)
    assert len(updates) == 1, "terms, formula and candidates travel in one message"
    assert {"terms", "formula", "candidates"} <= set(updates[0])
    assert tray.error == ""


def test_speculative_term_without_reason_is_refused_with_a_message(wire, view_study):
    tray = Tray(view_study)
    term = by_tag(view_study, "speculative")[0]
    steps = len(view_study.steps)
    wire.from_page(tray, custom={"kind": "add", "term": term, "reason": "   "})
    assert len(view_study.steps) == steps
    assert "reason" in tray.error
    assert tray.error.startswith("Add ")
    assert wire.state(tray)["error"] == tray.error  # the page was told


def test_speculative_term_with_reason_is_recorded_as_such(wire, view_study):
    tray = Tray(view_study)
    term = by_tag(view_study, "speculative")[0]
    wire.from_page(tray, custom={"kind": "add", "term": term, "reason": "probe swapped mid-season"})
    step = view_study.steps[-1]
    assert (step.kind, step.tag, step.reason) == ("add", "speculative", "probe swapped mid-season")
    assert tray.terms[-1] == term
    # the hostile column name travels as plain text; escaping is the page's job (textContent)
    assert HOSTILE in term


def test_remove_request(wire, view_study):
    view_study.add("C(g)")
    tray = Tray(view_study)
    wire.from_page(tray, custom={"kind": "remove", "term": "C(g)"})
    assert view_study.terms == ["x"]
    assert tray.terms == ["x"]
    assert view_study.steps[-1].kind == "remove"


@pytest.mark.parametrize(
    "content, words",
    [
        ({"term": "x"}, "kind"),
        ({"kind": "add"}, "term"),
        ({"kind": "add", "term": 3}, "term"),
        ({"kind": "add", "term": "not_a_candidate"}, "stale"),
        ({"kind": "remove", "term": "C(g)"}, "not in the model"),
        ({"kind": "add", "term": "C(g)", "reason": ["a", "list"]}, "reason"),
    ],
)
def test_malformed_or_stale_requests_become_an_error_message(wire, view_study, content, words):
    tray = Tray(view_study)
    wire.from_page(tray, custom=content)
    assert words in tray.error
    assert len(view_study.steps) == 1
    assert wire.state(tray)["error"] == tray.error


def test_unknown_request_kinds_are_ignored(wire, view_study):
    tray = Tray(view_study)
    wire.from_page(tray, custom={"kind": "from-a-newer-page"})
    assert tray.error == ""


def test_run_hook_receives_the_action_and_a_label(wire, view_study):
    calls = []
    tray = Tray(view_study, run=lambda fn, label: calls.append((fn, label)))
    term = by_tag(view_study, "evident")[0]
    wire.from_page(tray, custom={"kind": "add", "term": term})
    assert len(view_study.steps) == 1, "nothing happens until the Explorer runs it"
    (fn, label), = calls
    label_text = next(c["label"] for c in tray.candidates if c["term"] == term)
    assert label == f"Add {label_text}"
    fn()
    assert view_study.terms == ["x", term]
    # with a run hook the Explorer refreshes; the tray does not follow the Study by itself
    assert tray.terms == ["x"]
    tray.refresh()
    assert tray.terms == ["x", term]


def test_standalone_tray_follows_the_study_until_closed(wire, view_study):
    tray = Tray(view_study)
    view_study.add("C(g)")
    assert tray.terms == ["x", "C(g)"]
    tray.close()
    view_study.undo()  # must not reach the closed widget
    assert tray.terms == ["x", "C(g)"]


def test_a_failing_refresh_is_reported_not_raised(wire, view_study):
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
