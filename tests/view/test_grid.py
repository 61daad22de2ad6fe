"""Residual grid on a recording comm: panels, ranking, pin/hide, sampling, brushing, reference lines.

Reference values: statsmodels (OLS fit, ``OLSInfluence`` Cook's distance, ``ProbPlot`` plotting
positions) and numpy (``histogram2d`` counts).  The data are the invented, seeded demo scenarios
(orchard, cold store); no statistic is checked against invented numbers.
"""
from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf
from statsmodels.graphics.gofplots import ProbPlot
from statsmodels.stats.outliers_influence import OLSInfluence

from afterfit.model.study import Study
from afterfit.view.grid import GRID_CHECKS, ResidualGrid
from afterfit.view.sampling import choose_points, density

HOSTILE = "<img src=x onerror=alert(1)>"
LEVELS = ["Bellisk", "Duskmere", "Orvelle", "Quintara"]  # the orchard's cultivars, sorted


@pytest.fixture
def study():
    """The invented orchard scenario; the soil column carries a name that is hostile in HTML."""
    from afterfit import demo

    df = demo.orchard(seed=0).rename(columns={"soil_n": HOSTILE})
    return Study(df, df.attrs["first_formula"], groups=["block"])


def _decode_rgba_png(data: bytes):
    """Width, height and alpha channel of an 8-bit RGBA PNG without interlacing, read by the
    PNG specification (chunk CRCs checked with zlib.crc32; every row filter type 0 here)."""
    import struct
    import zlib

    data = bytes(data)
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    pos, idat, header = 8, b"", None
    while pos < len(data):
        (length,) = struct.unpack(">I", data[pos:pos + 4])
        tag, body = data[pos + 4:pos + 8], data[pos + 8:pos + 8 + length]
        (crc,) = struct.unpack(">I", data[pos + 8 + length:pos + 12 + length])
        assert crc == zlib.crc32(tag + body) & 0xFFFFFFFF
        if tag == b"IHDR":
            header = struct.unpack(">IIBBBBB", body)
        elif tag == b"IDAT":
            idat += body
        pos += 12 + length
    width, height, depth, colour, _, _, interlace = header
    assert (depth, colour, interlace) == (8, 6, 0)
    rows = np.frombuffer(zlib.decompress(idat), dtype=np.uint8).reshape(height, 4 * width + 1)
    assert (rows[:, 0] == 0).all()
    return width, height, rows[:, 1:].reshape(height, width, 4)[..., 3]


def _brush(wire, view, x, y):
    """Act as the page: press, drag (selected_x/y change), release."""
    wire.from_page(view.brush, state={"brushing": True})
    wire.from_page(view.brush, state={"selected_x": list(map(float, x)),
                                      "selected_y": list(map(float, y)), "brushing": False})


# -- panels and layout -------------------------------------------------------------------------
def test_every_question_has_a_panel(wire, study):
    grid = ResidualGrid(study, max_panels=50)
    titles = [grid.panels[k].figure.title for k in grid.order]
    variables = ["block", "row", "tree", "cultivar", "irrigation_mm", "tree_age", HOSTILE, "note"]
    assert sorted(titles) == sorted(
        ["Residual by fitted value"] + [f"Residual by {v}" for v in variables]
        + ["Quantile check (studentized)", "Spread by fitted value",
           "Influence map (leverage × studentized, Cook contours)",
           "Partial residual: irrigation_mm", "Partial residual: tree_age"])
    # numeric columns get scatter panels, text columns strip panels by level
    assert {k for k in grid.order if k.startswith("group:")} == {
        "group:block", "group:cultivar", "group:note"}
    # the page receives the titles as SVG text (bqplot sets them with d3 .text())
    assert wire.state(grid.panels["fitted"].figure)["title"] == "Residual by fitted value"
    # the categorical panel labels its levels, sorted as patsy sorts them
    ax = grid.panels["group:cultivar"].x_axis
    assert [ax.tick_labels[str(int(t))] for t in ax.tick_values] == LEVELS
    note = grid.panels["group:note"].data  # missing values are a level of their own
    assert note.levels[-1] == "(missing)"
    # every panel of rows draws dots, a smoother where the Study gives one, reference lines
    fitted = grid.panels["fitted"]
    assert fitted.smooth.visible and fitted.band.visible and fitted.guides.visible
    sm = study.binned_means("fitted")
    # the Study's numbers (marks get unit-scale coordinates; to_data reads them back)
    np.testing.assert_allclose(fitted.to_data("y", np.ravel(fitted.smooth.y)), sm["mean"])


def test_memory_panel_only_with_time(wire, study):
    from afterfit import demo

    grid = ResidualGrid(study, max_panels=50)
    assert "memory" not in grid.titles
    df = demo.cold_store(seed=0)
    timed = Study(df, df.attrs["first_formula"], time="month", period=1)
    grid = ResidualGrid(timed, max_panels=50)
    view = grid.panels["memory"]
    assert view.figure.title == "Residual memory (autocorrelation by lag)"
    np.testing.assert_allclose(view.to_data("y", view.dots.y), timed.acf()["acf"].to_numpy(),
                               atol=1e-12)
    assert view.to_data("y", view.dots.base) == pytest.approx(0.0, abs=1e-12)  # bars start at 0
    assert view.brush is None  # bars are lags, not rows: nothing to brush


def test_panels_are_ranked_worst_first(wire, study):
    grid = ResidualGrid(study, max_panels=50)
    scores = study.pattern_scores()
    checks = study.checks()
    expected_p = {"fitted": scores.loc["fitted", "pvalue"],
                  "var:tree_age": scores.loc["tree_age", "pvalue"],
                  f"var:{HOSTILE}": scores.loc[HOSTILE, "pvalue"],
                  "group:cultivar": scores.loc["cultivar", "pvalue"],
                  "partial:tree_age": scores.loc["tree_age", "pvalue"],
                  "qq": checks.loc["Jarque-Bera", "pvalue"],
                  "spread": checks.loc["Breusch-Pagan (Koenker)", "pvalue"]}
    for key, p in expected_p.items():
        assert grid.scores[key].pvalue == pytest.approx(p, rel=1e-12, nan_ok=True)
    ranked = [k for k in grid.order if np.isfinite(grid.scores[k].pvalue)]
    ps = [grid.scores[k].pvalue for k in ranked]
    assert ps == sorted(ps)
    # yield bends in tree age (planted), so that panel ranks above the soil column's
    assert grid.order.index("var:tree_age") < grid.order.index(f"var:{HOSTILE}")
    # panels without a p-value (the influence map, with no Cook's D >= 1) come after
    assert grid.order[-1] == "influence"
    # the subtitle shows the score the panel is ranked by
    assert "p " in grid.panels["var:tree_age"].subtitle.value
    assert grid.panels["var:tree_age"].subtitle.value.startswith("pattern score (η²)")
    assert grid.panels["qq"].subtitle.value.startswith("Jarque-Bera")


def test_pin_and_hide_from_the_page(wire, study):
    grid = ResidualGrid(study, max_panels=50)
    last = grid.order[-1]
    wire.from_page(grid.panels[last].pin, state={"value": True})
    assert grid.order[0] == last and grid.pinned == [last]
    # the panel moved to the first place: that place's figure shows it now (no figure rebuilt)
    assert grid.cells.children[0] is grid.panels[last].box
    assert wire.state(grid.panels[last].figure)["title"] == grid.titles[last]
    assert grid.panels[last].pin.value
    # hide: off the grid, listed for restoring
    victim = grid.order[1]
    grid.panels[victim].hide.click()
    assert victim not in grid.order and grid.hidden == [victim]
    assert victim not in grid.panels
    spare = grid.cells.children[len(grid.order)]  # one place fewer on screen
    assert wire.state(spare.layout)["display"] == "none"
    assert grid.hidden_pick.options == ((grid.titles[victim], victim),)
    assert grid.hidden_bar.layout.display is None
    # pins and hidden panels survive a refit
    study.add("I(tree_age ** 2)", reason="age curve")
    grid.refresh()
    assert grid.order[0] == last and victim not in grid.order
    grid.hidden_pick.value = victim
    grid.unhide.click()
    assert victim in grid.order and grid.hidden == []
    assert grid.hidden_bar.layout.display == "none"
    wire.from_page(grid.panels[last].pin, state={"value": False})
    assert grid.pinned == []


def test_more_panels_button(wire, study):
    grid = ResidualGrid(study, max_panels=3)
    assert len(grid.order) == 3 and len(grid.panels) == 3  # panels off screen are not built
    assert grid.more.description == f"Show 6 more panels ({len(grid.titles) - 3} not shown)"
    grid.more.click()
    assert len(grid.order) == 3 + 6  # six more per click
    assert grid.more.description == f"Show {len(grid.titles) - 9} more panels"
    grid.more.click()
    assert len(grid.order) == len(grid.titles)
    assert grid.more.layout.display == "none"


# -- what is drawn -----------------------------------------------------------------------------
def test_dots_are_binary_buffers_on_fixed_scales(wire, study):
    grid = ResidualGrid(study, max_panels=50)
    view = grid.panels["var:irrigation_mm"]
    opening = [m for m in wire.log(view.dots) if m.msg_type == "comm_open"][0]
    updates = [m for m in wire.log(view.dots) if m.method == "update" and "x" in m.data["state"]]
    assert updates, "the dots' coordinates were sent"
    last = updates[-1]
    assert ["x"] in [p[:1] for p in last.data["buffer_paths"]]
    assert isinstance(last.data["state"]["x"], dict)  # {dtype, shape, value->buffer}, no list
    assert last.data["state"]["x"]["dtype"] == "float64"
    total = sum(len(b) for b in last.buffers)
    assert total == 2 * 8 * len(view.drawn)
    json.dumps(opening.data)  # the JSON part is plain JSON
    # scales are fixed from all the data (not computed by the browser)
    x = study.data.loc[study.rows, "irrigation_mm"]
    assert view.xs.min < x.min() and view.xs.max > x.max()
    r = study.fit.resid
    assert view.ys.min < r.min() and view.ys.max > r.max()
    state = wire.state(view.xs)
    assert state["min"] == view.xs.min and state["max"] == view.xs.max


def test_a_refit_redraws_each_mark_once_on_fixed_mark_scales(wire, study):
    grid = ResidualGrid(study, budget=40, max_panels=50)
    view = grid.panels["var:irrigation_mm"]
    # marks on unit scales that never change; the axes and the brush on data-unit scales
    assert view.dots.scales == {"x": view.mx, "y": view.my}
    assert view.brush.x_scale is view.xs and view.x_axis.scale is view.xs
    wire.clear()
    study.add("I(tree_age ** 2)", reason="age curve")
    grid.refresh()
    for key in grid.order:
        v = grid.panels[key]
        assert not wire.updates(v.mx) and not wire.updates(v.my)
        # one message per mark and scale: the page redraws each once
        for w in (v.scatter, v.bars, v.density, v.band, v.guides, v.smooth, v.xs, v.ys):
            assert len(wire.updates(w)) <= 1, (key, type(w).__name__)
        if v.kind != "bars":
            # what the dots show is the panel's data at the drawn rows
            np.testing.assert_allclose(v.to_data("x", v.dots.x), v.data.x[v.drawn], atol=1e-9)
            np.testing.assert_allclose(v.to_data("y", v.dots.y), v.data.y[v.drawn], atol=1e-9)
    resid = study.fit.resid.to_numpy()
    fitted = grid.panels["fitted"]
    assert fitted.ys.min < resid.min() and fitted.ys.max > resid.max()
    # nothing unchanged is sent again: a second refresh of the same state sends no coordinates
    wire.clear()
    grid.refresh()
    assert not any("x" in m.data.get("state", {}) for key in grid.order
                   for m in wire.log(grid.panels[key].dots))


def test_values_that_a_refit_keeps_are_computed_once(wire, study):
    grid = ResidualGrid(study, budget=40, max_panels=50)
    cache = grid._snap.cache
    x = grid.panels["var:irrigation_mm"].data.x
    study.add("I(tree_age ** 2)", reason="age curve")
    grid.refresh()
    # same rows: the variables' values (and their ranges and density cells) are kept
    assert grid._snap.cache is cache and grid.panels["var:irrigation_mm"].data.x is x
    # other rows: everything is read again, and the density still counts every fitted row
    study.exclude(study.rows[:7], "checked: sensor swapped")
    grid.refresh()
    assert grid._snap.cache is not cache
    view = grid.panels["var:irrigation_mm"]
    np.testing.assert_array_equal(view.data.x, study.data.loc[study.rows, "irrigation_mm"])
    assert round(float((view.shade.astype(float) ** 2).sum())) == len(study.rows)


def test_the_grid_asks_the_study_only_for_the_checks_it_shows(wire, study, monkeypatch):
    asked = []
    original = study.checks
    monkeypatch.setattr(study, "checks", lambda **k: asked.append(k.get("only")) or original(**k))
    grid = ResidualGrid(study, max_panels=50)
    assert asked and all(tuple(a) == GRID_CHECKS for a in asked)
    assert grid.scores["qq"].pvalue == pytest.approx(original().loc["Jarque-Bera", "pvalue"])


def test_undo_and_redo_reuse_the_panels_of_a_state(wire, study, monkeypatch):
    grid = ResidualGrid(study, budget=40, max_panels=50)
    first = {k: grid.panels[k].data for k in grid.order}
    study.add("I(tree_age ** 2)", reason="age curve")
    grid.refresh()
    calls = []
    original = study.binned_means
    monkeypatch.setattr(study, "binned_means", lambda *a, **k: calls.append(a) or original(*a, **k))
    study.undo()
    grid.refresh()
    assert calls == []  # the earlier state's panels are the ones built before
    assert all(grid.panels[k].data is first[k] for k in grid.order)
    # ... and they are drawn again: the dots show the earlier state's residuals
    view = grid.panels["fitted"]
    np.testing.assert_allclose(view.to_data("y", view.dots.y),
                               study.fit.resid.to_numpy()[view.drawn], atol=1e-9)


def test_sample_keeps_extremes_and_is_seeded(study):
    infl = study.influence
    drawn = choose_points(infl, budget=40, seed=3)
    assert len(drawn.positions) == 40 and not drawn.complete
    assert drawn.n_kept == 16
    pos = set(drawn.positions.tolist())
    top_student = np.argsort(-np.abs(infl["student_ext"].to_numpy()))[:5]
    top_cooks = np.argsort(-infl["cooks_d"].to_numpy())[:5]
    assert set(top_student.tolist()) <= pos and set(top_cooks.tolist()) <= pos
    again = choose_points(infl, budget=40, seed=3)
    np.testing.assert_array_equal(drawn.positions, again.positions)
    other = choose_points(infl, budget=40, seed=4)
    assert not np.array_equal(drawn.positions, other.positions)
    everything = choose_points(infl, budget=500)
    assert everything.complete and len(everything.positions) == len(infl)
    with pytest.raises(ValueError, match="budget"):
        choose_points(infl, budget=0)


def test_density_counts_match_numpy(study):
    rng = np.random.default_rng(7)
    x, y = rng.normal(size=5000), rng.normal(size=5000)
    x[:3] = np.nan
    d = density(x, y, x_range=(-5, 5), y_range=(-4, 4), bins=(20, 10))
    ok = np.isfinite(x)
    # numpy.histogram2d as the reference (rows of the shade are y bins)
    ref, _, _ = np.histogram2d(y[ok], x[ok], bins=(10, 20), range=((-4, 4), (-5, 5)))
    np.testing.assert_allclose(d.shade.astype(float) ** 2, ref, rtol=1e-5)
    assert d.max_count == int(ref.max())
    with pytest.raises(ValueError, match="empty range"):
        density(x, y, x_range=(1, 1), y_range=(0, 1))


def test_density_layer_when_sampled(wire, study):
    grid = ResidualGrid(study, budget=40, max_panels=50)
    view = grid.panels["var:irrigation_mm"]
    assert len(view.drawn) == 40
    assert view.density.visible
    assert view.shade.dtype == np.float32
    n = len(study.rows)
    assert round(float((view.shade.astype(float) ** 2).sum())) == n  # every row counted
    # the page gets the shade as a PNG: one pixel per cell, opacity in proportion to the shade
    png = view.density.image.value
    width, height, alpha = _decode_rgba_png(png)
    assert (width, height) == (60, 40)
    expected = np.rint(view.shade[::-1] * (255 * 0.55 / view.shade.max()))
    np.testing.assert_array_equal(alpha, expected)
    # counts against numpy's histogram2d over the panel's ranges (rows of the shade are y bins)
    x = study.data.loc[study.rows, "irrigation_mm"].to_numpy()
    ref, _, _ = np.histogram2d(study.fit.resid.to_numpy(), x, bins=(40, 60),
                               range=(view.y_range, view.x_range))
    np.testing.assert_allclose(view.shade.astype(float) ** 2, ref, rtol=1e-5)
    assert "each panel draws 40" in grid.note.value
    small = ResidualGrid(study, max_panels=50)
    assert not small.panels["var:irrigation_mm"].density.visible


def test_qq_positions_match_statsmodels(wire, study):
    grid = ResidualGrid(study, max_panels=50)
    data = grid.panels["qq"].data
    y = study.influence["student_ext"].to_numpy()
    np.testing.assert_allclose(data.y, y)
    # statsmodels ProbPlot with a=0.375 uses Blom's positions (i - 0.375) / (n + 0.25)
    ref = ProbPlot(y, a=0.375).theoretical_quantiles
    np.testing.assert_allclose(np.sort(data.x), ref, rtol=1e-12)
    assert np.array_equal(np.argsort(data.x), np.argsort(y, kind="stable"))


def test_qq_positions_with_tied_residuals_match_statsmodels(wire, study):
    # repeated rows have equal studentized residuals: ties keep their row order
    df = pd.concat([study.data, study.data.iloc[:40]], ignore_index=True)
    tied = Study(df, df.attrs["first_formula"])
    grid = ResidualGrid(tied, max_panels=50)
    data = grid.panels["qq"].data
    y = tied.influence["student_ext"].to_numpy()
    assert len(np.unique(y)) < len(y)
    ref = ProbPlot(y, a=0.375).theoretical_quantiles  # statsmodels, Blom's positions
    np.testing.assert_allclose(np.sort(data.x), ref, rtol=1e-12)
    assert np.array_equal(np.argsort(data.x, kind="stable"), np.argsort(y, kind="stable"))


def test_partial_residuals_match_statsmodels(wire, study):
    grid = ResidualGrid(study, max_panels=50)
    res = smf.ols(study.formula, study.data).fit()  # statsmodels as the reference
    for term in ("irrigation_mm", "tree_age"):
        data = grid.panels[f"partial:{term}"].data
        np.testing.assert_allclose(data.y, res.resid + res.params[term] * study.data[term],
                                   rtol=1e-9, atol=1e-9)


def test_cook_contours_separate_rows_as_statsmodels_does(wire, study):
    # one planted far, off-line row, so some Cook's distances pass the contour levels
    df = study.data.copy()
    df.loc[len(df)] = {**df.iloc[0].to_dict(), "irrigation_mm": 1500.0, "yield_kg": 0.0}
    study = Study(df, df.attrs["first_formula"])
    grid = ResidualGrid(study, max_panels=50)
    view = grid.panels["influence"]
    fit = smf.ols(df.attrs["first_formula"], df).fit()
    cooks = OLSInfluence(fit).cooks_distance[0].to_numpy()  # statsmodels reference
    h = study.influence["leverage"].to_numpy()
    r = study.influence["student_int"].to_numpy()
    gx, gy = view.guides.x, view.guides.y
    assert gx.shape[0] == 4  # two levels, each above and below zero
    for level, (cx, cy) in zip([0.5, 1.0], [(gx[0], gy[0]), (gx[2], gy[2])]):
        assert np.all(np.diff(cx) > 0)
        inside = (h >= cx[0]) & (h <= cx[-1])
        bound = np.interp(h[inside], cx, cy)
        outside = np.abs(r[inside]) > bound
        assert np.array_equal(outside, cooks[inside] > level)
    assert cooks.max() > 1 and grid.order[0] == "influence"  # D >= 1: look here first


# -- brushing ------------------------------------------------------------------------------------
def test_brush_selects_every_row_in_the_range(wire, study):
    grid = ResidualGrid(study, budget=40, max_panels=50)
    got = []
    grid.on_select(got.append)
    view = grid.panels["var:irrigation_mm"]
    lo, hi = study.data["irrigation_mm"].quantile([0.2, 0.7])
    _brush(wire, view, (lo, hi), (-1.0, 5.0))
    data = study.data.loc[study.rows]
    resid = study.fit.resid
    expected = data.index[data["irrigation_mm"].between(lo, hi) & resid.between(-1.0, 5.0)]
    drawn_rows = set(study.rows[view.drawn])
    assert not set(expected) <= drawn_rows  # the range holds rows that are not drawn as dots
    assert grid.selection.equals(expected)
    assert got and got[-1].equals(expected)
    mask = study.rows.isin(expected)
    for key in grid.order:
        other = grid.panels[key]
        if other.highlight is None:
            continue
        want = np.flatnonzero(mask[other.drawn])
        np.testing.assert_array_equal(other.dots.selected, want)
        assert wire.state(other.dots)["selected"] is not None
        # selected rows that are not among the dots are drawn on top
        assert len(other.highlight.x) == len(set(np.flatnonzero(mask)) - set(other.drawn))


def test_a_new_brush_clears_the_others(wire, study):
    grid = ResidualGrid(study, max_panels=50)
    a, b = grid.panels["var:tree_age"], grid.panels["fitted"]
    assert study.fit.fitted.between(-1e3, 1e3).all()  # so the second brush spans every x
    _brush(wire, a, (0, 100), (-1, 1))
    _brush(wire, b, (-1e3, 1e3), (0, 100))
    assert a.brush.selected_x is None and a.brush.selected_y is None
    assert wire.state(a.brush)["selected_x"] is None  # the page's rectangle goes too
    resid = study.fit.resid
    assert grid.selection.equals(study.rows[(resid >= 0).to_numpy()])


def test_only_the_release_does_the_work(wire, study):
    grid = ResidualGrid(study, max_panels=50)
    got = []
    grid.on_select(got.append)
    view = grid.panels["fitted"]
    wire.from_page(view.brush, state={"brushing": True})
    wire.from_page(view.brush, state={"selected_x": [-1e3, 1e3], "selected_y": [0.0, 9.0]})
    assert got == []  # still dragging
    wire.from_page(view.brush, state={"brushing": False})
    assert len(got) == 1 and len(got[0]) > 0
    # a click without a drag clears the selection everywhere
    wire.from_page(view.brush, state={"brushing": True})
    wire.from_page(view.brush, state={"selected_x": None, "selected_y": None, "brushing": False})
    assert len(grid.selection) == 0 and len(got[-1]) == 0
    assert all(grid.panels[k].dots.selected is None for k in grid.order
               if grid.panels[k].highlight is not None)


def test_the_brush_rectangle_moves_with_its_panel(wire, study):
    grid = ResidualGrid(study, max_panels=50)
    key = grid.order[2]
    source = grid.panels[key]
    assert source.brush is not None
    x0, x1 = source.xs.min, source.xs.max
    _brush(wire, source, (x0, x1), (-1.0, 1.0))
    chosen = grid.selection
    assert len(chosen)
    grid.pin(grid.order[-1])  # every panel moves down one place
    moved = grid.panels[key]
    assert moved is not source
    assert list(moved.brush.selected_x) == [x0, x1] and list(moved.brush.selected_y) == [-1, 1]
    assert sum(v.selector.selected_x is not None for v in grid._places) == 1
    assert grid.selection.equals(chosen)


def test_brush_on_groups_selects_levels(wire, study):
    grid = ResidualGrid(study, max_panels=50)
    view = grid.panels["group:cultivar"]
    _brush(wire, view, (0.6, 2.4), (-100, 100))  # codes 1 and 2
    data = study.data.loc[study.rows]
    assert grid.selection.equals(data.index[data["cultivar"].isin(LEVELS[1:3])])


def test_selection_follows_a_refit(wire, study):
    grid = ResidualGrid(study, max_panels=50)
    _brush(wire, grid.panels["var:tree_age"], (10, 100), (-100, 100))
    chosen = grid.selection
    study.exclude(chosen[:3], "checked: sensor swapped")
    grid.refresh()
    assert grid.selection.equals(chosen[3:])
    assert len(grid.panels["var:tree_age"].drawn) == len(study.rows)
    assert f"{len(study.rows):,} rows" in grid.note.value


def test_moving_panels_computes_nothing_and_builds_no_figure(wire, study, monkeypatch):
    grid = ResidualGrid(study, max_panels=50)
    calls = []
    original = study.binned_means
    monkeypatch.setattr(study, "binned_means", lambda *a, **k: calls.append(a) or original(*a, **k))
    built = {key: grid.panels[key].data for key in grid.order}
    children = grid.cells.children
    wire.clear()
    last = grid.order[-1]
    grid.pin(last)
    grid.hide_panel(grid.order[1])
    grid.show_all()
    assert calls == []  # nothing recomputed
    assert all(grid.panels[key].data is built[key] for key in grid.order)
    # the page builds no widget and no figure (a small table: no density image either): the
    # places stay, their data change
    assert not [m for c in wire.comms for m in c.log if m.msg_type == "comm_open"]
    assert grid.cells.children == children and not wire.updates(grid.cells)
    for place, key in enumerate(grid.order):
        view = grid.panels[key]
        assert grid.cells.children[place] is view.box
        assert wire.state(view.figure)["title"] == grid.titles[key]
        np.testing.assert_allclose(view.to_data("x", view.dots.x),
                                   built[key].x[view.drawn], rtol=1e-12, atol=1e-12)


def test_a_panel_the_study_cannot_give_is_reported(wire, study, monkeypatch):
    def broken(term):
        raise ValueError(f"no partial residuals for {term}")

    monkeypatch.setattr(study, "partial_residuals", broken)
    grid = ResidualGrid(study, max_panels=50)
    assert "partial:tree_age" not in grid.order and "fitted" in grid.order
    assert "Not drawn: Partial residual: " in grid.note.value
    assert "no partial residuals for tree_age" in grid.note.value


def test_influence_map_says_when_the_contours_are_out_of_range(wire, study):
    grid = ResidualGrid(study, max_panels=50)
    view = grid.panels["influence"]
    assert study.influence["cooks_d"].max() < 0.5
    assert not view.guides.visible
    assert "no row near Cook's D 0.5 (no contour)" in view.subtitle.value
