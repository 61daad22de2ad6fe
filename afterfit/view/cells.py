"""Export bridge: the Study's statsmodels code into a new cell below, the audit log to the clipboard.

Order of attempts for "Insert code below" (``js/cells.js`` does the first itself):

1. The page inserts a cell right after the widget's own cell, found by the cell id recorded here
   at display time, through JupyterLab's notebook model.  Precise and confirmable, but it uses an
   attribute that is not a public anywidget API, so it is guarded and may fail.
2. The page asks Python, which runs JupyterLab's public commands through ipylab:
   ``notebook:insert-cell-below`` then ``notebook:replace-selection``.  They act on the active
   cell (a click on the button makes the widget's cell active) and report nothing back, so the
   status line says the request was sent, not that it worked.
3. Anything else (VS Code, the classic notebook, no ipylab): the page shows the code in a
   read-only box with a Copy button.

The page reports the path that worked (``{"kind": "exported", "what", "path"}``); it is kept in
``path`` and ``last_export``.
"""
from __future__ import annotations

import warnings
from typing import Any

import traitlets

from afterfit.view._static import StudyWidget, _BadRequest, _describe, esm_path, request_text

__all__ = ["ExportBridge", "current_cell_id", "ipylab_frontend_class"]

# every way an export can leave the widget, as reported in ``path``
PATHS = ("cell-id", "ipylab", "clipboard", "select-copy", "copy-box")
_DONE = {
    "cell-id": "Inserted the code in a new cell below this one.",
    "clipboard": "Copied the {what} to the clipboard.",
    "select-copy": "Copied the {what} (selected text).",
    "copy-box": "Showed the {what} for copying by hand.",
}
_WHAT = {"code": "statsmodels code", "audit": "audit log"}


def current_cell_id(shell: Any = None) -> str:
    """Id of the notebook cell being executed, or "" outside a notebook (or when unknown).

    JupyterLab and Notebook 7 put ``cellId`` in the metadata of each execute request.

    Parameters
    ----------
    shell : InteractiveShell, optional
        The IPython shell to ask; the running one by default.
    """
    try:
        if shell is None:
            from IPython import get_ipython

            shell = get_ipython()
        kernel = getattr(shell, "kernel", None)
        if kernel is None:
            return ""
        parent = kernel.get_parent() or {}
        cell = (parent.get("metadata") or {}).get("cellId")
        return cell if isinstance(cell, str) else ""
    except Exception:  # any kernel without this protocol detail: no cell id, the fallbacks apply
        return ""


def ipylab_frontend_class() -> Any:
    """ipylab's ``JupyterFrontEnd`` class, or None when ipylab is not installed.

    ipylab 1.x declares a trait with a type instead of an instance, which traitlets reports with
    a DeprecationWarning at import; that is ipylab's to fix, and under warnings-as-errors (a test
    run, a strict user) it must not stop the export, so it is silenced for this import only.
    """
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="Traits should be given as instances")
        try:
            from ipylab import JupyterFrontEnd
        except ImportError:
            return None
    return JupyterFrontEnd


class ExportBridge(StudyWidget):
    """Buttons "Insert code below", "Copy audit log" and "Show code" for a Study.

    Parameters
    ----------
    study : Study
    run : callable, optional
        Accepted for a uniform signature; exporting runs no Study action.
    frontend : ipylab.JupyterFrontEnd, optional
        Used for the JupyterLab-commands path; created on first need when ipylab is installed.
        The Explorer may pass one it already has.
    """

    _esm = esm_path("cells.js")
    _css = esm_path("style.css")

    code = traitlets.Unicode("", help="study.to_code(): runnable with pandas + statsmodels.").tag(
        sync=True
    )
    audit = traitlets.Unicode("", help="study.audit(): Markdown log of every step.").tag(sync=True)
    cell_id = traitlets.Unicode("", help="Id of the cell that displayed the widget.").tag(sync=True)
    status = traitlets.Unicode("", help="What the last export did, in words.").tag(sync=True)
    path = traitlets.Unicode("", help=f"How the last export left the widget: one of {PATHS}.")
    last_export = traitlets.Dict(help="The last export: {'what': 'code'|'audit', 'path': ...}.")

    _requests = {"insert": "_request_insert", "exported": "_request_exported"}

    def __init__(self, study: Any, *, run: Any = None, frontend: Any = None,
                 pull: bool = True) -> None:
        self._frontend = frontend
        super().__init__(study, run=run, pull=pull)
        self.note_cell()

    def _pull(self) -> None:
        self.code = str(self._study.to_code())
        self.audit = str(self._study.audit())

    def refresh_code(self) -> None:
        """Send the current code now and clear the audit log until :meth:`refresh` rebuilds it.

        The audit log reports every specification check, which on large tables take seconds;
        an empty log tells the page to say it is being prepared rather than copy a stale one.
        """
        try:
            with self.hold_sync():
                self.code = str(self._study.to_code())
                self.audit = ""
                self.error = ""
        except Exception as exc:  # the page shows the text; the kernel keeps running
            self.error = _describe(exc)

    def note_cell(self) -> None:
        """Record the cell being executed as the widget's cell (call it when displaying)."""
        cell = current_cell_id()
        if cell:
            self.cell_id = cell

    def _repr_mimebundle_(self, **kwargs: Any) -> Any:
        self.note_cell()
        return super()._repr_mimebundle_(**kwargs)

    def _frontend_app(self) -> Any:
        if self._frontend is None:
            front_end = ipylab_frontend_class()
            if front_end is None:
                return None
            self._frontend = front_end()
        return self._frontend

    def _request_insert(self, content: dict) -> None:
        reason = request_text(content, "reason", required=False) or "the page could not insert it"
        code = self.code
        app = self._frontend_app() if content.get("lab") is True else None
        if app is not None:
            app.commands.execute("notebook:insert-cell-below")
            app.commands.execute("notebook:replace-selection", {"text": code})
            self._record("code", "ipylab")
            self.status = (
                "Asked JupyterLab (through ipylab) to insert the code below the active cell."
            )
            self.send({"kind": "commands_sent"})
            return
        if content.get("lab") is True:
            why = f"{reason}; ipylab is not installed, so here is the code to copy."
        else:
            why = f"{reason}; this front end has no notebook commands, so here is the code to copy."
        self._record("code", "copy-box")
        self.status = why
        self.send({"kind": "fallback", "what": "code", "reason": why})

    def _request_exported(self, content: dict) -> None:
        what = request_text(content, "what")
        path = request_text(content, "path")
        if what not in _WHAT or path not in PATHS:
            raise _BadRequest(f"the page reported an unknown export ({what!r} by {path!r})")
        self._record(what, path)
        self.status = _DONE.get(path, "").format(what=_WHAT[what])

    def _record(self, what: str, path: str) -> None:
        with self.hold_sync():
            self.path = path
            self.last_export = {"what": what, "path": path}
