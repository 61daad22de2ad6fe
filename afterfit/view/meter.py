"""Fit meter: training vs cross-validated RMSE for the current step and every earlier one (``js/meter.js``)."""
from __future__ import annotations

from typing import Any

import traitlets

from afterfit.view._static import StudyWidget, esm_path, plain_number, plain_text, text_list

__all__ = ["Meter", "meter_records"]


def _changed(value: Any) -> int | list[str]:
    """A count of changed terms stays a count; names stay names."""
    number = plain_number(value)
    if number is not None and not isinstance(value, (list, tuple, str)):
        return int(number)
    return text_list(value)


def meter_records(table: Any) -> list[dict]:
    """Rows of ``Study.meter()`` as small JSON-ready dicts (one per step; a few dozen at most).

    A handful of numbers per step cross the wire as JSON; there are no long arrays here.
    """
    records = []
    for row in table.to_dict("records"):
        examined = plain_number(row.get("examined"))
        records.append(
            {
                "step": int(row["step"]),
                "label": plain_text(row.get("label")),
                "kind": plain_text(row.get("kind")),
                "rmse_train": plain_number(row.get("rmse_train")),
                "rmse_cv": plain_number(row.get("rmse_cv")),
                "rmse_cv_se": plain_number(row.get("rmse_cv_se")),
                "gap": plain_number(row.get("gap")),
                "delta_cv": plain_number(row.get("delta_cv")),
                "worse": bool(row.get("worse", False)),
                "one_se": bool(row.get("one_se", False)),
                "terms_added": _changed(row.get("terms_added")),
                "terms_removed": _changed(row.get("terms_removed")),
                "examined": None if examined is None else int(examined),
            }
        )
    return records


class Meter(StudyWidget):
    """Training and cross-validated RMSE now (a dumbbell) and over all steps (two lines).

    Steps where the CV error got worse carry a downward triangle; the step the
    one-standard-error rule picks carries a ring; the count of candidates examined so far is shown
    beside the numbers.  Read-only: the page sends no requests.

    Parameters
    ----------
    study : Study
    run : callable, optional
        Accepted for a uniform signature; the meter runs no actions.
    """

    _esm = esm_path("meter.js")
    _css = esm_path("style.css")

    steps = traitlets.List(traitlets.Dict(), help="One record per step (see meter_records).").tag(
        sync=True
    )
    position = traitlets.Int(0, help="Index of the current step.").tag(sync=True)

    def _pull(self) -> None:
        self.steps = meter_records(self._study.meter())
        self.position = int(self._study.position)
