"""The demo scenarios beyond the tour, each in a small generated notebook in a real JupyterLab.

For every scenario the same stages as the tour's core, on one page and one kernel: run all, brush
the "Residual by fitted value" panel and check that the row inspector lists exactly the rows in the
brushed range, drag a stated or evident candidate onto the model strip and check that the model
terms and the fit meter changed, then "Insert code below", run the new cell and check that its
printed parameters equal the Study's.  Expected values come from the notebook's own kernel (read
through ``KernelProbe``) and, for the export, from statsmodels' fit run by the exported code.
Screenshots: tests/artifacts/<scenario>-NN-<stage>.png.
"""
from __future__ import annotations

import time
from dataclasses import dataclass

import pytest

from harness import (VISIBLE, brush, cell_errors, cells, code_cell, drag_chip, open_notebook,
                     parse_series, reports, rows_in_brush, run_all, saved_sources, settle, shot,
                     strip_terms, until, wait_idle, write_notebook)

WIDGET_CELL = "w = af.explore("
FITTED_TITLE = "Residual by fitted value"


@dataclass(frozen=True)
class Scenario:
    """A demo scenario: the name used for files, the data line and the explore() line."""

    name: str
    data: str
    explore: str


SCENARIOS = [
    Scenario("orchard", "df = af.demo.orchard()",
             'w = af.explore(df, "yield_kg ~ irrigation_mm + tree_age + C(cultivar)",'
             ' groups=["cultivar"])\nw'),
    Scenario("sensors", "df = af.demo.sensors(10_000)",
             'w = af.explore(df, df.attrs["first_formula"])\nw'),
]


def _js_fmt(x: float) -> str:
    """Python's spelling of the meter's ``String(Number(x.toPrecision(4)))`` (js/meter.js)."""
    v = float(f"{x:.4g}")
    return str(int(v)) if v.is_integer() else repr(v)


def _dumbbell(wb) -> str:
    """The fit meter's summary of the current step (the dumbbell's accessible label)."""
    return wb.locator(".afterfit-meter .afterfit-dumbbell").first.get_attribute("aria-label") or ""


# ---------------------------------------------------------------------------------------------
# stages
# ---------------------------------------------------------------------------------------------
def _stage_run_all(page, probe, wb, name):
    assert cell_errors(page) == []
    until(lambda: wb.locator(".bqplot.figure").count() > 0, what="the residual grid")
    until(lambda: wb.locator(".afterfit-tray .afterfit-chip").count() > 0, what="the tray")
    settle(probe)
    n_rows, rmse = probe.json("[len(w.study.rows), w.study.fit.rmse]")
    until(lambda: f"{n_rows:,} rows used" in wb.locator(".afterfit-header").first.inner_text(),
          timeout=20, what="the header's row count")
    assert f"RMSE {rmse:.4g}" in wb.locator(".afterfit-header").first.inner_text()
    wb.locator(".afterfit-grid .afterfit-panel").first.scroll_into_view_if_needed()
    shot(page, f"{name}-01-run-all")


def _stage_brush(page, probe, wb, name):
    order = probe.json("w.grid.order")
    assert "fitted" in order, f"no fitted-value panel on the grid: {order}"
    panel = wb.locator(".afterfit-grid .afterfit-panel").nth(order.index("fitted"))
    assert FITTED_TITLE in (panel.text_content() or ""), "the panel is not the one expected"
    figure = panel.locator(".bqplot.figure").first
    # a band across the middle: x from 45 % to 70 % of the plot, all but extreme residuals
    brush(page, figure)
    until(lambda: probe.json("len(w.inspector.rows)") > 0, what="the inspector to list rows")
    settle(probe)
    expected = rows_in_brush(probe, "fitted")
    listed = probe.json("sorted(int(i) for i in w.inspector.rows)")
    assert listed == expected, (len(listed), len(expected))
    assert probe.json("sorted(int(i) for i in w.grid.selection)") == expected
    n = len(expected)
    count = wb.locator(".afterfit-inspector-count").first
    until(lambda: f"{n:,} row" in count.inner_text(), timeout=20,
          what=f"the inspector to say {n} rows")
    # the page's list: its first column is each row's label (at most `cap` rows are listed)
    cap = probe.json("w.inspector.cap")
    options = wb.locator(".afterfit-inspector select[multiple]").first.locator("option")
    until(lambda: options.count() == min(n, cap), timeout=20, what="the inspector's list")
    shown = [int(t.split()[0]) for t in options.all_inner_texts()]
    assert len(set(shown)) == len(shown) == min(n, cap)
    assert set(shown) <= set(expected)
    if n <= cap:
        assert sorted(shown) == expected
    figure.scroll_into_view_if_needed()
    shot(page, f"{name}-02-brush")
    wb.locator(".afterfit-inspector").first.scroll_into_view_if_needed()
    shot(page, f"{name}-03-inspector")
    return n


def _stage_drag(page, probe, wb, name):
    terms_before = probe.json("w.study.terms")
    steps_before = probe.json("len(w.study.steps)")
    meter_before = _dumbbell(wb)
    grid_before = wb.locator(".afterfit-grid").first.inner_text()
    term = drag_chip(wb, ".afterfit-chip[data-tag=stated], .afterfit-chip[data-tag=evident]")
    # a chip may stand for several model terms
    parts = probe.json(f"list(__import__('afterfit').model.terms.normalise_term({term!r}))")
    until(lambda: probe.json("w.study.terms") == terms_before + parts, what=f"{term} in the model")
    settle(probe)
    until(lambda: strip_terms(wb) == terms_before + parts, timeout=20, what="the model strip")
    kind, tag = probe.json("[w.study.steps[-1].kind, w.study.steps[-1].tag]")
    assert kind == "add" and tag in ("stated", "evident")
    assert probe.json("len(w.study.steps)") == steps_before + 1
    # the meter now shows the new step's cross-validated RMSE, as the Study computes it
    rmse_cv = probe.json("float(w.study.meter()['rmse_cv'].iloc[-1])")
    want = f"cross-validated RMSE {_js_fmt(rmse_cv)}"
    until(lambda: want in _dumbbell(wb), timeout=20, what=f"the meter to read {want!r}")
    assert _dumbbell(wb) != meter_before
    until(lambda: wb.locator(".afterfit-grid").first.inner_text() != grid_before, timeout=20,
          what="the residual grid to change")
    wb.locator(".afterfit-strip").first.scroll_into_view_if_needed()
    shot(page, f"{name}-04-drag-refit")
    return term


def _stage_export(page, probe, lab, notebook, name):
    wb = code_cell(page, WIDGET_CELL).locator(".jp-OutputArea-output").first
    button = wb.locator(".afterfit-export [data-action=insert]")
    if not button.count():
        pytest.fail("the workbench has no 'Insert code below' button")
    all_cells = cells(page)
    n_before = all_cells.count()
    index = [i for i in range(n_before)
             if WIDGET_CELL in all_cells.nth(i).locator(".jp-InputArea-editor").inner_text()][0]
    button.scroll_into_view_if_needed()
    button.click()
    until(lambda: all_cells.count() == n_before + 1, timeout=30, what="a new cell")
    new = all_cells.nth(index + 1)
    # the editor draws only the lines in view: read the new cell's source from the saved file
    page.locator(f"{VISIBLE} .jp-Notebook").first.click(position={"x": 5, "y": 5})
    page.keyboard.press("Control+s")
    saved = until(lambda: saved_sources(lab.root / notebook, n_before + 1), timeout=30,
                  what="the notebook to be saved with the new cell")
    source = saved[index + 1]
    assert "smf.ols(" in source and "print(result.params)" in source
    assert source == probe.json("w.study.to_code()")
    new.scroll_into_view_if_needed()
    shot(page, f"{name}-05-export-cell")
    new.locator(".jp-InputArea-editor").click()
    page.keyboard.press("Escape")  # command mode, the new cell selected
    page.keyboard.press("Control+Enter")  # run in place (no extra empty cell below)
    wait_idle(page)
    until(lambda: "dtype" in new.locator(".jp-OutputArea").inner_text(), timeout=60,
          what="the exported cell's output")
    printed = parse_series(new.locator(".jp-OutputArea").inner_text())
    study = probe.json("{str(k): float(v) for k, v in w.study.fit.params.items()}")
    assert set(printed) == set(study)
    for key, value in study.items():
        # pandas prints 6 significant decimals: compare to that precision
        assert abs(printed[key] - value) <= 1e-6 * max(1.0, abs(value)) + 1e-6, key
    # six decimals say little about tiny slopes (sensors: voltage, light_level); the cell left
    # statsmodels' `result` in the same kernel, so compare at full precision there too
    gap = probe.json("float((result.params[w.study.fit.params.index] - w.study.fit.params).abs()"
                     ".div(w.study.fit.params.abs().clip(lower=1.0)).max())")
    assert gap <= 1e-8, gap
    new.locator(".jp-OutputArea").scroll_into_view_if_needed()
    shot(page, f"{name}-06-export-run")
    return len(study)


# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("scenario", SCENARIOS, ids=[s.name for s in SCENARIOS])
def test_scenario_stages(page, lab, request, scenario):
    notebook = write_notebook(lab, f"scenario_{scenario.name}.ipynb",
                              f"import afterfit as af\n\n{scenario.data}", scenario.explore)
    marks = {}
    t0 = time.monotonic()
    open_notebook(page, lab, notebook)
    run_all(page, timeout=120_000)
    probe = lab.probe(notebook)
    try:
        wb = code_cell(page, WIDGET_CELL).locator(".jp-OutputArea-output").first
        _stage_run_all(page, probe, wb, scenario.name)
        marks["run all"] = time.monotonic() - t0
        t = time.monotonic()
        n = _stage_brush(page, probe, wb, scenario.name)
        marks[f"brush ({n:,} rows)"] = time.monotonic() - t
        t = time.monotonic()
        term = _stage_drag(page, probe, wb, scenario.name)
        marks[f"drag {term}"] = time.monotonic() - t
        t = time.monotonic()
        k = _stage_export(page, probe, lab, notebook, scenario.name)
        marks[f"export ({k} parameters)"] = time.monotonic() - t
    finally:
        probe.close()
    assert page.page_errors == []
    total = time.monotonic() - t0
    reports(request).append(f"scenario {scenario.name}: {total:.1f} s in all; " + ", ".join(
        f"{k} {v:.1f} s" for k, v in marks.items()))
