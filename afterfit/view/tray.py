"""Term tray: candidate terms as chips, and the model strip they are dragged into (``js/tray.js``)."""
from __future__ import annotations

from typing import Any

import traitlets

from afterfit.view._static import (
    StudyWidget,
    _BadRequest,
    esm_path,
    plain_number,
    plain_text,
    request_text,
    text_list,
)

__all__ = ["Tray", "candidate_records"]


def candidate_records(table: Any) -> list[dict]:
    """Rows of ``Study.candidates()`` as small JSON-ready dicts, in the table's order.

    Numbers that are missing or not finite become ``None`` (JSON has no NaN); text fields are
    plain strings; ``sources`` is a list of column names.
    """
    records = []
    for row in table.to_dict("records"):
        records.append(
            {
                "term": plain_text(row.get("term")),
                "label": plain_text(row.get("label")) or plain_text(row.get("term")),
                "kind": plain_text(row.get("kind")),
                "tag": plain_text(row.get("tag")),
                "sources": text_list(row.get("sources")),
                "statistic": plain_number(row.get("statistic")),
                "pvalue": plain_number(row.get("pvalue")),
                "p_adjusted": plain_number(row.get("p_adjusted")),
                "delta_cv": plain_number(row.get("delta_cv")),
                "grounds": plain_text(row.get("grounds")),
                "note": plain_text(row.get("note")),
            }
        )
    return records


class Tray(StudyWidget):
    """Candidate terms (chips with tag and evidence) and the model strip with the current terms.

    Dragging a chip onto the strip, pressing Enter on it or its Add button asks to add the term;
    a speculative term first asks for a one-line reason.  Dragging a model term back to the tray
    (or Enter / Remove) asks to remove it.  The page sends ``{"kind": "add", "term", "reason"}``
    and ``{"kind": "remove", "term"}``; this class calls ``study.add`` / ``study.remove``.

    Parameters
    ----------
    study : Study
    run : callable, optional
        ``run(fn, label)`` from the Explorer; see :class:`afterfit.view._static.StudyWidget`.
    """

    _esm = esm_path("tray.js")
    _css = esm_path("style.css")

    candidates = traitlets.List(
        traitlets.Dict(), help="Candidate terms in the Study's order (see candidate_records)."
    ).tag(sync=True)
    terms = traitlets.List(traitlets.Unicode(), help="Terms of the current model.").tag(sync=True)
    formula = traitlets.Unicode("", help="Formula of the current model.").tag(sync=True)

    _requests = {"add": "_request_add", "remove": "_request_remove"}

    def _pull(self) -> None:
        self.refresh_terms()
        self.candidates = candidate_records(self._study.candidates())

    def refresh_terms(self) -> None:
        """Update only the model strip (cheap); the candidates follow with ``refresh()``."""
        study = self._study
        with self.hold_sync():
            self.terms = [str(t) for t in study.terms]
            self.formula = str(study.formula)

    def _request_add(self, content: dict) -> None:
        term = request_text(content, "term")
        reason = request_text(content, "reason", required=False)
        known = {c["term"]: c for c in self.candidates}
        if term not in known:
            self.refresh()
            raise _BadRequest(f"{term!r} is not among the current candidates; the tray was stale")
        label = known[term]["label"] or term
        reason = reason.strip() if reason else None
        self._act(lambda: self._study.add(term, reason=reason or None), f"Add {label}")

    def _request_remove(self, content: dict) -> None:
        term = request_text(content, "term")
        if term not in self.terms:
            self.refresh()
            raise _BadRequest(f"{term!r} is not in the model; the tray was stale")
        self._act(lambda: self._study.remove(term), f"Remove {term}")
