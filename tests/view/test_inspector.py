"""Row inspector on a recording comm: brushed rows, sorting, the cap, exclude/include with reasons,
and data text that never reaches HTML.

The expected rows come from pandas filtering on the Study's own data and residuals; the frames are
the invented, seeded ones of the shared ``view_study`` fixture.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from afterfit.model.study import Study
from afterfit.view.grid import ResidualGrid
from afterfit.view.inspector import RowInspector, model_variables, row_table

HOSTILE = "<img src=x onerror=alert(1)>"


def _brush(wire, view, x, y):
    wire.from_page(view.brush, state={"brushing": True})
    wire.from_page(view.brush, state={"selected_x": list(map(float, x)),
                                      "selected_y": list(map(float, y)), "brushing": False})


def _linked(study):
    grid = ResidualGrid(study, max_panels=50)
    inspector = RowInspector(study)
    grid.on_select(inspector.show_rows)
    return grid, inspector


def test_lists_exactly_the_rows_in_the_brushed_range(wire, view_study):
    grid, inspector = _linked(view_study)
    _brush(wire, grid.panels["var:x"], (-1.0, 0.5), (-0.5, 3.0))
    data = view_study.data.loc[view_study.rows]
    resid = view_study.fit.resid
    expected = data.index[data["x"].between(-1.0, 0.5) & resid.between(-0.5, 3.0)]
    assert len(expected) > 0
    assert inspector.rows.equals(expected)
    # values shown are the data's own, plus the Study's residual, leverage and Cook's D
    t = inspector.table
    assert list(t.columns) == ["y", "x", "residual", "leverage", "cooks_d"]
    pd.testing.assert_series_equal(t["x"], data.loc[expected, "x"])
    np.testing.assert_allclose(t["residual"], resid.loc[expected])
    np.testing.assert_allclose(t["leverage"], view_study.influence.loc[expected, "leverage"])
    np.testing.assert_allclose(t["cooks_d"], view_study.influence.loc[expected, "cooks_d"])
    # one option per row, sent to the page as text
    opts = wire.state(inspector.list)["_options_labels"]
    assert len(opts) == len(expected)
    assert opts[0].split("\u00a0")[0] == str(expected[0])
    n = len(expected)
    assert inspector.count.value == f"{n:,} row{'s' if n != 1 else ''}"


def test_sorting_by_any_column(wire, view_study):
    grid, inspector = _linked(view_study)
    grid.select(view_study.rows)
    table = row_table(view_study, view_study.rows)
    for column in ("cooks_d", "residual", "x"):
        inspector.sort_by.value = column
        inspector.descending.value = True
        expected = table[column].sort_values(ascending=False, kind="stable").index
        assert inspector.shown.equals(expected)
        inspector.descending.value = False
        assert inspector.shown.equals(table[column].sort_values(kind="stable").index)
    wire.from_page(inspector.sort_by, state={"index": 0})  # back to row order, from the page
    assert inspector.shown.equals(view_study.rows)


def test_the_list_is_capped_with_a_count(wire, view_study):
    grid = ResidualGrid(view_study, max_panels=50)
    inspector = RowInspector(view_study, cap=25)
    grid.on_select(inspector.show_rows)
    grid.select(view_study.rows)
    n = len(view_study.rows)
    assert len(inspector.list.options) == 25
    assert inspector.count.value == f"showing 25 of {n:,} rows"
    assert len(inspector.targets()) == n  # the action applies to every selected row


def test_exclude_needs_a_reason_then_refits(wire, view_study):
    grid, inspector = _linked(view_study)
    _brush(wire, grid.panels["fitted"], (-100, 100), (1.5, 100))
    chosen = inspector.rows
    assert len(chosen) > 0
    before = view_study.fit.params.copy()
    inspector.exclude_button.click()
    assert inspector.reason_row.layout.display is None
    assert inspector.confirm.disabled  # no reason yet
    inspector.exclude_selected("   ")
    assert view_study.excluded == {} and "reason" in inspector.message.value
    wire.from_page(inspector.reason, state={"value": "meter read twice (log 14)"})
    assert not inspector.confirm.disabled
    inspector.confirm.click()
    assert view_study.excluded == {r: "meter read twice (log 14)" for r in chosen}
    assert not view_study.fit.params.equals(before)
    grid.refresh()
    inspector.refresh()
    # the panels no longer draw the excluded rows; the inspector lists them with the reason
    assert len(grid.panels["fitted"].drawn) == len(view_study.rows) == 120 - len(chosen)
    assert len(inspector.rows) == 0
    labels = [o[0] for o in inspector.excluded_list.options]
    assert labels == [f"{r} — meter read twice (log 14)" for r in chosen]


def test_exclude_only_the_picked_rows_then_include_back(wire, view_study):
    grid, inspector = _linked(view_study)
    grid.select(view_study.rows[:10])
    inspector.sort_by.value = "cooks_d"
    inspector.descending.value = True
    wire.from_page(inspector.list, state={"index": [0, 1]})
    picked = inspector.shown[:2]
    assert inspector.targets().equals(picked)
    assert inspector.exclude_button.description == "Exclude 2 picked rows…"
    inspector.exclude_selected("transcription error")
    assert set(view_study.excluded) == set(picked)
    inspector.refresh()
    wire.from_page(inspector.excluded_list, state={"index": [0]})
    assert not inspector.include_button.disabled
    inspector.include_button.click()
    assert len(view_study.excluded) == 1


def test_errors_become_messages(wire, view_study):
    inspector = RowInspector(view_study)
    inspector.show_rows(view_study.rows[:2])
    inspector.exclude_selected("first")
    inspector.show_rows(view_study.excluded)  # no longer in the fit: nothing to list
    assert len(inspector.rows) == 0
    inspector.exclude_selected("again")
    assert inspector.message.value == "Select rows first: brush a panel."


def test_hostile_names_are_only_ever_text(wire, view_study):
    df = view_study.data.copy()
    df["g"] = df["g"].replace("north", HOSTILE)
    study = Study(df, f'y ~ x + Q("{HOSTILE}") + C(g)')
    assert model_variables(study) == ["y", "x", HOSTILE, "g"]
    grid, inspector = _linked(study)
    grid.select(study.rows)
    # the name reaches the page only in plain-text places (labels, option text)
    shown = HOSTILE[:23]  # columns are at most 24 characters wide, then cut with "…"
    assert shown in inspector.header.value.replace("\u00a0", " ")
    assert any(shown in o[0].replace("\u00a0", " ") for o in inspector.list.options)
    assert inspector.sort_by.options[3] == (HOSTILE, HOSTILE)
    from ipywidgets import HTML, HTMLMath

    html_widgets = [w for w in _walk(inspector) if isinstance(w, (HTML, HTMLMath))]
    assert html_widgets, "the inspector's stylesheet is an HTML widget"
    for w in html_widgets:
        assert "<img" not in w.value and "onerror" not in w.value
    for w in _walk(inspector):
        if hasattr(w, "description_allow_html"):
            assert not w.description_allow_html


def _walk(widget):
    """The widget and every widget below it (children)."""
    out = [widget]
    for child in getattr(widget, "children", ()):
        out.extend(_walk(child))
    return out
