"""Shared fixture for view tests: widgets talk to a comm that records every message.

``wire`` replaces comm creation (the ``comm`` package's documented hook, restored after the test)
so each widget gets a :class:`RecordingComm`.  Tests then assert on what was sent to the page and
act as the page through ``wire.from_page(...)``.  Any exception that ipywidgets would have turned
into a logged traceback fails the test: errors must reach the page as a message instead.
"""
from __future__ import annotations

import logging
from dataclasses import dataclass, field
from typing import Any

import comm
import pytest
from comm.base_comm import BaseComm


@dataclass
class Sent:
    """One message published by a widget's comm."""

    msg_type: str  # comm_open | comm_msg | comm_close
    data: dict
    buffers: list[bytes] = field(default_factory=list)

    @property
    def method(self) -> str | None:
        """``update``, ``custom``, ``echo_update``... for comm_msg; None for open/close."""
        return self.data.get("method") if self.msg_type == "comm_msg" else None


class RecordingComm(BaseComm):
    """A kernel-less comm that keeps every message it would have published."""

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        self.log: list[Sent] = []  # before super(): opening publishes the first message
        super().__init__(*args, **kwargs)

    def publish_msg(self, msg_type, data=None, metadata=None, buffers=None, **keys):
        self.log.append(Sent(msg_type, dict(data or {}), [bytes(b) for b in (buffers or [])]))


class _TracebackCatcher(logging.Handler):
    def __init__(self) -> None:
        super().__init__(level=logging.WARNING)
        self.records: list[logging.LogRecord] = []

    def emit(self, record: logging.LogRecord) -> None:
        if record.exc_info or "Exception in" in record.getMessage():
            self.records.append(record)


class Wire:
    """Access to the recording comms of the widgets created during one test."""

    def __init__(self) -> None:
        self.comms: list[RecordingComm] = []

    def _create(self, *args: Any, **kwargs: Any) -> RecordingComm:
        c = RecordingComm(*args, **kwargs)
        self.comms.append(c)
        return c

    @staticmethod
    def log(widget) -> list[Sent]:
        """Every message the widget's comm published, oldest first."""
        return widget.comm.log

    def clear(self, widget=None) -> None:
        """Forget what was sent so far (by one widget, or by all)."""
        for c in [widget.comm] if widget is not None else self.comms:
            c.log.clear()

    def updates(self, widget) -> list[dict]:
        """State updates sent to the page: one dict per message."""
        return [m.data["state"] for m in self.log(widget) if m.method == "update"]

    def state(self, widget) -> dict:
        """The page's view of the widget's state: the opening state plus every update since."""
        state: dict = {}
        for m in self.log(widget):
            if m.msg_type == "comm_open":
                state.update(m.data.get("state", {}))
            elif m.method in ("update", "echo_update"):
                state.update(m.data.get("state", {}))
        return state

    def custom(self, widget) -> list[dict]:
        """Custom messages (one-shot events) sent to the page."""
        return [m.data["content"] for m in self.log(widget) if m.method == "custom"]

    @staticmethod
    def from_page(widget, *, state: dict | None = None, custom: dict | None = None,
                  buffers: list[bytes] = ()) -> None:
        """Deliver a message from the page: a state update or a custom message."""
        if (state is None) == (custom is None):
            raise ValueError("give exactly one of state= or custom=")
        if state is not None:
            data = {"method": "update", "state": state, "buffer_paths": []}
        else:
            data = {"method": "custom", "content": custom}
        widget.comm.handle_msg({"content": {"data": data}, "buffers": list(buffers)})


@pytest.fixture
def wire(monkeypatch):
    """Make every widget created in the test use a :class:`RecordingComm`; yields a :class:`Wire`."""
    recorder = Wire()
    monkeypatch.setattr(comm, "create_comm", recorder._create)
    catcher = _TracebackCatcher()
    root = logging.getLogger()
    root.addHandler(catcher)
    try:
        yield recorder
    finally:
        root.removeHandler(catcher)
        from ipywidgets.widgets import widget as _widget

        instances = getattr(_widget, "_instances", {})
        for c in recorder.comms:
            w = instances.get(c.comm_id)
            if w is not None:
                w.close()
    if catcher.records:
        text = "\n".join(r.getMessage() for r in catcher.records)
        pytest.fail(f"a widget logged an exception instead of reporting it to the page:\n{text}")


HOSTILE = "<img src=x onerror=alert(1)>"


@pytest.fixture
def view_study():
    """A small real Study on an invented, seeded frame (columns x, a hostile name, g, y).

    Kept for the tests that were written against it; the widget tests use ``orchard_study``.
    """
    import numpy as np
    import pandas as pd

    from afterfit.model.study import Study

    rng = np.random.default_rng(20261202)
    n = 120
    df = pd.DataFrame({
        "x": rng.normal(size=n),
        HOSTILE: rng.normal(size=n),
        "g": rng.choice(["north", "south", "east"], n),
    })
    df["y"] = 1 + 2 * df["x"] + 0.6 * df["x"] ** 2 + rng.normal(size=n)
    return Study(df, "y ~ x", groups=["g"])


@pytest.fixture
def orchard_study():
    """A real Study on the invented orchard scenario, for wiring tests (no statistics checked).

    Its candidates carry every tag: ``block`` is a declared group (stated), the tree-age curve
    and the cultivar-by-irrigation slopes show in the residuals (evident), the rest are
    speculative.  The soil reading is renamed to a name that would run script if it ever
    reached HTML unescaped, so hostile text travels the real path from data to page.
    """
    import afterfit as af

    df = af.demo.orchard(seed=0).rename(columns={"soil_n": HOSTILE})
    return af.Study(df, df.attrs["first_formula"], groups=["block"])
