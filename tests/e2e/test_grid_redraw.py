"""The residual grid in a real browser: how a refit is redrawn, and panels that come back.

A measurement, not a timed assertion.  After a refit (a term added to the Study from another cell,
so the Explorer redraws as it does after a drop) the test checks what the page did: every figure on
the grid is the one it had before (a refit sends new data, it builds no figure), every panel is
drawn inside its plot area, the page shows the panels in the Study's rank order, and it raised no
error.  It reports the delays from the first to
the last DOM change under the grid and the renderer's main-thread time by kind of work, read from a
Chromium trace (terminal summary and tests/artifacts/grid_redraw.json).

A panel hidden with its eye button and brought back from the hidden list must be drawn again at
its full size and in its place.
"""
from __future__ import annotations

import collections
import json
import os

from harness import (ARTIFACTS, VISIBLE, cell_errors, open_notebook, reports, run_all, settle,
                     shot, until, write_notebook)

N_ROWS = 10_000
TERM = "I(inlet_temp ** 2)"

# Arms a MutationObserver under the grid; tags every figure on it so a rebuilt one shows.
_ARM = """
(grid) => {
  const out = {t0: performance.now(), first: null, last: null, quiet: performance.now(), n: 0};
  window.__gridRedraw = out;
  if (window.__gridObserver) window.__gridObserver.disconnect();
  grid.querySelectorAll(".bqplot.figure").forEach((f) => { f.__afterfitSeen = true; });
  const observer = new MutationObserver((records) => {
    const now = performance.now();
    out.quiet = now;
    for (const r of records) {
      const el = r.target.nodeType === 1 ? r.target : r.target.parentElement;
      if (!el || !el.closest || !el.closest(".bqplot")) continue;
      if (out.first === null) out.first = now;
      out.last = now;
      out.n += 1;
    }
  });
  observer.observe(grid, {subtree: true, childList: true, attributes: true, characterData: true});
  window.__gridObserver = observer;
}
"""

# For every panel on screen: its title, whether its figure was there before, its size, and how
# many dots lie inside its plot area (bqplot puts each dot's position on its parent group).
_PANELS = """
(grid) => Array.from(grid.querySelectorAll(".afterfit-panel"))
  .filter((p) => getComputedStyle(p).display !== "none")
  .map((p) => {
    const fig = p.querySelector(".bqplot.figure");
    const plot = fig.querySelector("rect.overlay") || fig.querySelector(".plotarea_background");
    const area = plot ? plot.getBoundingClientRect() : {left: 0, right: 0, top: 0, bottom: 0};
    const box = fig.getBoundingClientRect();
    let inside = 0, dots = 0;
    fig.querySelectorAll("path.dot").forEach((d) => {
      const r = d.getBoundingClientRect();
      if (!r.width) return;
      dots += 1;
      const cx = r.left + r.width / 2, cy = r.top + r.height / 2;
      if (cx >= area.left - 1 && cx <= area.right + 1 && cy >= area.top - 1
          && cy <= area.bottom + 1) inside += 1;
    });
    const title = (fig.querySelector(".mainheading") || {}).textContent || "";
    return {title, seen: !!fig.__afterfitSeen, width: box.width, height: box.height, dots,
            inside, top: Math.round(box.top), left: Math.round(box.left)};
  })
"""

_TRACE_CATEGORIES = "devtools.timeline,disabled-by-default-devtools.timeline,v8"


def _main_thread_ms(events: list) -> dict:
    """Renderer main-thread CPU time (ms) of the traced tasks, total and by kind of work."""
    threads = collections.Counter((e.get("pid"), e.get("tid")) for e in events
                                  if e.get("name") in ("UpdateLayoutTree", "Layout", "Paint"))
    if not threads:
        return {}
    main = threads.most_common(1)[0][0]
    spans = [e for e in events if (e.get("pid"), e.get("tid")) == main and e.get("ph") == "X"]

    def total(name):
        return round(sum(e.get("tdur", e.get("dur", 0)) for e in spans if e["name"] == name) / 1e3)

    kinds = {"all tasks": "RunTask", "scripts in animation frames (d3 transitions)":
             "FireAnimationFrame", "style": "UpdateLayoutTree", "layout": "Layout",
             "paint": "Paint", "layerize": "Layerize", "garbage collection": "MinorGC"}
    return {label: total(name) for label, name in kinds.items()}


def _open(page, lab, name: str):
    write_notebook(lab, name, "import afterfit as af\n"
                   f"df = af.demo.sensors({N_ROWS})\n"
                   'w = af.explore(df, df.attrs["first_formula"], seed=0)\nw')
    open_notebook(page, lab, name)
    run_all(page)
    assert cell_errors(page) == []
    wb = page.locator(f"{VISIBLE} .jp-CodeCell").first.locator(".jp-OutputArea-output").first
    until(lambda: wb.locator(".afterfit-grid .bqplot.figure").count() > 0, what="the grid")
    probe = lab.probe(name)
    settle(probe)
    return wb, probe


def _quiet(page, seconds: float = 1.5) -> None:
    """Wait until nothing under the grid changed for ``seconds``."""
    until(lambda: page.evaluate(f"() => performance.now() - window.__gridRedraw.quiet > "
                                f"{seconds * 1000}"), timeout=120, what="the grid to settle")


def test_a_refit_sends_data_to_the_figures_already_there(page, lab, request):
    wb, probe = _open(page, lab, "grid_redraw.ipynb")
    grid = wb.locator(".afterfit-grid").first
    try:
        # the analyst looks at the grid while it is redrawn
        grid.locator(".afterfit-panel").first.scroll_into_view_if_needed()
        before = grid.evaluate(_PANELS)
        page.wait_for_timeout(1000)
        grid.evaluate(_ARM)
        cdp = page.context.new_cdp_session(page)
        events: list = []
        done: list = []
        cdp.on("Tracing.dataCollected", lambda e: events.extend(e["value"]))
        cdp.on("Tracing.tracingComplete", lambda e: done.append(True))
        cdp.send("Tracing.start", {"categories": _TRACE_CATEGORIES,
                                   "transferMode": "ReportEvents"})
        t0 = page.evaluate("() => performance.now()")
        # as from another cell: the Explorer refits and redraws as it does after a drop
        probe.run(f"w.study.add({TERM!r})")
        until(lambda: not probe.json("w.busy"), timeout=120, what="the Explorer to finish")
        _quiet(page)
        marks = page.evaluate("() => window.__gridRedraw")
        cdp.send("Tracing.end")
        for _ in range(300):  # Playwright delivers CDP events while it waits
            if done:
                break
            page.wait_for_timeout(100)
        titles = probe.json("[w.grid.titles[k] for k in w.grid.order]")
    finally:
        probe.close()
    after = grid.evaluate(_PANELS)
    shot(page, "grid-redraw-after-refit")
    assert marks["first"] is not None, "the grid did not change after the refit"
    assert len(after) == len(before) == len(titles)
    # no figure was built anew: each place on the grid shows the panel ranked there now
    assert all(p["seen"] for p in after), [p["title"] for p in after if not p["seen"]]
    assert [p["title"] for p in after] == titles
    # ... and the page shows them in that order, row by row
    assert sorted(after, key=lambda p: (p["top"], p["left"])) == after
    for p in after:
        assert p["width"] > 250 and p["height"] > 200, p
        assert p["dots"] > 0 and p["inside"] == p["dots"], p
    assert page.page_errors == []
    main = _main_thread_ms(events)
    result = {"rows": N_ROWS, "term": TERM, "panels": len(after),
              "first_change_ms": round(marks["first"] - t0),
              "last_change_ms": round(marks["last"] - t0),
              "drawing_ms": round(marks["last"] - marks["first"]), "dom_changes": marks["n"],
              "main_thread_cpu_ms": main, "cpus": os.cpu_count(),
              "load_1min": round(os.getloadavg()[0], 2)}
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    (ARTIFACTS / "grid_redraw.json").write_text(json.dumps(result, indent=1))
    reports(request).append(
        f"grid redraw after a refit at {N_ROWS:,} rows: {result['drawing_ms']:,} ms from the "
        f"first to the last change under the grid ({marks['n']:,} DOM changes, {len(after)} "
        f"panels); renderer main thread {main.get('all tasks', 0):,} ms CPU "
        f"(d3 transitions {main.get('scripts in animation frames (d3 transitions)', 0):,}, "
        f"style {main.get('style', 0):,}, layerize {main.get('layerize', 0):,}) "
        f"(load {result['load_1min']} on {result['cpus']} CPUs)")


def test_a_hidden_panel_comes_back_drawn(page, lab):
    wb, probe = _open(page, lab, "grid_hide.ipynb")
    grid = wb.locator(".afterfit-grid").first
    try:
        order = probe.json("w.grid.order")
        victim = order[1]
        title = probe.json(f"w.grid.titles[{victim!r}]")
        shown = [p for p in grid.evaluate(_PANELS) if p["title"] == title]
        assert len(shown) == 1
        panel = grid.locator(".afterfit-panel", has_text=title).first
        panel.locator("button:has(.fa-eye-slash)").click()
        until(lambda: probe.json("w.grid.hidden") == [victim], what="the panel to be hidden")
        until(lambda: not any(p["title"] == title for p in grid.evaluate(_PANELS)),
              what="the panel to leave the page")
        # a refit while it is hidden: it comes back with the new state's data
        probe.run(f"w.study.add({TERM!r})")
        until(lambda: not probe.json("w.busy"), timeout=120, what="the Explorer to finish")
        settle(probe)
        wb.locator(".afterfit-grid button:has-text('Show again')").click()
        until(lambda: probe.json("w.grid.hidden") == [], what="the panel to be shown again")
        place = probe.json(f"w.grid.order.index({victim!r})")
        drawn = probe.json(f"len(w.grid.panels[{victim!r}].drawn)")
    finally:
        probe.close()

    def back():
        found = [p for p in grid.evaluate(_PANELS) if p["title"] == title]
        return found[0] if found and found[0]["dots"] == drawn else None

    p = until(back, timeout=30, what="the panel to be drawn again")
    assert p["width"] > 250 and p["height"] > 200, p
    assert p["inside"] == p["dots"] == drawn, p
    assert [q["title"] for q in grid.evaluate(_PANELS)].index(title) == place
    grid.locator(".afterfit-panel", has_text=title).first.scroll_into_view_if_needed()
    shot(page, "grid-panel-shown-again")
    assert page.page_errors == []
