"""Export bridge on a recording comm: code and audit text, the insert fallbacks, reports."""
import re

import pytest

from afterfit.view.cells import PATHS, ExportBridge, current_cell_id, ipylab_frontend_class

JupyterFrontEnd = ipylab_frontend_class()


def undated(text):
    """The text without its generation time, which moves on between two calls."""
    return re.sub(r"\d{4}-\d\d-\d\d(T\d\d:\d\d:\d\d\S*)?", "<when>", text)


def test_opening_state_carries_code_and_audit(wire, orchard_study):
    bridge = ExportBridge(orchard_study)
    state = wire.state(bridge)
    assert undated(state["code"]) == undated(orchard_study.to_code())
    assert undated(state["audit"]) == undated(orchard_study.audit())
    assert state["cell_id"] == ""  # no kernel here: the page falls back on its own
    assert (bridge.path, bridge.last_export) == ("", {})


def test_code_and_audit_follow_the_study(wire, orchard_study):
    bridge = ExportBridge(orchard_study)
    orchard_study.add("I(tree_age ** 2)")
    assert undated(bridge.code) == undated(orchard_study.to_code())
    assert "I(tree_age ** 2)" in bridge.code
    assert undated(bridge.audit) == undated(orchard_study.audit())


def test_page_reports_a_direct_insert(wire, orchard_study):
    bridge = ExportBridge(orchard_study)
    wire.from_page(bridge, custom={"kind": "exported", "what": "code", "path": "cell-id"})
    assert bridge.path == "cell-id"
    assert bridge.last_export == {"what": "code", "path": "cell-id"}
    assert "new cell below" in wire.state(bridge)["status"]
    wire.from_page(bridge, custom={"kind": "exported", "what": "audit", "path": "clipboard"})
    assert bridge.last_export == {"what": "audit", "path": "clipboard"}
    assert wire.state(bridge)["status"] == "Copied the audit log to the clipboard."


def test_insert_in_jupyterlab_goes_through_ipylab_commands(wire, orchard_study):
    app = JupyterFrontEnd()
    bridge = ExportBridge(orchard_study, frontend=app)
    wire.clear()
    wire.from_page(bridge, custom={"kind": "insert", "reason": "cell not found", "lab": True})
    # what ipylab sends to JupyterLab, in order: a new cell below the active one, then its text
    sent = wire.custom(app.commands)
    assert sent == [
        {"func": "execute", "payload": {"id": "notebook:insert-cell-below", "args": {}}},
        {"func": "execute", "payload": {"id": "notebook:replace-selection",
                                        "args": {"text": bridge.code}}},
    ]
    assert wire.custom(bridge) == [{"kind": "commands_sent"}]
    assert bridge.path == "ipylab"
    assert "active cell" in bridge.status


def test_ipylab_front_end_is_created_on_first_need(wire, orchard_study):
    bridge = ExportBridge(orchard_study)
    wire.from_page(bridge, custom={"kind": "insert", "reason": "no notebook model", "lab": True})
    assert isinstance(bridge._frontend, JupyterFrontEnd)
    assert bridge.path == "ipylab"


def test_outside_jupyterlab_the_page_shows_the_code(wire, orchard_study):
    bridge = ExportBridge(orchard_study)
    wire.from_page(bridge, custom={"kind": "insert", "reason": "no notebook model", "lab": False})
    (message,) = wire.custom(bridge)
    assert message["kind"] == "fallback" and message["what"] == "code"
    assert message["reason"].startswith("no notebook model; this front end has no notebook")
    assert bridge.path == "copy-box"
    assert bridge._frontend is None, "no ipylab model is created for a front end without it"


@pytest.mark.parametrize(
    "content, words",
    [
        ({"kind": "exported", "what": "code", "path": "carrier-pigeon"}, "unknown export"),
        ({"kind": "exported", "what": "<script>", "path": "clipboard"}, "unknown export"),
        ({"kind": "exported", "what": "code"}, "'path'"),
        ({"kind": "insert", "reason": 7, "lab": False}, "'reason'"),
    ],
)
def test_bad_reports_become_an_error_message(wire, orchard_study, content, words):
    bridge = ExportBridge(orchard_study)
    wire.from_page(bridge, custom=content)
    assert words in bridge.error
    assert bridge.path == ""


def test_every_reported_path_is_accepted(wire, orchard_study):
    bridge = ExportBridge(orchard_study)
    for path in PATHS:
        wire.from_page(bridge, custom={"kind": "exported", "what": "code", "path": path})
        assert bridge.path == path
        assert bridge.error == ""


def test_cell_id_from_the_execute_request():
    class Kernel:
        def __init__(self, parent):
            self.parent = parent

        def get_parent(self):
            return self.parent

    class Shell:
        def __init__(self, parent):
            self.kernel = Kernel(parent)

    # JupyterLab's execute request metadata carries the cell id (stack notes, verified in a browser)
    assert current_cell_id(Shell({"metadata": {"cellId": "3f2a-cell"}})) == "3f2a-cell"
    assert current_cell_id(Shell({"metadata": {}})) == ""
    assert current_cell_id(Shell({})) == ""
    assert current_cell_id(Shell({"metadata": {"cellId": 12}})) == ""
    assert current_cell_id(Shell(None)) == ""
    assert current_cell_id(object()) == ""  # a shell without a kernel


def test_a_failing_export_text_is_reported_not_raised(wire, orchard_study):
    class NoCode:
        def to_code(self):
            raise ValueError("the model has no terms to export")

        def audit(self):
            return ""

    bridge = ExportBridge(NoCode())
    assert bridge.error == "the model has no terms to export"
    assert wire.state(bridge)["error"] == bridge.error
