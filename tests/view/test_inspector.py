"""Row inspector on a recording comm: brushed rows, sorting, the cap, exclude/include with reasons,
and data text that never reaches HTML.

The expected rows come from pandas filtering on the Study's own data and residuals; the data are
the invented, seeded orchard scenario of ``afterfit.demo``.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from afterfit.model.study import Study
from afterfit.view.grid import ResidualGrid
from afterfit.view.inspector import RowInspector, model_variables, row_table

HOSTILE = "<img src=x onerror=alert(1)>"


@pytest.fixture
def study():
    """The invented orchard scenario (240 trees), its first model, the block as a group."""
    from afterfit import demo

    df = demo.orchard(seed=0)
    return Study(df, df.attrs["first_formula"], groups=["block"])


def _brush(wire, view, x, y):
    wire.from_page(view.brush, state={"brushing": True})
    wire.from_page(view.brush, state={"selected_x": list(map(float, x)),
                                      "selected_y": list(map(float, y)), "brushing": False})


def _linked(study):
    grid = ResidualGrid(study, max_panels=50)
    inspector = RowInspector(study)
    grid.on_select(inspector.show_rows)
    return grid, inspector


def test_lists_exactly_the_rows_in_the_brushed_range(wire, study):
    grid, inspector = _linked(study)
    _brush(wire, grid.panels["var:irrigation_mm"], (400.0, 600.0), (-0.5, 3.0))
    data = study.data.loc[study.rows]
    resid = study.fit.resid
    expected = data.index[data["irrigation_mm"].between(400, 600) & resid.between(-0.5, 3.0)]
    assert len(expected) > 0
    assert inspector.rows.equals(expected)
    # values shown are the data's own, plus the Study's residual, leverage and Cook's D
    t = inspector.table
    assert list(t.columns) == ["yield_kg", "irrigation_mm", "tree_age", "cultivar", "residual",
                               "leverage", "cooks_d"]
    pd.testing.assert_frame_equal(t.iloc[:, :4], data.loc[expected, t.columns[:4]])
    np.testing.assert_allclose(t["residual"], resid.loc[expected])
    np.testing.assert_allclose(t["leverage"], study.influence.loc[expected, "leverage"])
    np.testing.assert_allclose(t["cooks_d"], study.influence.loc[expected, "cooks_d"])
    # one option per row, sent to the page as text
    opts = wire.state(inspector.list)["_options_labels"]
    assert len(opts) == len(expected)
    assert opts[0].split("\u00a0")[0] == str(expected[0])
    n = len(expected)
    assert inspector.count.value == f"{n:,} row{'s' if n != 1 else ''}"


def test_sorting_by_any_column(wire, study):
    grid, inspector = _linked(study)
    grid.select(study.rows)
    table = row_table(study, study.rows)
    for column in ("cooks_d", "residual", "irrigation_mm", "cultivar"):
        inspector.sort_by.value = column
        inspector.descending.value = True
        expected = table[column].sort_values(ascending=False, kind="stable").index
        assert inspector.shown.equals(expected[:200])  # the first 200 of all 240, sorted
        inspector.descending.value = False
        assert inspector.shown.equals(table[column].sort_values(kind="stable").index[:200])
    wire.from_page(inspector.sort_by, state={"index": 0})  # back to row order, from the page
    assert inspector.shown.equals(study.rows[:200])


def test_the_list_is_capped_with_a_count(wire, study):
    grid = ResidualGrid(study, max_panels=50)
    inspector = RowInspector(study, cap=25)
    grid.on_select(inspector.show_rows)
    grid.select(study.rows)
    n = len(study.rows)
    assert len(inspector.list.options) == 25
    assert inspector.count.value == f"showing 25 of {n:,} rows"
    assert len(inspector.targets()) == n  # the action applies to every selected row


def test_exclude_needs_a_reason_then_refits(wire, study):
    grid, inspector = _linked(study)
    _brush(wire, grid.panels["fitted"], (-1e3, 1e3), (5.0, 100))
    chosen = inspector.rows
    assert len(chosen) > 0
    before = study.fit.params.copy()
    inspector.exclude_button.click()
    assert inspector.reason_row.layout.display is None
    assert inspector.confirm.disabled  # no reason yet
    inspector.exclude_selected("   ")
    assert study.excluded == {} and "reason" in inspector.message.value
    wire.from_page(inspector.reason, state={"value": "meter read twice (log 14)"})
    assert not inspector.confirm.disabled
    inspector.confirm.click()
    assert study.excluded == {r: "meter read twice (log 14)" for r in chosen}
    assert not study.fit.params.equals(before)
    grid.refresh()
    inspector.refresh()
    # the panels no longer draw the excluded rows; the inspector lists them with the reason
    assert len(grid.panels["fitted"].drawn) == len(study.rows) == 240 - len(chosen)
    assert len(inspector.rows) == 0
    labels = [o[0] for o in inspector.excluded_list.options]
    assert labels == [f"{r} — meter read twice (log 14)" for r in chosen]


def test_exclude_only_the_picked_rows_then_include_back(wire, study):
    grid, inspector = _linked(study)
    grid.select(study.rows[:10])
    inspector.sort_by.value = "cooks_d"
    inspector.descending.value = True
    wire.from_page(inspector.list, state={"index": [0, 1]})
    picked = inspector.shown[:2]
    assert inspector.targets().equals(picked)
    assert inspector.exclude_button.description == "Exclude 2 picked rows…"
    inspector.exclude_selected("transcription error")
    assert set(study.excluded) == set(picked)
    inspector.refresh()
    wire.from_page(inspector.excluded_list, state={"index": [0]})
    assert not inspector.include_button.disabled
    inspector.include_button.click()
    assert len(study.excluded) == 1


def test_errors_become_messages(wire, study):
    inspector = RowInspector(study)
    inspector.show_rows(study.rows[:2])
    inspector.exclude_selected("first")
    inspector.show_rows(study.excluded)  # no longer in the fit: nothing to list
    assert len(inspector.rows) == 0
    inspector.exclude_selected("again")
    assert inspector.message.value == "Select rows first: brush a panel."


def test_hostile_names_are_only_ever_text(wire, study):
    df = study.data.rename(columns={"soil_n": HOSTILE})
    df["cultivar"] = df["cultivar"].replace("Orvelle", HOSTILE)
    study = Study(df, f'yield_kg ~ irrigation_mm + Q("{HOSTILE}") + C(cultivar)')
    assert model_variables(study) == ["yield_kg", "irrigation_mm", HOSTILE, "cultivar"]
    grid, inspector = _linked(study)
    grid.select(study.rows)
    # the name reaches the page only in plain-text places (labels, option text)
    shown = HOSTILE[:23]  # columns are at most 24 characters wide, then cut with "…"
    assert shown in inspector.header.value.replace("\u00a0", " ")
    assert any(shown in o[0].replace("\u00a0", " ") for o in inspector.list.options)
    assert inspector.sort_by.options[3] == (HOSTILE, HOSTILE)
    assert any(HOSTILE in o[0] for o in inspector.sort_by.options) and any(
        HOSTILE[:20] in o[0].replace("\u00a0", " ") for o in inspector.list.options
        if "irrigation" not in o[0])
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


def test_empty_selection_has_the_same_columns_as_a_selection(study):
    # nothing selected takes a shortcut (no pass over the rows); its table must look the same
    empty = row_table(study, [])
    some = row_table(study, study.rows[:3])
    assert list(empty.columns) == list(some.columns) and len(empty) == 0
    assert len(some) == 3
    np.testing.assert_allclose(some["residual"], study.fit.resid.iloc[:3])
