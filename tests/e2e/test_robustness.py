"""The workbench survives what happens to notebooks: kernel restart, page reload, a failing refit.

Each test writes its own small notebook into the server's folder (the example notebooks stay as
they are).  The notebook keeps its Study in a file: it saves on every change and loads the file
when it exists, so "Restart Kernel and Run All Cells" must bring back the same model.
"""
from __future__ import annotations

import nbformat

from harness import (VISIBLE, cell_errors, open_notebook, run_all, settle, shot, until,
                     wait_idle)

KERNEL = {"kernelspec": {"name": "python3", "display_name": "Python 3 (ipykernel)",
                         "language": "python"}}


def _write_notebook(lab, name: str) -> str:
    save_path = name.replace(".ipynb", ".afterfit.json")
    setup = f'''
import os

import afterfit as af
from afterfit.view.explorer import Explorer

df = af.demo.cold_store()
PATH = {save_path!r}
if os.path.exists(PATH):
    study = af.Study.load(PATH, df)
else:
    study = af.Study(df, "kwh ~ outdoor_temp + throughput", time="t_month", period=12,
                     holdout=0.15, seed=1)
study.subscribe(lambda s, event: s.save(PATH))  # the file follows every change
w = Explorer(study)
w
'''
    nb = nbformat.v4.new_notebook(metadata=KERNEL)
    nb.cells = [nbformat.v4.new_code_cell(setup.strip()),
                nbformat.v4.new_code_cell('print("terms:", study.terms)')]
    nbformat.write(nb, str(lab.root / name))
    (lab.root / save_path).unlink(missing_ok=True)
    return name


def _workbench(page):
    return page.locator(f"{VISIBLE} .jp-CodeCell").first.locator(".jp-OutputArea-output").first


def _strip_terms(wb) -> list[str]:
    items = wb.locator(".afterfit-strip .afterfit-term").all()
    return [t.get_attribute("data-term") for t in items]


def _add_stated_chip(page, probe) -> list[str]:
    wb = _workbench(page)
    before = probe.json("study.terms")
    chip = wb.locator(".afterfit-chip[data-tag=stated]").first
    chip.scroll_into_view_if_needed()
    chip.drag_to(wb.locator(".afterfit-strip").first)
    until(lambda: len(probe.json("study.terms")) > len(before), what="the dragged term")
    settle(probe)
    terms = probe.json("study.terms")
    until(lambda: _strip_terms(wb) == terms, timeout=30, what="the model strip")
    return terms


def test_restart_and_run_all_restores_the_study(page, lab):
    name = _write_notebook(lab, "restore.ipynb")
    open_notebook(page, lab, name)
    run_all(page)
    assert cell_errors(page) == []
    probe = lab.probe(name)
    try:
        terms = _add_stated_chip(page, probe)
        steps = probe.json("len(study.steps)")
        assert (lab.root / "restore.afterfit.json").exists()
    finally:
        probe.close()
    shot(page, "robust-01-before-restart")
    page.locator(".lm-MenuBar-itemLabel:text-is('Kernel')").click()
    page.locator(".lm-Menu-itemLabel:text-is('Restart Kernel and Run All Cells…')").click()
    page.locator(".jp-Dialog-button.jp-mod-accept").click()
    page.wait_for_timeout(1500)
    wait_idle(page, timeout=180_000)
    assert cell_errors(page) == []
    probe = lab.probe(name)
    try:
        assert probe.json("study.terms") == terms
        assert probe.json("len(study.steps)") == steps
        wb = _workbench(page)
        until(lambda: _strip_terms(wb) == terms, timeout=60, what="the restored model strip")
    finally:
        probe.close()
    shot(page, "robust-02-after-restart")


def test_reload_rerenders_the_live_workbench(page, lab):
    name = _write_notebook(lab, "reload.ipynb")
    open_notebook(page, lab, name)
    run_all(page)
    page.locator(f"{VISIBLE} .jp-Notebook").first.click(position={"x": 5, "y": 5})
    page.keyboard.press("Control+s")
    page.wait_for_timeout(1500)
    page.reload()
    page.wait_for_selector(f"{VISIBLE} .jp-Cell", timeout=90_000)
    wait_idle(page)
    wb = _workbench(page)
    until(lambda: wb.locator(".bqplot.figure").count() > 0, timeout=90, what="the grid again")
    until(lambda: wb.locator(".afterfit-tray .afterfit-chip").count() > 0, timeout=90,
          what="the tray again")
    shot(page, "robust-03-after-reload")
    probe = lab.probe(name)
    try:
        assert _strip_terms(wb) == probe.json("study.terms")
        # the views are live: a drag after the reload still reaches the kernel's Study
        terms = _add_stated_chip(page, probe)
        assert _strip_terms(wb) == terms
    finally:
        probe.close()
    assert page.page_errors == []


def test_a_failing_refit_shows_a_message_and_the_workbench_keeps_working(page, lab):
    name = _write_notebook(lab, "failure.ipynb")
    open_notebook(page, lab, name)
    run_all(page)
    probe = lab.probe(name)
    wb = _workbench(page)
    try:
        before = probe.json("study.terms")
        # make every new fit fail inside the kernel, as a numerical library error would
        probe.run(
            "import afterfit.model.study as _S\n"
            "_real_fit = _S.fit_ols\n"
            "def _broken(*a, **k):\n"
            "    raise RuntimeError('injected failure in the least-squares solver')\n"
            "_S.fit_ols = _broken\n"
        )
        chip = wb.locator(".afterfit-chip[data-tag=stated]").first
        chip.scroll_into_view_if_needed()
        chip.locator("[data-action=add]").click()
        until(lambda: probe.json("len(w.errors)") > 0, what="the Explorer to record the error")
        settle(probe)
        message = wb.locator(".afterfit-message").first
        until(lambda: "injected failure in the least-squares solver" in message.inner_text(),
              timeout=30, what="the error message in the widget")
        message.scroll_into_view_if_needed()
        shot(page, "robust-04-refit-error")
        assert probe.json("study.terms") == before
        probe.run("_S.fit_ols = _real_fit")
        terms = _add_stated_chip(page, probe)
        assert len(terms) > len(before)
    finally:
        probe.close()
