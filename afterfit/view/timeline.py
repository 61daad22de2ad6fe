"""Timeline: every step with its reason, undo and redo, and a comparison of two steps (``js/timeline.js``)."""
from __future__ import annotations

from typing import Any

import traitlets

from afterfit.view._static import (
    StudyWidget,
    _BadRequest,
    esm_path,
    plain_number,
    plain_text,
    request_int,
)

__all__ = ["Timeline", "step_records", "comparison_table"]

# readable names for the keys of Study.compare(); unknown keys are shown as they are
_COMPARE_LABELS = {
    "formula_a": "formula (first step)",
    "formula_b": "formula (second step)",
    "delta_aic": "\u0394AIC (second \u2212 first)",
    "delta_bic": "\u0394BIC (second \u2212 first)",
    "delta_cv": "\u0394CV RMSE (second \u2212 first)",
    "nested": "nested models",
    "f": "F (nested test)",
    "df_num": "F numerator df",
    "df_den": "F denominator df",
    "pvalue": "p-value (nested F test)",
}
_COMPARE_SKIP = {"step_a", "step_b", "note"}


def step_records(steps: Any) -> list[dict]:
    """``Study.steps`` as small JSON-ready dicts: index, kind, detail, reason, time, formula, n_rows, tag."""
    records = []
    for position, step in enumerate(steps):
        n_rows = plain_number(getattr(step, "n_rows", None))
        records.append(
            {
                "index": int(getattr(step, "index", position)),
                "kind": plain_text(getattr(step, "kind", "")),
                "detail": plain_text(getattr(step, "detail", "")),
                "reason": plain_text(getattr(step, "reason", "")),
                "time": plain_text(getattr(step, "time", "")),
                "formula": plain_text(getattr(step, "formula", "")),
                "n_rows": None if n_rows is None else int(n_rows),
                "tag": plain_text(getattr(step, "tag", "")),
            }
        )
    return records


def _cell(value: Any) -> str:
    if value is None:
        return "\u2014"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (int, float)) or hasattr(value, "dtype"):
        number = plain_number(value)
        if number is None:
            return "\u2014"
        if float(number).is_integer() and abs(number) < 1e15:
            return str(int(number))
        return format(number, ".6g")
    return plain_text(value) or "\u2014"


def comparison_table(result: Any, i: int, j: int) -> dict:
    """``Study.compare(i, j)`` as text for the page: ``{i, j, columns, rows, note}``.

    A dict becomes two columns (quantity, value); nested dicts are flattened with " · ";
    a DataFrame keeps its columns (the index becomes the first column).  Numbers are formatted
    here (six significant digits), so the page only places text.
    """
    note = ""
    if hasattr(result, "to_dict") and hasattr(result, "columns"):
        frame = result.reset_index()
        columns = [plain_text(c) for c in frame.columns]
        rows = [[_cell(v) for v in record] for record in frame.itertuples(index=False)]
        note = plain_text(getattr(result, "attrs", {}).get("note", ""))
    else:
        items = dict(result)
        note = plain_text(items.get("note", ""))
        rows = []

        def walk(prefix: str, value: Any) -> None:
            if isinstance(value, dict):
                for key, inner in value.items():
                    walk(f"{prefix} \u00b7 {key}" if prefix else str(key), inner)
            else:
                rows.append([_COMPARE_LABELS.get(prefix, prefix), _cell(value)])

        for key, value in items.items():
            if key in _COMPARE_SKIP:
                continue
            if key in {"f", "df_num", "df_den", "pvalue"} and items.get("nested") is False:
                continue  # no F test between non-nested models: leave the empty cells out
            walk(str(key), value)
        columns = ["quantity", "value"]
    return {"i": int(i), "j": int(j), "columns": columns, "rows": rows, "note": note}


class Timeline(StudyWidget):
    """Steps of the Study with kind, detail, reason and time; undo, redo and compare.

    The page sends ``{"kind": "undo"}``, ``{"kind": "redo"}`` and ``{"kind": "compare", "i",
    "j"}``; the comparison comes back in the ``comparison`` trait as text rows.

    Parameters
    ----------
    study : Study
    run : callable, optional
        ``run(fn, label)`` from the Explorer; see :class:`afterfit.view._static.StudyWidget`.
    """

    _esm = esm_path("timeline.js")
    _css = esm_path("style.css")

    steps = traitlets.List(traitlets.Dict(), help="Timeline steps (see step_records).").tag(sync=True)
    position = traitlets.Int(0, help="Index of the current step.").tag(sync=True)
    can_undo = traitlets.Bool(False).tag(sync=True)
    can_redo = traitlets.Bool(False).tag(sync=True)
    comparison = traitlets.Dict(
        help="The last comparison as text (see comparison_table); {} when none is shown."
    ).tag(sync=True)

    _requests = {"undo": "_request_undo", "redo": "_request_redo", "compare": "_request_compare"}

    def _pull(self) -> None:
        study = self._study
        steps = step_records(study.steps)
        if steps != self.steps:
            # an undo followed by a new action replaces later steps: an old comparison may
            # describe steps that no longer exist
            if self.comparison and steps[: len(self.steps)] != self.steps:
                self.comparison = {}
            self.steps = steps
        self.position = int(study.position)
        self.can_undo = bool(study.can_undo)
        self.can_redo = bool(study.can_redo)

    def compare(self, i: int, j: int) -> dict:
        """Compare steps ``i`` and ``j`` and show the result; returns the table shown."""
        table = comparison_table(self._study.compare(i, j), i, j)
        self.comparison = table
        return table

    def _request_undo(self, _content: dict) -> None:
        if not self._study.can_undo:
            self.refresh()
            raise _BadRequest("nothing to undo: this is the first step")
        self._act(self._study.undo, "Undo")

    def _request_redo(self, _content: dict) -> None:
        if not self._study.can_redo:
            self.refresh()
            raise _BadRequest("nothing to redo")
        self._act(self._study.redo, "Redo")

    def _request_compare(self, content: dict) -> None:
        i, j = request_int(content, "i"), request_int(content, "j")
        count = len(self._study.steps)
        if not (0 <= i < count and 0 <= j < count) or i == j:
            raise _BadRequest(f"pick two different steps between 0 and {count - 1} to compare")
        i, j = min(i, j), max(i, j)
        self._act(lambda: self.compare(i, j), f"Compare steps {i} and {j}")
