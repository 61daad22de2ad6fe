"""Row inspector: the brushed rows as a sortable list, and excluding/including rows with reasons.

Every piece of text that comes from the data (index labels, values, column names, reasons) is shown
through widgets that render plain text (``Label``, the options of a ``SelectMultiple``, ``Dropdown``
options), never as HTML.
"""
from __future__ import annotations

import math
from typing import Any, Callable

import ipywidgets as W
import numpy as np
import pandas as pd

from afterfit.model.terms import term_variables

__all__ = ["RowInspector", "row_table"]

_NBSP = "\u00a0"  # <option> text collapses runs of spaces; non-breaking ones keep the columns
_MIN_WIDTH, _MAX_WIDTH = 6, 24
# a fixed stylesheet (no data in it): monospaced lists so the columns line up
_STYLE = (
    "<style>.afterfit-mono select, .afterfit-mono .widget-label, .afterfit-mono label"
    "{font-family: ui-monospace, SFMono-Regular, Menlo, Consolas, monospace; font-size: 12px;}"
    "</style>"
)
_DIAGNOSTICS = {"residual": "residual", "leverage": "leverage", "cooks_d": "Cook's D"}


def model_variables(study: Any) -> list[str]:
    """Columns of the data the current model reads: the response first, then its terms'."""
    cols = [str(c) for c in study.data.columns]
    out = [study.response] if study.response in cols else []
    for term in study.terms:
        for v in term_variables(term, cols):
            if v not in out:
                out.append(v)
    return out


def row_table(study: Any, labels) -> pd.DataFrame:
    """The inspector's table for rows ``labels`` that are in the current fit.

    Columns: the model's variables (response first), ``residual``, ``leverage`` and ``cooks_d``;
    index: the rows' labels in the order given.
    """
    labels = pd.Index(labels)
    variables = model_variables(study)
    if len(labels) == 0:  # nothing selected: no pass over the rows (a million, maybe)
        table = study.data.iloc[:0][variables].copy()
        for c in ("residual", "leverage", "cooks_d"):
            table[c] = np.array([], dtype=float)
        return table
    labels = labels[labels.isin(study.rows)]
    table = study.data.loc[labels, variables].copy()
    table["residual"] = study.fit.resid.reindex(labels).to_numpy()
    infl = study.influence
    table["leverage"] = infl["leverage"].reindex(labels).to_numpy()
    table["cooks_d"] = infl["cooks_d"].reindex(labels).to_numpy()
    return table


def _cell(value: Any) -> str:
    if value is None or value is pd.NA or value is pd.NaT:
        return "·"
    if isinstance(value, (float, np.floating)):
        if math.isnan(value):
            return "·"
        return f"{value:.5g}"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    text = str(value).replace("\n", " ").replace("\r", " ").replace("\t", " ")
    return text


def _is_number(s: pd.Series) -> bool:
    return pd.api.types.is_numeric_dtype(s.dtype) and not pd.api.types.is_bool_dtype(s.dtype)


def _fit(text: str, width: int, *, right: bool = False) -> str:
    if len(text) > width:
        text = text[: width - 1] + "…"
    text = text.rjust(width) if right else text.ljust(width)
    return text.replace(" ", _NBSP)


def _line(cells: list[str], right: list[bool], widths: list[int]) -> str:
    return (_NBSP * 2).join(_fit(c, w, right=r) for c, r, w in zip(cells, right, widths))


class RowInspector(W.VBox):
    """The brushed rows: values of the model's variables, residual, leverage and Cook's D.

    Parameters
    ----------
    study : Study
    run : callable, optional
        ``run(fn, label)`` from the Explorer (worker thread, status line, error text). Without it
        actions run directly and errors are shown in ``message``.
    cap : int
        Most rows listed (the count says how many were selected).

    Attributes
    ----------
    rows : index labels of the selected rows that are in the current fit.
    table : the selected rows' table, sorted as shown (all rows, not only the listed ones).
    """

    def __init__(self, study: Any, *, run: Callable | None = None, cap: int = 200):
        super().__init__(layout=W.Layout(width="100%", padding="4px 0"))
        self._study = study
        self._run = run
        self.cap = int(cap)
        self._wanted = pd.Index([])
        self.rows = pd.Index([])
        self.table = pd.DataFrame()
        self.shown = pd.Index([])
        self.title = W.Label("Row inspector", style={"font_weight": "bold"},
                             layout=W.Layout(margin="0 12px 0 0"))
        self.count = W.Label("Brush a panel to list its rows here.")
        self.sort_by = W.Dropdown(options=[("row", "")], value="", description="Sort by",
                                  layout=W.Layout(width="260px"))
        self.descending = W.ToggleButton(False, description="descending", icon="sort-amount-desc",
                                         layout=W.Layout(width="130px"))
        self.header = W.Label("", layout=W.Layout(overflow="hidden"))
        self.list = W.SelectMultiple(options=[], rows=10, layout=W.Layout(width="100%"))
        self.exclude_button = W.Button(description="Exclude selected…", disabled=True,
                                       button_style="warning", layout=W.Layout(width="auto"))
        self.reason = W.Text(placeholder="Reason (required): why these rows do not belong",
                             layout=W.Layout(width="420px"))
        self.confirm = W.Button(description="Exclude", disabled=True, button_style="danger",
                                layout=W.Layout(width="auto"))
        self.cancel = W.Button(description="Cancel", layout=W.Layout(width="auto"))
        self.reason_row = W.HBox([self.reason, self.confirm, self.cancel],
                                 layout=W.Layout(display="none"))
        self.excluded_title = W.Label("Excluded rows: none")
        self.excluded_list = W.SelectMultiple(options=[], rows=4, layout=W.Layout(width="100%"))
        self.include_button = W.Button(description="Include back", disabled=True,
                                       layout=W.Layout(width="auto"))
        self.message = W.Label("", style={"text_color": "#b8433a"})
        # stable hooks for the browser tests (tests/e2e): class names only
        self.add_class("afterfit-inspector")
        self.count.add_class("afterfit-inspector-count")
        self.exclude_button.add_class("afterfit-exclude")
        self.reason.add_class("afterfit-exclude-reason")
        self.confirm.add_class("afterfit-exclude-confirm")
        self.sort_by.observe(lambda _c: self._render(), names=["value"])
        self.descending.observe(lambda _c: self._render(), names=["value"])
        self.list.observe(lambda _c: self._update_buttons(), names=["value"])
        self.excluded_list.observe(lambda _c: self._update_buttons(), names=["value"])
        self.reason.observe(lambda _c: self._update_buttons(), names=["value"])
        self.exclude_button.on_click(lambda _b: self._ask_reason())
        self.cancel.on_click(lambda _b: self._close_reason())
        self.confirm.on_click(lambda _b: self.exclude_selected(self.reason.value))
        self.include_button.on_click(lambda _b: self.include_picked())
        body = W.VBox([self.header, self.list], layout=W.Layout(width="100%"))
        body.add_class("afterfit-mono")
        excluded = W.VBox([self.excluded_title, self.excluded_list], layout=W.Layout(width="100%"))
        excluded.add_class("afterfit-mono")
        self.children = [
            W.HTML(_STYLE),
            W.HBox([self.title, self.count], layout=W.Layout(align_items="center")),
            W.HBox([self.sort_by, self.descending]),
            body,
            W.HBox([self.exclude_button]),
            self.reason_row,
            excluded,
            W.HBox([self.include_button]),
            self.message,
        ]
        self.refresh()

    @property
    def study(self) -> Any:
        return self._study

    # -- content ------------------------------------------------------------------------------
    def show_rows(self, labels) -> None:
        """List the rows ``labels`` (rows not in the current fit are left out)."""
        self._wanted = pd.Index(labels)
        self.message.value = ""
        self._close_reason()
        self.refresh()

    def refresh(self) -> None:
        """Re-read the selected rows and the excluded list from the Study."""
        study = self._study
        self.table = row_table(study, self._wanted)
        self.rows = self.table.index
        options = [("row", "")] + [(_DIAGNOSTICS.get(c, str(c)), str(c))
                                   for c in self.table.columns]
        if list(self.sort_by.options) != options:
            keep = self.sort_by.value if self.sort_by.value in [v for _, v in options] else ""
            with self.sort_by.hold_trait_notifications():
                self.sort_by.options = options
                self.sort_by.value = keep
        self._render()
        excluded = study.excluded
        items = list(excluded.items())[: self.cap]
        self.excluded_list.options = [(f"{_cell(k)} — {_cell(r)}", i)
                                      for i, (k, r) in enumerate(items)]
        self._excluded_items = items
        n = len(excluded)
        if n == 0:
            self.excluded_title.value = "Excluded rows: none"
        elif n > len(items):
            self.excluded_title.value = f"Excluded rows (showing {len(items):,} of {n:,}):"
        else:
            self.excluded_title.value = f"Excluded rows ({n:,}), with their reasons:"
        self._update_buttons()

    def _sorted(self) -> pd.DataFrame:
        t = self.table
        col = self.sort_by.value
        asc = not self.descending.value
        if not len(t):
            return t
        if col == "":
            return t.iloc[::-1] if not asc else t
        name = next((c for c in t.columns if str(c) == col), None)
        if name is None:
            return t
        s = t[name]
        try:
            order = s.sort_values(ascending=asc, na_position="last", kind="stable").index
        except TypeError:  # mixed types in an object column: compare as text
            order = s.astype(str).sort_values(ascending=asc, kind="stable").index
        return t.loc[order]

    def _render(self) -> None:
        t = self._sorted()
        head = t.iloc[: self.cap]
        self.shown = head.index
        cols = ["row"] + [_DIAGNOSTICS.get(c, str(c)) for c in t.columns]
        # numbers line up on the right, text on the left
        right = [False] + [_is_number(t[c]) for c in t.columns]
        values = head.to_numpy(dtype=object)
        texts = [[_cell(lbl)] + [_cell(v) for v in row] for lbl, row in zip(head.index, values)]
        # each column as wide as its longest text, within limits
        widths = [min(max([len(h)] + [len(r[j]) for r in texts] + [_MIN_WIDTH]), _MAX_WIDTH)
                  for j, h in enumerate(cols)]
        self.header.value = _line(cols, right, widths) if len(t.columns) else ""
        opts = [(_line(r, right, widths), i) for i, r in enumerate(texts)]
        with self.list.hold_sync():
            self.list.value = ()
            self.list.options = opts
        n = len(t)
        if n == 0:
            self.count.value = ("No selected rows in the current fit." if len(self._wanted)
                                else "Brush a panel to list its rows here.")
        elif n > len(head):
            self.count.value = f"showing {len(head):,} of {n:,} rows"
        else:
            self.count.value = f"{n:,} row{'s' if n != 1 else ''}"

    # -- actions ------------------------------------------------------------------------------
    def targets(self) -> pd.Index:
        """Rows the exclude action applies to: the rows picked in the list, else every selected row."""
        picked = [self.shown[i] for i in self.list.value if 0 <= i < len(self.shown)]
        return pd.Index(picked) if picked else self.rows

    def _update_buttons(self) -> None:
        n = len(self.targets())
        picked = bool(self.list.value)
        self.exclude_button.disabled = n == 0
        self.exclude_button.description = (
            f"Exclude {n:,} picked row{'s' if n != 1 else ''}…" if picked
            else f"Exclude selected ({n:,})…" if n else "Exclude selected…")
        self.confirm.disabled = not (n and self.reason.value.strip())
        self.include_button.disabled = not self.excluded_list.value

    def _ask_reason(self) -> None:
        self.reason_row.layout.display = None
        self._update_buttons()

    def _close_reason(self) -> None:
        self.reason_row.layout.display = "none"
        self.reason.value = ""

    def exclude_selected(self, reason: str) -> None:
        """Exclude the target rows (see ``targets``) with ``reason`` (required)."""
        rows = list(self.targets())
        reason = (reason or "").strip()
        if not rows:
            self.message.value = "Select rows first: brush a panel."
            return
        if not reason:
            self.message.value = "Give a reason: it is kept with the step and in the audit."
            return
        self.message.value = ""
        self._close_reason()
        study = self._study
        self._act(lambda: study.exclude(rows, reason), f"exclude {len(rows):,} row(s)")

    def include_picked(self) -> None:
        """Bring the rows picked in the excluded list back into the fit."""
        items = getattr(self, "_excluded_items", [])
        rows = [items[i][0] for i in self.excluded_list.value if 0 <= i < len(items)]
        if not rows:
            self.message.value = "Pick excluded rows in the list first."
            return
        study = self._study
        self._act(lambda: study.include(rows), f"include {len(rows):,} row(s)")

    def _act(self, fn: Callable, label: str) -> None:
        if self._run is not None:
            self._run(fn, label)
            return
        try:
            fn()
        except Exception as exc:
            self.message.value = f"Could not {label}: {exc}"
            return
        self.refresh()
