"""The Explorer: one Study's workbench (header, term tray, fit meter, residual grid, row inspector,
timeline, export), and the runner that keeps the page responsive while the Study refits.

Actions started from the page go through :meth:`Explorer.run`: they execute on one worker thread,
one at a time, in order; a request equivalent to one still waiting replaces it (the last wins).
While an action runs a status line says so, with a progress indication after about a second; an
error becomes a message in the widget.  After every change of the Study, from the page or from
another cell, every part is refreshed together.

Widget updates are made on the kernel's main thread: from the worker they are handed to the
kernel's IO loop (``kernel.io_loop.add_callback``, thread-safe), so traits are never changed from
two threads at once.  Without a running kernel (a script, a test) they are made directly.
"""
from __future__ import annotations

import html
import math
import threading
import time
import weakref
from dataclasses import dataclass
from typing import Any, Callable

import ipywidgets as W
import numpy as np
import pandas as pd

from afterfit.view.grid import GRID_CHECKS, PALETTE, ResidualGrid
from afterfit.view.inspector import RowInspector, model_variables

__all__ = ["Explorer"]

_PROGRESS_AFTER = 1.0  # seconds before the status line shows a moving progress bar
_TICK = 0.25
_REFRESH_WAIT = 30.0  # most seconds the worker waits for the page to catch up between actions
_LATER_ROWS = 200_000  # from this many rows the tray and audit log fill in after the display
_LATER = "__later__"
# redraw stages after a change, cheapest first: the fit and its cross-validation; then the grid
# (influence, pattern scores and smoothers); then candidate terms; then every check (audit log)
_FIRST = ("header", "model strip", "fit meter", "timeline", "export code")
_GRID = ("residual grid", "row inspector")
_PRIMARY = _FIRST + _GRID

_SMALL_N_PER_PARAMETER = 10  # rows per parameter below which a fit is called small (common practice)


@dataclass(frozen=True)
class _Job:
    fn: Callable[[], Any]
    label: str
    key: Any
    queued: float = 0.0  # time.monotonic() when run() took it


def _kernel_dispatch() -> Callable[[Callable], Any] | None:
    """The running kernel's thread-safe ``add_callback`` (None outside a kernel)."""
    try:
        from IPython import get_ipython
    except ImportError:  # pragma: no cover - IPython comes with ipywidgets
        return None
    shell = get_ipython()
    kernel = getattr(shell, "kernel", None)
    loop = getattr(kernel, "io_loop", None)
    add = getattr(loop, "add_callback", None)
    return add if callable(add) else None


def _esc(value: Any) -> str:
    return html.escape(str(value), quote=True)


def _num(x: float) -> str:
    if not np.isfinite(x):
        return "·"
    return f"{x:.4g}"


class Explorer(W.VBox):
    """The workbench for one Study.

    Parameters
    ----------
    study : Study
        The Study to show; the widget follows every change made to it, also from other cells.
    budget : int
        Most dots per residual panel (see :class:`afterfit.view.grid.ResidualGrid`).
    max_panels : int
        Residual panels shown at first.
    dispatch : callable, optional
        ``dispatch(fn)`` runs ``fn`` on the thread that owns the widgets.  Default: the kernel's
        IO loop when there is one, else ``fn`` is called directly.

    Attributes
    ----------
    study : the Study.
    grid, inspector : the residual grid and the row inspector.
    tray, meter, timeline, export : the term tray, fit meter, timeline and export bar.
    status : the status line (text); ``message`` holds the last error, in words.
    """

    def __init__(self, study: Any, *, budget: int = 500, max_panels: int = 12,
                 dispatch: Callable[[Callable], Any] | None = None):
        super().__init__(layout=W.Layout(width="100%", padding="6px"))
        self._study = study
        self._dispatch = dispatch if dispatch is not None else _kernel_dispatch()
        self._main = threading.current_thread()
        self._cv = threading.Condition()
        self._pending: list[_Job] = []
        self._running: _Job | None = None
        self._started = 0.0
        self._worker: threading.Thread | None = None
        self._closed = False
        self._refresh_queued = False
        self._refreshed = threading.Event()
        self._refreshed.set()
        self._tick_count = 0
        self.refresh_count = 0
        # seconds from the start of the last action to each stage's milestones (diagnostics;
        # the browser tests report them next to the delays measured in the page)
        self.timings: dict = {}
        self._owed = False  # candidate terms and the audit log not yet redrawn for this state
        self.errors: list[str] = []

        self.header = W.HTML("")
        self.cautions = W.HTML("")
        self.status_text = W.Label("")
        self.progress = W.IntProgress(value=0, min=0, max=8, bar_style="info",
                                      layout=W.Layout(width="160px", visibility="hidden"))
        self.status_row = W.HBox([self.status_text, self.progress],
                                 layout=W.Layout(align_items="center", min_height="26px"))
        self.message = W.Label("", style={"text_color": PALETTE["cook"]})
        self.dismiss = W.Button(description="Dismiss", layout=W.Layout(width="auto",
                                                                        display="none"))
        self.dismiss.on_click(lambda _b: self._set_message(""))

        from afterfit.view.cells import ExportBridge
        from afterfit.view.meter import Meter
        from afterfit.view.timeline import Timeline
        from afterfit.view.tray import Tray

        # on large tables the candidate terms and the specification checks take seconds: the
        # workbench shows without them and the worker fills them in (status line meanwhile)
        later = len(study.rows) >= _LATER_ROWS
        self.tray = Tray(study, run=self.run, pull=not later)
        self.meter = Meter(study, run=self.run)
        self.grid = ResidualGrid(study, run=self.run, budget=budget, max_panels=max_panels)
        self.inspector = RowInspector(study, run=self.run)
        self.timeline = Timeline(study, run=self.run)
        self.export = ExportBridge(study, run=self.run, pull=not later)
        if later:
            self.tray.refresh_terms()
            self.export.refresh_code()
        self.grid.on_select(self.inspector.show_rows)

        section = {"margin": "8px 0 0 0"}
        self.children = [
            self.header, self.cautions, self.status_row,
            W.HBox([self.message, self.dismiss], layout=W.Layout(align_items="center")),
            W.HBox([
                W.Box([self.tray], layout=W.Layout(flex="3 1 0", min_width="360px", margin="0 10px 0 0")),
                W.Box([self.meter], layout=W.Layout(flex="2 1 0", min_width="280px")),
            ], layout=W.Layout(width="100%", flex_flow="row wrap")),
            W.Box([self.grid], layout=W.Layout(width="100%", **section)),
            W.HBox([
                W.Box([self.inspector], layout=W.Layout(flex="3 1 0", min_width="380px", margin="0 10px 0 0")),
                W.Box([self.timeline], layout=W.Layout(flex="2 1 0", min_width="280px")),
            ], layout=W.Layout(width="100%", flex_flow="row wrap", **section)),
            W.Box([self.export], layout=W.Layout(width="100%", **section)),
        ]
        # stable hooks for the browser tests (tests/e2e): class names only
        self.add_class("afterfit-explorer")
        self.header.add_class("afterfit-header")
        self.status_text.add_class("afterfit-status-line")
        self.message.add_class("afterfit-message")
        self._refresh_header()
        # a weak reference: a forgotten Explorer must not live as long as its Study
        ref = weakref.ref(self)

        def follow(_study: Any, _event: Any) -> None:
            me = ref()
            if me is not None:
                me._changed()

        self._unsubscribe = study.subscribe(follow)
        if later:
            self.run(lambda: None, "prepare the term tray and the audit log", key=_LATER)

    @property
    def study(self) -> Any:
        """The Study shown by this workbench."""
        return self._study

    @property
    def status(self) -> str:
        """The status line's text ("" when idle)."""
        return self.status_text.value

    @property
    def busy(self) -> bool:
        """True while an action runs or waits."""
        with self._cv:
            return self._running is not None or bool(self._pending)

    # -- running actions ----------------------------------------------------------------------
    def run(self, fn: Callable[[], Any], label: str, *, key: Any = None) -> None:
        """Run the Study action ``fn`` on the worker thread, without blocking the page.

        Parameters
        ----------
        fn : a callable with no arguments that changes the Study (e.g. ``lambda: s.add("x")``).
        label : what it does, in a few words ("add x"); shown in the status line and errors.
        key : actions with the same key are equivalent: one still waiting is replaced by the
            newer one (the last wins).  Default: the label.
        """
        if not callable(fn):
            raise TypeError(f"run() needs a callable, got {type(fn).__name__}")
        job = _Job(fn, str(label), label if key is None else key, time.monotonic())
        with self._cv:
            if self._closed:
                raise RuntimeError("this Explorer was closed; make a new one with explore()")
            for i, waiting in enumerate(self._pending):
                if waiting.key == job.key:
                    self._pending[i] = job
                    break
            else:
                self._pending.append(job)
            if self._worker is None or not self._worker.is_alive():
                self._worker = threading.Thread(target=self._work, name="afterfit-worker",
                                                daemon=True)
                self._worker.start()
            self._cv.notify_all()
        self._post(self._show_status)

    def wait(self, timeout: float | None = None) -> bool:
        """Block until every action has run (True) or ``timeout`` seconds passed (False).

        Refreshes made on the kernel's IO loop happen after the calling cell finishes.
        """
        end = None if timeout is None else time.monotonic() + timeout
        with self._cv:
            while self._running is not None or self._pending:
                left = None if end is None else end - time.monotonic()
                if left is not None and left <= 0:
                    return False
                self._cv.wait(left)
        return True

    def _work(self) -> None:
        while True:
            with self._cv:
                while not self._pending and not self._closed:
                    self._cv.wait()
                if self._closed:
                    return
                job = self._pending.pop(0)
                self._running = job
                self._started = time.monotonic()
            self._refreshed.clear()
            self._post(self._show_status)
            ticker = threading.Thread(target=self._tick, args=(job,), daemon=True,
                                      name="afterfit-progress")
            ticker.start()
            error = None
            self.timings = {"queued_to_start": time.monotonic() - job.queued}
            try:
                job.fn()
            except Exception as exc:  # shown in the widget; the kernel keeps running
                error = exc
            self.timings["action"] = time.monotonic() - self._started
            with self._cv:
                refresh_due = self._refresh_queued
                self._refresh_queued = False
            if error is not None:
                self._post(lambda j=job, e=error: self._show_error(j, e))
            if job.key == _LATER and error is None:
                self._owed = True  # the first display left the tray and the audit log to us
            if refresh_due and not self._closed:
                # the meter and strip first, then the grid: a refit shows as soon as its own
                # numbers exist.  The Study's results are computed here, off the page's thread,
                # and cached per state.
                self._stage(job, "redraw", self._warm_first, _FIRST)
                self._stage(job, "redraw the residual grid", self._warm_grid, _GRID)
                self._owed = True
            if self._owed and not self._closed:
                with self._cv:
                    # another action is waiting: candidates (seconds on large tables) and checks
                    # of this state would be out of date at once; the next action owes them
                    skip = bool(self._pending)
                if not skip:
                    self._stage(job, "update candidate terms", self._warm_tray, ("term tray",))
                    # the audit log reports every specification check; on large tables White's
                    # and Harvey-Collier's take seconds, so they run last
                    self._stage(job, "run the specification checks", self._warm_checks,
                                ("export",))
                    self._owed = False
            with self._cv:
                self._running = None
                self._cv.notify_all()
            self._post(self._show_status)

    def _stage(self, job: _Job, what: str, warm: Callable[[], Any], parts: tuple) -> None:
        with self._cv:
            self._running = _Job(job.fn, f"{job.label}: {what}", job.key, job.queued)
        self._post(self._show_status)
        try:
            warm()
        except Exception:  # the refresh below shows what went wrong, part by part
            pass
        self.timings[f"{what}: computed"] = time.monotonic() - self._started
        self._refreshed.clear()

        def show() -> None:
            try:
                self.timings[f"{what}: drawing starts"] = time.monotonic() - self._started
                self.refresh(parts)
            finally:
                self.timings[f"{what}: sent"] = time.monotonic() - self._started
                self._refreshed.set()

        self._post(show)
        self._refreshed.wait(_REFRESH_WAIT)

    def _warm_first(self) -> None:
        s = self._study
        s.fit, s.meter()

    def _warm_grid(self) -> None:
        s = self._study
        # the checks the grid ranks panels by; the rest (White, Harvey-Collier, ...) come last
        s.influence, s.pattern_scores(), s.checks(only=GRID_CHECKS)

    def _warm_primary(self) -> None:
        self._warm_first()
        self._warm_grid()

    def _warm_tray(self) -> None:
        self._study.candidates()

    def _warm_checks(self) -> None:
        self._study.checks()

    def _tick(self, job: _Job) -> None:
        while True:
            time.sleep(_TICK)
            with self._cv:
                if self._running is not job or self._closed:
                    return
            if time.monotonic() - self._started >= _PROGRESS_AFTER:
                self._post(self._show_status)

    def _post(self, fn: Callable[[], Any]) -> None:
        """Run ``fn`` where the widgets live: here on the main thread, else via ``dispatch``."""
        if threading.current_thread() is self._main or self._dispatch is None:
            fn()
        else:
            self._dispatch(fn)

    def _show_status(self) -> None:
        with self._cv:
            job = self._running
            waiting = len(self._pending)
            started = self._started
        if job is None and not waiting:
            self.status_text.value = ""
            self.progress.layout.visibility = "hidden"
            return
        if job is None:
            self.status_text.value = f"Waiting to run {waiting} action(s)…"
            return
        elapsed = time.monotonic() - started
        text = f"Working: {job.label}…"
        if elapsed >= _PROGRESS_AFTER:
            text += f" {elapsed:.1f} s"
        if waiting:
            text += f" ({waiting} more waiting)"
        with self.progress.hold_sync():
            if elapsed >= _PROGRESS_AFTER:
                self._tick_count = (self._tick_count + 1) % (self.progress.max + 1)
                self.progress.value = self._tick_count
                self.progress.layout.visibility = "visible"
        self.status_text.value = text

    def _show_error(self, job: _Job, exc: BaseException) -> None:
        text = str(exc).strip() or type(exc).__name__
        self.errors.append(f"{job.label}: {text}")
        self._set_message(f"Could not {job.label}: {text}")

    def _set_message(self, text: str) -> None:
        self.message.value = text
        self.dismiss.layout.display = None if text else "none"

    # -- following the Study ------------------------------------------------------------------
    def _changed(self) -> None:
        with self._cv:
            self._refresh_queued = True
            from_worker = threading.current_thread() is self._worker
        if not from_worker and not self._closed:
            # a change made in another cell: the worker computes and redraws, as for the page
            self.run(lambda: None, "update the workbench", key="__refresh__")

    def refresh(self, parts: tuple | None = None) -> None:
        """Redraw the named parts (default: every part) from the Study's current state, in one batch."""
        self.refresh_count += 1
        problems = []
        every = (("header", None), ("model strip", None), ("export code", None),
                 ("term tray", self.tray),
                 ("fit meter", self.meter),
                 ("residual grid", self.grid), ("row inspector", self.inspector),
                 ("timeline", self.timeline), ("export", self.export))
        with self.hold_sync():
            for name, part in every:
                if parts is not None and name not in parts:
                    continue
                try:
                    if name == "header":
                        self._refresh_header()
                    elif name == "model strip":
                        if parts is not None:  # a full refresh updates the whole tray anyway
                            self.tray.refresh_terms()
                    elif name == "export code":
                        if parts is not None:  # a full refresh updates the whole export bar
                            self.export.refresh_code()
                    elif hasattr(part, "refresh"):
                        part.refresh()
                except Exception as exc:  # one broken part must not blank the others
                    problems.append(f"{name}: {str(exc).strip() or type(exc).__name__}")
        if problems:
            self.errors.extend(problems)
            self._set_message("Could not redraw " + "; ".join(problems))

    def _refresh_header(self) -> None:
        s = self._study
        fit = s.fit
        n_used = len(s.rows)
        n_excl = len(s.excluded)
        n_drop = len(getattr(s, "dropped", ()))
        n_hold = len(getattr(s, "holdout_rows", ()))
        parts = [f"{n_used:,} rows used", f"{n_excl:,} excluded",
                 f"{n_drop:,} dropped for missing values"]
        if n_hold:
            opened = getattr(s, "holdout_record", None) is not None
            parts.append(f"{n_hold:,} in the sealed holdout" + (" (opened)" if opened else ""))
        self.header.value = (
            f'<div style="font-size:14px;color:{PALETTE["text"]}">'
            f'<b>Model</b> <code style="background:{PALETTE["paper"]};padding:1px 4px">'
            f"{_esc(s.formula)}</code></div>"
            f'<div style="font-size:12px;color:{PALETTE["muted"]}">'
            + " · ".join(_esc(p) for p in parts)
            + f" · RMSE {_esc(_num(fit.rmse))} · R² {_esc(_num(fit.r2))}</div>"
        )
        items = [_esc(c) for c in cautions(s)]
        self.cautions.value = (
            f'<div style="font-size:12px;color:{PALETTE["text"]};border-left:3px solid '
            f'{PALETTE["selected"]};padding:2px 8px;margin:4px 0">'
            "<b>Cautions</b>: " + " · ".join(items) + "</div>")

    def _repr_mimebundle_(self, **kwargs: Any) -> Any:
        # the export bridge inserts code after the cell that shows it: that is this cell
        self.export.note_cell()
        return super()._repr_mimebundle_(**kwargs)

    def close(self) -> None:
        """Stop following the Study, stop the worker, and close every part."""
        with self._cv:
            self._closed = True
            self._pending.clear()
            self._cv.notify_all()
        if self._unsubscribe is not None:
            self._unsubscribe()
            self._unsubscribe = None
        for part in (self.tray, self.meter, self.timeline, self.export):
            try:
                part.close()
            except Exception:
                pass
        super().close()


def cautions(study: Any) -> list[str]:
    """Plain-language cautions for the header: observational data, small n, extrapolation."""
    fit = study.fit
    out = ["observational data: a term that improves the fit describes an association, "
           "not the effect of changing that variable"]
    n, p = int(fit.nobs), int(fit.rank)
    if p and n < _SMALL_N_PER_PARAMETER * p:
        out.append(f"small sample: {n:,} rows for {p} parameters (under "
                   f"{_SMALL_N_PER_PARAMETER} per parameter, common practice), so the fit is "
                   "optimistic and intervals are wide")
    ranges = []
    data = study.data
    rows = study.rows
    for v in model_variables(study)[1:]:
        s = data[v]
        if pd.api.types.is_numeric_dtype(s.dtype) and not pd.api.types.is_bool_dtype(s.dtype):
            vals = s.reindex(rows).to_numpy(dtype=float)
            vals = vals[np.isfinite(vals)]
            if vals.size:
                ranges.append(f"{v} {_num(float(vals.min()))} to {_num(float(vals.max()))}")
        if len(ranges) == 4:
            break
    if ranges:
        out.append("extrapolation: the fit describes only the observed ranges ("
                   + "; ".join(ranges) + "); predictions outside them are guesses")
    return out
