"""The tour notebook in a real JupyterLab, driven like an analyst would, checked against its kernel.

The stages share one page and one kernel, in order: run all cells, brush a panel, exclude the
brushed rows, drag a stated and a speculative candidate onto the model strip, undo and redo,
export code into a new cell and run it.  Each stage saves a screenshot in tests/artifacts/.
What the page shows is compared with the Study in the same kernel (read through ``KernelProbe``),
and the exported code's printed parameters with statsmodels' own fit run by that code.
"""
from __future__ import annotations

import re

import pytest

from harness import (VISIBLE, cell_errors, open_notebook, parse_series, run_all, saved_sources,
                     settle, shot, until, wait_idle)

NOTEBOOK = "tour.ipynb"
WIDGET_CELL = "w = af.explore("


# ---------------------------------------------------------------------------------------------
# shared page and kernel for the ordered stages
# ---------------------------------------------------------------------------------------------
class Tour:
    def __init__(self, page, lab, probe):
        self.page = page
        self.lab = lab
        self.probe = probe
        self.state: dict = {}

    @property
    def cell(self):
        """The code cell that displays the main workbench ``w``."""
        editor = self.page.locator(".jp-InputArea-editor", has_text=WIDGET_CELL)
        return self.page.locator(f"{VISIBLE} .jp-CodeCell", has=editor).first

    @property
    def wb(self):
        """The workbench's output area."""
        return self.cell.locator(".jp-OutputArea-output").first

    def k(self, expr: str):
        """Evaluate ``expr`` in the notebook's kernel (JSON round trip)."""
        return self.probe.json(expr)

    def settle(self) -> None:
        """Wait until the Explorer has no queued action and its refreshes have stopped."""
        settle(self.probe)

    def header_text(self) -> str:
        return self.wb.locator(".afterfit-header").first.inner_text()


@pytest.fixture(scope="module")
def tour(browser_context, lab):
    lab.delete_sessions()
    page = browser_context.new_page()
    errors: list[str] = []
    page.on("pageerror", lambda e: errors.append(str(e)))
    open_notebook(page, lab, NOTEBOOK)
    probe = None
    try:
        run_all(page, timeout=240_000)
        probe = lab.probe(NOTEBOOK)
        t = Tour(page, lab, probe)
        t.page_errors = errors
        yield t
    finally:
        if probe is not None:
            probe.close()
        page.close()
        lab.delete_sessions()


# ---------------------------------------------------------------------------------------------
# stages
# ---------------------------------------------------------------------------------------------
def test_01_run_all(tour):
    page = tour.page
    assert cell_errors(page) == []
    tour.wb.scroll_into_view_if_needed()
    until(lambda: tour.wb.locator(".bqplot.figure").count() > 0, what="the residual grid")
    until(lambda: tour.wb.locator(".afterfit-tray .afterfit-chip").count() > 0, what="the tray")
    shot(page, "tour-01-run-all")
    # the header shows the Study's own numbers
    n_rows, rmse = tour.k("[len(w.study.rows), w.study.fit.rmse]")
    header = tour.header_text()
    assert f"{n_rows:,} rows used" in header
    assert f"RMSE {rmse:.4g}" in header


def _panel_for_brush(tour) -> tuple[str, int]:
    """A scatter panel whose x is the fitted value or a numeric column, and its place on screen."""
    order, kinds = tour.k("[w.grid.order, [w.grid.panels[k].kind for k in w.grid.order]]")
    numeric = set(tour.k("[c for c in w.study.data.columns if str(w.study.data[c].dtype)"
                         " in ('int64', 'float64')]"))
    for key in ["fitted"] + [k for k in order if k.startswith("var:")]:
        if key in order and kinds[order.index(key)] == "scatter" and (
                key == "fitted" or key[4:] in numeric):
            return key, order.index(key)
    raise AssertionError(f"no brushable fitted/numeric panel among {order}")


def _expected_rows(tour, key: str) -> list:
    """Rows in the brushed range, from the Study's fit and data (not from the grid's arrays)."""
    code = f"""
_p = w.grid.panels[{key!r}]
_x0, _x1 = sorted(float(v) for v in _p.brush.selected_x)
_y0, _y1 = sorted(float(v) for v in _p.brush.selected_y)
_f = w.study.fit
_x = _f.fitted if {key!r} == "fitted" else w.study.data.loc[_f.resid.index, {key[4:]!r}]
_m = (_x >= _x0) & (_x <= _x1) & (_f.resid >= _y0) & (_f.resid <= _y1)
"""
    tour.probe.run(code)
    return tour.k("sorted(int(i) for i in _f.resid.index[_m.to_numpy()])")


def _inspector_count_text(tour) -> str:
    return tour.wb.locator(".afterfit-inspector-count").first.inner_text()


def test_02_brush_lists_exactly_the_rows_in_range(tour):
    key, idx = _panel_for_brush(tour)
    tour.state["brush_key"] = key
    fig = tour.wb.locator(".afterfit-grid .afterfit-panel").nth(idx).locator(".bqplot.figure")
    fig.scroll_into_view_if_needed()
    overlay = fig.locator("rect.overlay").first
    box = overlay.bounding_box()
    assert box, "the panel has no brush overlay"
    page = tour.page
    # a band across the middle of the panel: wide in x, all but the extreme residuals in y
    x0, x1 = box["x"] + 0.45 * box["width"], box["x"] + 0.70 * box["width"]
    y0, y1 = box["y"] + 0.20 * box["height"], box["y"] + 0.80 * box["height"]
    page.mouse.move(x0, y0)
    page.mouse.down()
    page.mouse.move(x1, y1, steps=12)
    page.mouse.up()
    until(lambda: tour.k("len(w.inspector.rows)") > 0, what="the inspector to list rows")
    tour.settle()
    expected = _expected_rows(tour, key)
    listed = tour.k("sorted(int(i) for i in w.inspector.rows)")
    selected = tour.k("sorted(int(i) for i in w.grid.selection)")
    assert listed == expected, (key, len(listed), len(expected))
    assert selected == expected
    n = len(expected)
    until(lambda: f"{n:,} row" in _inspector_count_text(tour), timeout=20,
          what=f"the inspector to say {n} rows")
    tour.state["brushed"] = expected
    fig.scroll_into_view_if_needed()
    shot(page, "tour-02-brush")
    tour.wb.locator(".afterfit-inspector").first.scroll_into_view_if_needed()
    shot(page, "tour-02b-inspector")


_ROWS_USED = re.compile(r"([\d,]+) rows used")
_RMSE = re.compile(r"RMSE ([-\d.e+]+)")


def test_03_exclude_brushed_rows_changes_the_fit(tour):
    rows = tour.state.get("brushed")
    if not rows:
        pytest.fail("needs the rows brushed in test_02")
    before = tour.header_text()
    n_before = int(_ROWS_USED.search(before).group(1).replace(",", ""))
    rmse_before = _RMSE.search(before).group(1)
    wb = tour.wb
    n_excluded = tour.k("len(w.study.excluded)")
    wb.locator(".afterfit-exclude").first.click()
    reason = "e2e: brushed band excluded to check the refit"
    wb.locator(".afterfit-exclude-reason input").first.fill(reason)
    wb.locator(".afterfit-exclude-confirm").first.click()
    until(lambda: tour.k("len(w.study.excluded)") == n_excluded + len(rows),
          what="the exclusion")
    tour.settle()
    excluded = tour.k("{int(k): v for k, v in w.study.excluded.items()}")
    assert all(excluded[str(r)] == reason for r in rows)
    n_used, rmse = tour.k("[len(w.study.rows), w.study.fit.rmse]")
    assert n_used == n_before - len(rows)
    until(lambda: f"{n_used:,} rows used" in tour.header_text(), timeout=20,
          what="the header's row count")
    after = tour.header_text()
    assert _RMSE.search(after).group(1) == f"{rmse:.4g}" != rmse_before
    wb.locator(".afterfit-header").first.scroll_into_view_if_needed()
    shot(tour.page, "tour-03-excluded")


def _strip_terms(tour) -> list[str]:
    return [t.get_attribute("data-term") for t in
            tour.wb.locator(".afterfit-strip .afterfit-term").all()]


def _drag_chip(tour, tag: str) -> str:
    chip = tour.wb.locator(f".afterfit-chip[data-tag={tag}]").first
    if not chip.count():
        pytest.fail(f"no {tag} candidate in the tray")
    term = chip.get_attribute("data-term")
    chip.scroll_into_view_if_needed()
    chip.drag_to(tour.wb.locator(".afterfit-strip").first)
    return term


def test_04_drag_stated_chip_refits_grid_and_meter(tour):
    wb = tour.wb
    grid_before = wb.locator(".afterfit-grid").first.inner_text()
    meter_before = wb.locator(".afterfit-meter").first.inner_text()
    terms_before = tour.k("w.study.terms")
    term = _drag_chip(tour, "stated")
    # a chip may stand for several model terms (a cycle is a sine and a cosine)
    parts = tour.k(f"list(__import__('afterfit').model.terms.normalise_term({term!r}))")
    until(lambda: tour.k("w.study.terms") == terms_before + parts, what=f"{term} in the model")
    tour.settle()
    until(lambda: _strip_terms(tour) == terms_before + parts, timeout=20, what="the model strip")
    until(lambda: wb.locator(".afterfit-meter").first.inner_text() != meter_before, timeout=20,
          what="the fit meter to change")
    until(lambda: wb.locator(".afterfit-grid").first.inner_text() != grid_before, timeout=20,
          what="the residual grid to change")
    step = tour.k("[w.study.steps[-1].kind, w.study.steps[-1].tag]")
    assert step == ["add", "stated"]
    wb.locator(".afterfit-tray").first.scroll_into_view_if_needed()
    shot(tour.page, "tour-04-stated-added")
    tour.state["terms_before_speculative"] = tour.k("w.study.terms")


def test_05_speculative_chip_asks_for_a_reason(tour):
    wb = tour.wb
    before = tour.k("w.study.terms")
    term = _drag_chip(tour, "speculative")
    prompt = wb.locator(".afterfit-reason").first
    until(lambda: prompt.is_visible(), timeout=20, what="the reason prompt")
    shot(tour.page, "tour-05-reason-prompt")
    assert tour.k("w.study.terms") == before  # nothing is added before a reason is given
    reason = "e2e: checking that a speculative term records its reason"
    wb.locator("[data-action=reason-input]").first.fill(reason)
    wb.locator("[data-action=reason-ok]").first.click()
    until(lambda: len(tour.k("w.study.terms")) > len(before), what=f"{term} in the model")
    tour.settle()
    last = tour.k("[w.study.steps[-1].tag, w.study.steps[-1].reason]")
    assert last == ["speculative", reason]
    until(lambda: _strip_terms(tour) == tour.k("w.study.terms"), timeout=20,
          what="the model strip")
    shot(tour.page, "tour-06-speculative-added")
    tour.state["terms_with_speculative"] = tour.k("w.study.terms")


def test_06_undo_and_redo(tour):
    wb = tour.wb
    with_spec = tour.state.get("terms_with_speculative")
    without = tour.state.get("terms_before_speculative")
    if not (with_spec and without):
        pytest.fail("needs the terms added in test_04 and test_05")
    timeline = wb.locator(".afterfit-timeline").first
    timeline.scroll_into_view_if_needed()
    timeline.locator("[data-action=undo]").click()
    until(lambda: tour.k("w.study.terms") == without, what="the undo")
    tour.settle()
    until(lambda: _strip_terms(tour) == without, timeout=20, what="the strip after undo")
    shot(tour.page, "tour-07-undo")
    timeline.locator("[data-action=redo]").click()
    until(lambda: tour.k("w.study.terms") == with_spec, what="the redo")
    tour.settle()
    until(lambda: _strip_terms(tour) == with_spec, timeout=20, what="the strip after redo")
    shot(tour.page, "tour-08-redo")


def test_07_export_inserts_code_that_reproduces_the_fit(tour):
    page, wb = tour.page, tour.wb
    button = wb.locator(".afterfit-export [data-action=insert]")
    if not button.count():
        pytest.fail("the workbench has no export bridge button ('Insert code below'); the "
                    f"export part is {tour.k('type(w.export).__name__')}")
    cells = page.locator(f"{VISIBLE} .jp-Notebook .jp-Cell")
    n_before = cells.count()
    index = [i for i in range(n_before)
             if WIDGET_CELL in cells.nth(i).locator(".jp-InputArea-editor").inner_text()][0]
    button.scroll_into_view_if_needed()
    button.click()
    until(lambda: cells.count() == n_before + 1, timeout=30, what="a new cell")
    new = cells.nth(index + 1)
    # the editor draws only the lines in view: read the new cell's source from the saved file
    page.locator(f"{VISIBLE} .jp-Notebook").first.click(position={"x": 5, "y": 5})
    page.keyboard.press("Control+s")
    saved = until(lambda: saved_sources(tour.lab.root / NOTEBOOK, n_before + 1), timeout=30,
                   what="the notebook to be saved with the new cell")
    source = saved[index + 1]
    assert "smf.ols(" in source and "print(result.params)" in source
    assert source == tour.k("w.study.to_code()")
    new.scroll_into_view_if_needed()
    shot(page, "tour-09-export-cell")
    new.locator(".jp-InputArea-editor").click()
    page.keyboard.press("Escape")  # command mode, the new cell selected
    page.keyboard.press("Shift+Enter")
    wait_idle(page)
    until(lambda: "dtype" in new.locator(".jp-OutputArea").inner_text(), timeout=60,
          what="the exported cell's output")
    printed = parse_series(new.locator(".jp-OutputArea").inner_text())
    study = tour.k("{str(k): float(v) for k, v in w.study.fit.params.items()}")
    assert set(printed) == set(study)
    for name, value in study.items():
        # pandas prints 6 decimals: compare to that precision
        assert abs(printed[name] - value) <= 1e-6 * max(1.0, abs(value)) + 1e-6, name
    new.scroll_into_view_if_needed()
    shot(page, "tour-10-export-run")
    assert tour.page_errors == []
