"""Where the ES modules live, and the base class shared by afterfit's anywidget views.

The wheel ships ``js/`` as ``afterfit/static`` (hatch ``force-include``); an editable install or a
clone has no ``static`` folder, so the repository's ``js/`` is the second place to look.
"""
from __future__ import annotations

import math
import pathlib
import weakref
from typing import Any, Callable

import anywidget
import traitlets

__all__ = [
    "esm_path", "StudyWidget", "plain_number", "plain_text", "text_list", "request_text", "request_int",
]

_PACKAGE = pathlib.Path(__file__).resolve().parent.parent


def esm_path(name: str) -> pathlib.Path:
    """Path of the front-end file ``name`` (for example ``"tray.js"``).

    Looks in the installed package's ``static/`` folder first, then in the repository's ``js/``.

    Raises
    ------
    FileNotFoundError
        When neither folder has the file (a broken install).
    """
    places = (_PACKAGE / "static" / name, _PACKAGE.parent / "js" / name)
    for path in places:
        if path.is_file():
            return path
    raise FileNotFoundError(
        f"afterfit's front-end file {name!r} is missing (looked in {places[0].parent.name}/ of the "
        "package and js/ of the repository); reinstall afterfit, or in a clone keep the js/ folder"
    )


def plain_number(value: Any) -> float | None:
    """A finite float for JSON, or None for missing, NaN or infinite values.

    JSON has no NaN: the browser would reject the whole state message if one slipped through.
    """
    if value is None or isinstance(value, bool):
        return None
    try:
        number = float(value)
    except (TypeError, ValueError):
        return None
    return number if math.isfinite(number) else None


def plain_text(value: Any) -> str:
    """Text for the page: missing values (None, NaN, pandas NA) become an empty string."""
    if value is None:
        return ""
    if isinstance(value, float) and math.isnan(value):
        return ""
    try:
        import pandas as pd

        if value is pd.NA or value is pd.NaT:
            return ""
    except ImportError:  # pragma: no cover - pandas is a dependency
        pass
    return str(value)


def text_list(value: Any) -> list[str]:
    """A list of strings from a list/tuple/array of names, one name, or a missing value."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return []
    if isinstance(value, str):
        return [value] if value else []
    try:
        return [plain_text(v) for v in value]
    except TypeError:
        return [plain_text(value)]


RunFn = Callable[[Callable[[], Any], str], Any]


class StudyWidget(anywidget.AnyWidget):
    """Base of the anywidget views: one Study, a ``run`` hook, ``refresh()`` and request handling.

    Parameters
    ----------
    study : Study
        The study this view shows and acts on.
    run : callable, optional
        ``run(fn, label)`` executes a Study action for the Explorer (status line, error capture,
        refresh afterwards).  Without it the view calls the Study directly, puts any error text in
        ``error``, and subscribes to the Study so it follows changes made elsewhere.

    Notes
    -----
    Requests from the browser are custom messages ``{"kind": ..., ...}``; subclasses list their
    handlers in ``_requests`` (kind -> method name).  A malformed request or a failing action
    never raises into the kernel: its text lands in ``error``.
    """

    error = traitlets.Unicode("", help="Text of the last failed request or refresh.").tag(sync=True)

    _requests: dict[str, str] = {}

    def __init__(self, study: Any, *, run: RunFn | None = None, pull: bool = True) -> None:
        super().__init__()
        self._study = study
        self._run = run
        self._unsubscribe: Callable[[], Any] | None = None
        self.on_msg(self._on_request)
        if pull:  # pull=False: the owner refreshes it later (the Explorer, on large tables)
            self.refresh()
        subscribe = getattr(study, "subscribe", None)
        if run is None and callable(subscribe):
            # a weak reference, so a forgotten widget does not live as long as its Study
            ref = weakref.ref(self)

            def follow(_study: Any, _event: Any) -> None:
                widget = ref()
                if widget is not None:
                    widget.refresh()

            self._unsubscribe = subscribe(follow)

    @property
    def study(self) -> Any:
        """The Study this view shows."""
        return self._study

    def refresh(self) -> None:
        """Pull the current state from the Study and send it to the page in one message."""
        try:
            with self.hold_sync():
                self._pull()
                self.error = ""
        except Exception as exc:  # the page shows the text; the kernel keeps running
            self.error = _describe(exc)

    def close(self) -> None:
        """Stop following the Study and close the widget."""
        if self._unsubscribe is not None:
            try:
                self._unsubscribe()
            finally:
                self._unsubscribe = None
        super().close()

    # -- subclass hooks -------------------------------------------------------------------------
    def _pull(self) -> None:  # pragma: no cover - every subclass overrides it
        raise NotImplementedError

    # -- running actions ------------------------------------------------------------------------
    def _act(self, fn: Callable[[], Any], label: str) -> None:
        """Run a Study action through ``run`` when given, else directly, catching its error."""
        self.error = ""
        if self._run is not None:
            self._run(fn, label)
            return
        try:
            fn()
        except Exception as exc:
            self.error = f"{label}: {_describe(exc)}"
            return
        if self._unsubscribe is None:  # a subscribed view has already been refreshed
            self.refresh()

    def _on_request(self, _widget: Any, content: Any, _buffers: Any) -> None:
        if not isinstance(content, dict) or not isinstance(content.get("kind"), str):
            self.error = "ignored a malformed request from the page (no 'kind')"
            return
        name = self._requests.get(content["kind"])
        if name is None:
            return  # not a request (e.g. a status report handled elsewhere) or from a newer page
        try:
            getattr(self, name)(content)
        except _BadRequest as exc:
            self.error = str(exc)
        except Exception as exc:
            self.error = _describe(exc)


class _BadRequest(ValueError):
    """A request from the page that cannot be acted on (stale or malformed)."""


def _describe(exc: BaseException) -> str:
    text = str(exc).strip()
    return text if text else type(exc).__name__


def request_text(content: dict, key: str, *, required: bool = True) -> str | None:
    """A text field of a request, checked: the page is not trusted to send the right types."""
    value = content.get(key)
    if value is None and not required:
        return None
    if not isinstance(value, str) or (required and not value):
        raise _BadRequest(f"the page sent a request without a valid {key!r}; refresh the view")
    return value


def request_int(content: dict, key: str) -> int:
    """An integer field of a request, checked (booleans and floats are refused)."""
    value = content.get(key)
    if isinstance(value, bool) or not isinstance(value, int):
        raise _BadRequest(f"the page sent a request without a whole-number {key!r}")
    return value
