"""Residual grid: one bqplot figure per question about what the model left over.

Each panel is an SVG ``Scatter`` of at most ``budget`` dots (rows with extreme residuals or high
influence are always among them) over a density image (a small PNG) of every fitted row, a smoother
(binned residual means with a band, from the Study) and reference lines.  Panels are ranked by the
Study's pattern score, worst first; the analyst can pin a panel to the top or hide it.

A brush in any panel selects *every* fitted row inside the brushed data range (not only the drawn
dots); the same rows light up in every panel and the ``on_select`` callbacks receive their labels.

The grid draws what the Study computed; the only arithmetic here is for drawing (ranges, counts per
density cell, plotting positions of the Q-Q panel, the Cook's distance contour curves).
"""
from __future__ import annotations

import math
import struct
import warnings
import zlib
from dataclasses import dataclass, field, replace
from typing import Any, Callable

import ipywidgets as W

with warnings.catch_warnings():
    # bqscales (bqplot's scales) sets trait metadata the pre-4.1 traitlets way on import
    warnings.filterwarnings("ignore", message=r"metadata \{'args'", category=DeprecationWarning)
    import bqplot as bq
import numpy as np
import pandas as pd
from scipy import special

from afterfit.view.sampling import (DrawnPoints, bin_codes, choose_points,
                                   density_of_codes)

__all__ = ["ResidualGrid", "PanelData", "PanelView", "Score", "PALETTE", "GRID_CHECKS",
           "panel_keys"]

# Our own palette: warm paper background, deep teal dots, ember for the selection, plum smoother.
PALETTE = {
    "paper": "#fbfaf6",
    "panel_border": "#e4dfd3",
    "grid": "#ebe7dd",
    "axis": "#5c5850",
    "text": "#3b3833",
    "muted": "#8a857a",
    "dot": "#1f6f78",
    "selected": "#e4572e",
    "smoother": "#7b3f8c",
    "guide": "#a39e93",
    "cook": "#b8433a",
    "bar": "#3f8f8a",
    "density": ((31, 111, 120), 0.55),  # colour of the density shade, opacity of the densest cell
}

# the specification checks whose results score panels (Q-Q, spread, residual memory)
GRID_CHECKS = ("Jarque-Bera", "Breusch-Pagan (Koenker)", "Ljung-Box")

_TICK_STYLE = {"font-size": "10px", "fill": PALETTE["axis"]}
_TITLE_STYLE = {"font-size": "13px", "fill": PALETTE["text"], "font-weight": "600"}
_MAX_LEVELS = 60  # a categorical variable with more levels is an identifier, not a group
_MAX_LEVEL_TICKS = 30
_HIGHLIGHT_CAP = 250  # selected rows outside the drawn sample that are drawn on top
_COOK_LEVELS = (0.5, 1.0)  # contour levels of Cook's distance (common practice)
_GUIDE_POINTS = 64
_GOLDEN = (math.sqrt(5) - 1) / 2


# ---------------------------------------------------------------------------------------------
# what a panel shows (data only)
# ---------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class PanelData:
    """The arrays and labels of one panel.

    Attributes
    ----------
    key : stable identifier ("fitted", "var:<name>", "group:<name>", "qq", "spread", "influence",
        "memory", "partial:<term>").
    title : the panel's question, e.g. "Residual by fitted value".
    kind : "scatter", "strip" (a categorical x axis) or "bars" (one bar per lag, no rows).
    x, y : float arrays, one value per fitted row (per lag for "bars"), NaN where undefined.
    x_label, y_label : axis labels.
    score : what ranks the panel and is shown in its subtitle (None when the Study has none).
    levels : level names of a strip panel (``x`` holds level code plus a small jitter).
    smoother : DataFrame with ``centre``, ``mean``, ``lower``, ``upper`` in panel units, or None.
    guides : reference lines as ``(x, y)`` pairs of equal-length arrays.
    """

    key: str
    title: str
    kind: str
    x: np.ndarray
    y: np.ndarray
    x_label: str
    y_label: str
    score: "Score | None" = None
    levels: tuple = ()
    smoother: pd.DataFrame | None = None
    guides: tuple = ()

    @property
    def brushable(self) -> bool:
        """Whether a brush in this panel selects rows (every kind except bars)."""
        return self.kind != "bars"

    @property
    def subtitle(self) -> str:
        """The panel's score as shown beside its title."""
        return self.score.text if self.score is not None else "no score for this panel"


@dataclass(frozen=True)
class Score:
    """How much structure a panel shows, as the Study measured it.

    Attributes
    ----------
    value : the statistic shown (eta squared of the binned means for residual panels, the test
        statistic for panels read from ``study.checks()``, the largest Cook's distance for the
        influence map); NaN when there is none.
    pvalue : its p-value (NaN when it has none).
    label : what ``value`` is, in words.
    note : extra words for the subtitle.
    strong : True when a rule of thumb says "look here first" without a p-value (a row with
        Cook's distance of 1 or more, common practice).
    """

    value: float
    pvalue: float
    label: str
    note: str = ""
    strong: bool = False

    @property
    def rank(self) -> tuple:
        """Sort key, worst first: strong signals, then by p-value (ties by value), then the rest."""
        if self.strong:
            return (0, 0.0, 0.0)
        if np.isfinite(self.pvalue):
            return (1, self.pvalue, -self.value if np.isfinite(self.value) else 0.0)
        return (2, 0.0, 0.0)

    @property
    def text(self) -> str:
        parts = []
        if np.isfinite(self.value):
            parts.append(f"{self.label} {self.value:.3g}")
        if np.isfinite(self.pvalue):
            parts.append("p < 0.001" if self.pvalue < 0.001 else f"p = {self.pvalue:.3f}")
        if self.note:
            parts.append(self.note)
        return " · ".join(parts) if parts else f"no {self.label}"


def _extent(a: np.ndarray) -> tuple[float, float] | None:
    """Finite min and max of ``a`` (None when it has no finite value)."""
    a = np.asarray(a, dtype=float)
    if not a.size:
        return None
    # two reductions without a copy; only an array holding NaN or inf takes the slow path
    lo, hi = float(a.min()), float(a.max())
    if math.isfinite(lo) and math.isfinite(hi):
        return lo, hi
    ok = a[np.isfinite(a)]
    return (float(ok.min()), float(ok.max())) if ok.size else None


def _padded(extents, pad: float = 0.05) -> tuple[float, float]:
    """The union of finite extents widened by ``pad`` of the span (a unit span if flat)."""
    extents = [e for e in extents if e is not None]
    if not extents:
        return (-1.0, 1.0)
    lo = min(e[0] for e in extents)
    hi = max(e[1] for e in extents)
    span = hi - lo
    if span <= 0 or not math.isfinite(span):
        half = max(abs(lo) * 0.05, 0.5)
        return (lo - half, hi + half)
    return (lo - pad * span, hi + pad * span)


def _range(*arrays: np.ndarray, pad: float = 0.05) -> tuple[float, float]:
    """Finite min/max over the arrays, widened by ``pad`` of the span (a unit span if flat)."""
    return _padded([_extent(a) for a in arrays], pad=pad)


def _float(a: Any) -> np.ndarray:
    """``a`` as float64, with NaN where a value is not a number."""
    dtype = getattr(a, "dtype", None)
    if isinstance(dtype, np.dtype) and dtype.kind in "fiu":  # plain numbers: no pandas pass
        return np.asarray(a, dtype=float)
    return np.asarray(pd.to_numeric(pd.Series(np.asarray(a)), errors="coerce"), dtype=float)


def _is_numeric(s: pd.Series) -> bool:
    return pd.api.types.is_numeric_dtype(s.dtype) and not pd.api.types.is_bool_dtype(s.dtype)


def _level_name(v: Any) -> str:
    if v is None or (isinstance(v, float) and math.isnan(v)) or v is pd.NA or v is pd.NaT:
        return "(missing)"
    return str(v)


def panel_keys(study: Any, *, cache: "_RowCache | None" = None) -> list[tuple[str, str]]:
    """Every panel the Study supports, as ``(key, title)`` in a fixed order.

    ``cache`` (the grid's, for the Study's current rows) remembers which variables get a panel,
    so a refit over the same rows does not look at every column again.
    """
    out = [("fitted", "Residual by fitted value")]
    for name, s in study.panel_variables().items():
        kind = cache.kinds.get(name) if cache is not None else None
        if kind is None:
            kind = ""
            if _is_numeric(s):
                if np.isfinite(_float(s)).any():
                    kind = "var"
            elif s.nunique(dropna=False) <= _MAX_LEVELS:
                kind = "group"
            if cache is not None:
                cache.kinds[name] = kind
        if kind:
            out.append((f"{kind}:{name}", f"Residual by {name}"))
    out += [("qq", "Quantile check (studentized)"), ("spread", "Spread by fitted value"),
            ("influence", "Influence map (leverage × studentized, Cook contours)")]
    if study.time_values is not None:
        out.append(("memory", "Residual memory (autocorrelation by lag)"))
    for term in _numeric_terms(study):
        out.append((f"partial:{term}", f"Partial residual: {term}"))
    return out


def _numeric_terms(study: Any) -> list[str]:
    """Model terms that are one numeric column (the ones with a partial residual plot)."""
    names = set(study.fit.params.index)
    return [t for t in study.terms if t in names]


# ---------------------------------------------------------------------------------------------
# reading one Study state
# ---------------------------------------------------------------------------------------------
class _Memo:
    """Ranges and density-cell codes of arrays, found again by the array's identity.

    Entries keep their array alive, so an identity cannot be reused by another array.
    """

    def __init__(self):
        self._store: dict = {}

    def get(self, a: np.ndarray, key: tuple, make: Callable[[], Any]) -> Any:
        hit = self._store.get((id(a),) + key)
        if hit is not None and hit[0] is a:
            return hit[1]
        value = make()
        self._store[(id(a),) + key] = (a, value)
        return value


class _RowCache:
    """What a refit does not change while the fitted rows stay the same.

    Per panel key: the x values of variables and model terms (and level codes of groups), with
    their ranges and density-cell codes; which variables get a panel; the normal plotting
    positions for a given number of rows.  Only residual-dependent parts are computed anew.
    """

    def __init__(self, study: Any):
        self.data = study.data
        self.rows: pd.Index = study.rows
        self.kinds: dict = {}
        self.values: dict = {}
        self.positions: dict = {}
        self.memo = _Memo()
        self._owned: dict = {}  # id -> array (kept, so an id always means its array)

    def fits(self, study: Any) -> bool:
        """Whether ``study``'s data and fitted rows are the ones cached here."""
        rows = study.rows
        return study.data is self.data and (rows is self.rows or rows.equals(self.rows))

    def keep(self, key: str, value: Any, x: np.ndarray) -> Any:
        self.values[key] = value
        self._owned[id(x)] = x
        return value

    def owns(self, a: np.ndarray) -> bool:
        return self._owned.get(id(a)) is a

    def blom(self, m: int) -> np.ndarray:
        """Normal quantiles at Blom's plotting positions (i - 3/8) / (m + 1/4), i = 1..m
        (common practice for normal Q-Q plots); ndtri is the normal quantile function."""
        hit = self.positions.get(m)
        if hit is None:
            hit = special.ndtri((np.arange(1, m + 1) - 0.375) / (m + 0.25))
            self.positions = {m: hit}  # one row count at a time
        return hit


class _Snapshot:
    """Arrays of one Study state, read once per refresh and shared by the panels."""

    def __init__(self, study: Any, *, budget: int, seed: int, cache: _RowCache | None = None):
        self.study = study
        self.rows: pd.Index = study.rows
        self.cache = cache if cache is not None and cache.fits(study) else _RowCache(study)
        self.memo = _Memo()
        self.built: dict[str, PanelData] = {}  # panel key -> data, as the grid builds them
        fit = study.fit
        self.fit_obj = fit
        self.influence_obj = study.influence
        self.resid = self._on_rows(fit.resid)
        self.fitted = self._on_rows(fit.fitted)
        infl = study.influence
        if not infl.index.equals(self.rows):
            infl = infl.reindex(self.rows)
        self.influence = infl
        self.drawn: DrawnPoints = choose_points(infl, budget=budget, seed=seed)
        self._variables: dict | None = None
        self._scores: pd.DataFrame | None = None
        self._score_rows: dict | None = None
        self._checks: pd.DataFrame | None = None

    def _on_rows(self, s: pd.Series) -> np.ndarray:
        if not s.index.equals(self.rows):
            s = s.reindex(self.rows)
        return s.to_numpy(dtype=float)

    def _memo_for(self, a: np.ndarray) -> _Memo:
        return self.cache.memo if self.cache.owns(a) else self.memo

    def extent(self, a: np.ndarray) -> tuple[float, float] | None:
        """Finite min and max of one of this state's arrays (remembered)."""
        return self._memo_for(a).get(a, ("extent",), lambda: _extent(a))

    def range(self, a: np.ndarray) -> tuple[float, float]:
        """The padded range a panel shows for ``a``."""
        return _padded([self.extent(a)])

    def row_offsets(self, a: np.ndarray, value_range: tuple[float, float],
                    bins: tuple[int, int]) -> np.ndarray:
        """``codes(a, value_range, bins[1]) * (bins[0] + 1)`` as intp, the row part of a cell
        index in :func:`afterfit.view.sampling.density_of_codes` (remembered)."""
        value_range = (float(value_range[0]), float(value_range[1]))
        nx, ny = bins
        return self._memo_for(a).get(
            a, ("offsets", value_range, nx, ny),
            lambda: np.multiply(self.codes(a, value_range, ny), nx + 1, dtype=np.intp))

    def codes(self, a: np.ndarray, value_range: tuple[float, float], n: int) -> np.ndarray:
        """Density-cell codes of ``a`` (see :func:`afterfit.view.sampling.bin_codes`)."""
        value_range = (float(value_range[0]), float(value_range[1]))
        return self._memo_for(a).get(a, ("codes", value_range, n),
                                     lambda: bin_codes(a, value_range=value_range, n=n))

    @property
    def variables(self) -> dict:
        if self._variables is None:
            self._variables = self.study.panel_variables()
        return self._variables

    @property
    def scores(self) -> pd.DataFrame:
        if self._scores is None:
            try:
                table = self.study.pattern_scores()
            except Exception as exc:  # a missing score must not take the grid down
                table = pd.DataFrame(columns=["score", "pvalue", "kind"])
                table.attrs["error"] = str(exc)
            self._scores = table[~table.index.duplicated()]
        return self._scores

    @property
    def checks(self) -> pd.DataFrame:
        """The specification checks that score panels (only those: the others can take seconds
        on large tables and are computed later, for the export)."""
        if self._checks is None:
            try:
                try:
                    self._checks = self.study.checks(only=GRID_CHECKS)
                except TypeError:  # a Study-like object without the only= option
                    self._checks = self.study.checks()
            except Exception:
                self._checks = pd.DataFrame(columns=["statistic", "pvalue"])
        return self._checks

    def score_of(self, name: str) -> Score:
        """The pattern score of the residuals against variable ``name`` (or "fitted")."""
        if self._score_rows is None:
            t = self.scores
            nan = np.full(len(t), np.nan)
            score = _float(t["score"]) if "score" in t else nan
            pvalue = _float(t["pvalue"]) if "pvalue" in t else nan
            self._score_rows = dict(zip(t.index, zip(score.tolist(), pvalue.tolist())))
        hit = self._score_rows.get(name)
        if hit is not None:
            return Score(hit[0], hit[1], "pattern score (η²)")
        return Score(np.nan, np.nan, "pattern score")

    def check_score(self, name: str) -> Score:
        """A panel's score read from the specification check called ``name``."""
        t = self.checks
        if t is None or name not in t.index:
            return Score(np.nan, np.nan, name)
        row = t.loc[name]
        value = pd.to_numeric(pd.Series([row.get("statistic")]), errors="coerce").iloc[0]
        p = pd.to_numeric(pd.Series([row.get("pvalue")]), errors="coerce").iloc[0]
        return Score(float(value), float(p), name)

    def influence_score(self) -> Score:
        cooks = self.influence["cooks_d"].to_numpy(dtype=float)
        flagged = np.zeros(len(cooks), dtype=bool)
        for c in self.influence.columns:
            if str(c).startswith("flag_"):
                flagged |= self.influence[c].to_numpy(dtype=bool)
        n_flag = int(flagged.sum())
        top = float(np.nanmax(cooks)) if np.isfinite(cooks).any() else float("nan")
        # Cook's distance of 1 or more: look at the row first (common practice)
        return Score(top, np.nan, "largest Cook's D", note=f"{n_flag:,} flagged row(s)",
                     strong=bool(top >= 1.0))


def _smoother(study: Any, name: str, levels: tuple = ()) -> pd.DataFrame | None:
    try:
        sm = study.binned_means(name)
    except Exception:
        return None
    if sm is None or len(sm) == 0 or not {"centre", "mean"} <= set(sm.columns):
        return None
    # plain arrays: a few small frames per panel, and pandas' per-column overhead adds up
    if levels:
        lookup = {lvl: i for i, lvl in enumerate(levels)}
        centre = np.array([lookup.get(_level_name(c), np.nan) for c in sm["centre"]], dtype=float)
    else:
        centre = _float(sm["centre"])
    cols = {"centre": centre}
    for c in ("mean", "lower", "upper"):
        cols[c] = _float(sm[c] if c in sm else sm["mean"])
    keep = np.isfinite(cols["centre"]) & np.isfinite(cols["mean"])
    if not keep.any():
        return None
    order = np.argsort(cols["centre"][keep], kind="stable")
    return pd.DataFrame({c: v[keep][order] for c, v in cols.items()})


def _zero_guide(x_range: tuple[float, float]) -> tuple[np.ndarray, np.ndarray]:
    x = np.linspace(x_range[0], x_range[1], 2)
    return x, np.zeros(2)


def build_panel(snap: _Snapshot, key: str, title: str) -> PanelData:
    """The data of panel ``key`` for one Study state."""
    study = snap.study
    resid = snap.resid
    score = _score_for(snap, key)
    if key == "fitted":
        x = snap.fitted
        return PanelData(key, title, "scatter", x, resid, "fitted value", "residual", score,
                         smoother=_smoother(study, "fitted"),
                         guides=(_zero_guide(snap.range(x)),))
    cache = snap.cache
    if key.startswith("var:"):
        name = key[4:]
        x = cache.values.get(key)
        if x is None:  # the values of a column do not change while the rows stay the same
            x = _float(snap.variables[name])
            cache.keep(key, x, x)
        return PanelData(key, title, "scatter", x, resid, str(name), "residual", score,
                         smoother=_smoother(study, name), guides=(_zero_guide(snap.range(x)),))
    if key.startswith("group:"):
        name = key[6:]
        hit = cache.values.get(key)
        if hit is None:
            s = snap.variables[name]
            codes, uniques = pd.factorize(s, sort=True, use_na_sentinel=False)
            levels = tuple(_level_name(u) for u in uniques)
            # a fixed, even spread inside each level (no random numbers: it never moves)
            jitter = ((np.arange(len(codes)) * _GOLDEN) % 1.0 - 0.5) * 0.56
            x = codes.astype(float) + jitter
            hit = cache.keep(key, (x, levels), x)
        x, levels = hit
        return PanelData(key, title, "strip", x, resid, str(name), "residual", score,
                         levels=levels, smoother=_smoother(study, name, levels),
                         guides=((np.array([-0.5, len(levels) - 0.5]), np.zeros(2)),))
    infl = snap.influence
    if key == "qq":
        y = infl["student_ext"].to_numpy(dtype=float)
        x = np.full(len(y), np.nan)
        ok = np.isfinite(y)
        m = int(ok.sum())
        if m:
            at = np.flatnonzero(ok) if m < len(y) else None
            x_ok = np.empty(m)
            x_ok[_stable_order(y[ok] if at is not None else y)] = cache.blom(m)
            if at is None:
                x = x_ok
            else:
                x[at] = x_ok
        # the line y = x across the normal quantiles drawn
        line = np.linspace(*_padded([snap.extent(x)], pad=0.0), 2)
        return PanelData(key, title, "scatter", x, y, "normal quantile",
                         "studentized residual (external)", score, guides=((line, line),))
    if key == "spread":
        y = np.sqrt(np.abs(infl["student_int"].to_numpy(dtype=float)))
        return PanelData(key, title, "scatter", snap.fitted, y, "fitted value",
                         "√|studentized residual|", score)
    if key == "influence":
        h = infl["leverage"].to_numpy(dtype=float)
        r = infl["student_int"].to_numpy(dtype=float)
        guides = _cook_guides(h, r, study.fit.rank)
        if not guides:
            score = replace(score, note=score.note + " · no row near Cook's D 0.5 (no contour)")
        return PanelData(key, title, "scatter", h, r, "leverage", "studentized residual", score,
                         guides=guides)
    if key == "memory":
        acf = study.acf()
        lags = acf["lag"].to_numpy(dtype=float)
        band = float(acf["band"].iloc[0]) if "band" in acf and len(acf) else float("nan")
        xs = np.array([0.5, lags.max() + 0.5 if len(lags) else 1.5])
        guides = ((xs, np.zeros(2)),)
        if np.isfinite(band):
            guides += ((xs, np.full(2, band)), (xs, np.full(2, -band)))
        return PanelData(key, title, "bars", lags, acf["acf"].to_numpy(dtype=float), "lag",
                         "autocorrelation", score, guides=guides)
    if key.startswith("partial:"):
        term = key[8:]
        pr = study.partial_residuals(term)
        if not pr.index.equals(snap.rows):
            pr = pr.reindex(snap.rows)
        x = pr["x"].to_numpy(dtype=float)
        known = cache.values.get(key)
        if known is not None and _same_values(known, x):
            x = known  # the term's column over the same rows: its ranges and codes are kept
        else:
            cache.keep(key, x, x)
        y = pr["partial"].to_numpy(dtype=float)
        b = float(study.fit.params.get(term, np.nan))
        xr = np.linspace(*_padded([snap.extent(x)], pad=0.0), 2)
        guides = ((xr, b * xr),) if np.isfinite(b) else ()
        smoother = None
        if term in snap.variables and np.isfinite(b):
            sm = _smoother(study, term)
            if sm is not None:
                # residual means plus the term's own line: the smoother in partial units
                shift = b * sm["centre"]
                smoother = sm.assign(mean=sm["mean"] + shift, lower=sm["lower"] + shift,
                                     upper=sm["upper"] + shift)
        return PanelData(key, title, "scatter", x, y, term, "component + residual", score,
                         smoother=smoother, guides=guides)
    raise KeyError(f"no panel called {key!r}")


def _stable_order(v: np.ndarray) -> np.ndarray:
    """``np.argsort(v, kind="stable")`` for finite ``v``, faster when ties are few.

    The default sort is several times faster than the stable one on a million values; ties
    (rare in studentized residuals) are then put back in row order run by run.
    """
    order = np.argsort(v)
    s = v[order]
    tied = np.flatnonzero(s[1:] == s[:-1])
    if tied.size == 0:
        return order
    # runs of equal sorted values: s[a] == ... == s[b - 1]
    gap = np.diff(tied) > 1
    starts = tied[np.r_[True, gap]]
    if len(starts) > 2_000:
        return np.argsort(v, kind="stable")
    ends = tied[np.r_[gap, True]] + 2
    for a, b in zip(starts, ends):
        order[a:b] = np.sort(order[a:b])
    return order


def _same_values(known: np.ndarray, x: np.ndarray) -> bool:
    """Whether ``x`` holds the values of ``known`` (all of them for small arrays, else a fixed
    spread of 256 rows and both ends; enough to tell two different columns apart)."""
    if known.shape != x.shape:
        return False
    if len(x) > 4096:
        at = np.r_[np.linspace(0, len(x) - 1, 256).astype(np.int64)]
        return bool(np.array_equal(known[at], x[at], equal_nan=True))
    return bool(np.array_equal(known, x, equal_nan=True))


def _cook_guides(h: np.ndarray, r: np.ndarray, p: int) -> tuple:
    """Curves where Cook's distance equals each level: r = ±sqrt(D p (1 - h) / h)."""
    hmax = float(np.nanmax(h)) if np.isfinite(h).any() else 0.5
    hmax = min(max(hmax * 1.05, 0.05), 0.999)
    ylim = max(float(np.nanmax(np.abs(r))) if np.isfinite(r).any() else 3.0, 3.0)
    out = []
    for d in _COOK_LEVELS:
        # start where the curve enters the panel's vertical range
        h0 = d * p / (ylim**2 + d * p)
        if h0 >= hmax:
            continue
        hh = np.linspace(h0, hmax, _GUIDE_POINTS)
        rr = np.sqrt(d * p * (1 - hh) / hh)
        out += [(hh, rr), (hh, -rr)]
    return tuple(out)


# ---------------------------------------------------------------------------------------------
# one panel's widgets
# ---------------------------------------------------------------------------------------------
class PanelView:
    """One place on the grid: a bqplot figure, its header (subtitle, pin, hide) and its brush.

    A place shows whichever panel ranks there (``key``, ``kind``); its widgets are created once
    and reused for every refresh and every panel that comes to this place, so a refit or a move
    only sends new arrays (as binary buffers) and new axis bounds, and the page never builds a
    figure again.  It holds the marks of every kind of panel (dots and bars) and shows those of
    its current kind.

    The marks sit on fixed unit scales (``mx``, ``my``: 0 to 1 across the plot area) and get
    their coordinates already scaled; the axes and the brush use scales in data units (``xs``,
    ``ys``) that no mark listens to.  A new data range then redraws the two axes only, and each
    mark is redrawn once, when its own data arrive (a scale shared with the marks would redraw
    every mark of the panel again for each scale that changes).
    """

    def __init__(self, key: str | None, kind: str, *, on_brush: Callable, on_pin: Callable,
                 on_hide: Callable):
        self.key = key
        self.kind = kind
        self.data: PanelData | None = None
        self.drawn = np.empty(0, dtype=np.int64)
        self.extra = np.empty(0, dtype=np.int64)
        self.x_range = (0.0, 1.0)
        self.y_range = (0.0, 1.0)
        self.xs = bq.LinearScale(min=0.0, max=1.0, allow_padding=False)
        self.ys = bq.LinearScale(min=0.0, max=1.0, allow_padding=False)
        self.mx = bq.LinearScale(min=0.0, max=1.0, allow_padding=False)
        self.my = bq.LinearScale(min=0.0, max=1.0, allow_padding=False)
        sc = {"x": self.mx, "y": self.my}
        self.x_axis = bq.Axis(scale=self.xs, label="", grid_color=PALETTE["grid"],
                              color=PALETTE["axis"], label_color=PALETTE["axis"],
                              tick_style=_TICK_STYLE, label_offset="32px", tick_format="~g")
        self.y_axis = bq.Axis(scale=self.ys, side="left", label="",
                              grid_color=PALETTE["grid"], color=PALETTE["axis"],
                              label_color=PALETTE["axis"], tick_style=_TICK_STYLE,
                              label_offset="42px", tick_format="~g")
        # the density shade is one PNG per panel: the page only decodes and scales it
        self.shade = np.zeros((2, 2), dtype=np.float32)
        self.density = bq.Image(image=W.Image(value=_png(np.zeros((1, 1, 4), np.uint8)),
                                              format="png"),
                                x=np.array([0.0, 1.0]), y=np.array([0.0, 1.0]), scales=sc,
                                pixelated=True, visible=False)
        self.band = bq.Lines(x=np.zeros((2, 2)), y=np.zeros((2, 2)), scales=sc, fill="between",
                             colors=[PALETTE["smoother"]], fill_colors=[PALETTE["smoother"]],
                             fill_opacities=[0.14], stroke_width=0, visible=False)
        self.guides = bq.Lines(x=np.zeros((1, 2)), y=np.zeros((1, 2)), scales=sc,
                               colors=[PALETTE["guide"]], stroke_width=1.2, line_style="dashed",
                               visible=False)
        self.smooth = bq.Lines(x=np.zeros((1, 2)), y=np.zeros((1, 2)), scales=sc,
                               colors=[PALETTE["smoother"]], stroke_width=2.2, visible=False)
        self.bars = bq.Bars(x=np.zeros(1), y=np.zeros(1), scales=sc, colors=[PALETTE["bar"]],
                            padding=0.35, stroke_width=0, visible=False)
        # Without names, bqplot labels each dot "Dot<i>" (hidden) and rewrites every label on
        # every redraw; one empty name (and dots keyed by position) leaves them empty.
        quiet = {"names": np.array([""]), "names_unique": False, "display_names": False}
        self.scatter = bq.Scatter(
            x=np.zeros(0), y=np.zeros(0), scales=sc, colors=[PALETTE["dot"]],
            opacities=[0.7], default_size=16, stroke_width=0,
            selected_style={"fill": PALETTE["selected"], "opacity": 1.0},
            unselected_style={"opacity": 0.25}, **quiet,
        )
        self.spot = bq.Scatter(x=np.zeros(0), y=np.zeros(0), scales=sc,
                               colors=[PALETTE["selected"]], opacities=[0.85], default_size=16,
                               stroke_width=0, **quiet)
        self.selector = bq.interacts.BrushSelector(x_scale=self.xs, y_scale=self.ys,
                                                   marks=[self.scatter],
                                                   color=PALETTE["selected"])
        self.selector.observe(lambda ch: on_brush(self, ch), names=["brushing"])
        # the smoother is drawn over the dots: it is the summary the eye should find first
        self.figure = bq.Figure(
            marks=[self.density, self.band, self.guides, self.bars, self.scatter, self.smooth,
                   self.spot],
            axes=[self.x_axis, self.y_axis], title="", title_style=_TITLE_STYLE,
            background_style={"fill": PALETTE["paper"]}, interaction=None,
            fig_margin={"top": 30, "bottom": 44, "left": 60, "right": 16},
            padding_x=0.0, padding_y=0.0, animation_duration=0,
            layout=W.Layout(width="100%", height="280px"),
        )
        self._style_kind(kind)
        self.subtitle = W.Label("", style={"font_size": "11px", "text_color": PALETTE["muted"]},
                                layout=W.Layout(flex="1 1 auto", overflow="hidden"))
        self.pin = W.ToggleButton(False, icon="thumb-tack", tooltip="Keep this panel at the top",
                                  layout=W.Layout(width="30px", height="24px", padding="0"))
        self.hide = W.Button(icon="eye-slash", tooltip="Hide this panel (restore it below the grid)",
                             layout=W.Layout(width="30px", height="24px", padding="0"))
        self.pin.observe(lambda ch: on_pin(self.key, bool(ch["new"])) if self.key else None,
                         names=["value"])
        self.hide.on_click(lambda _b: on_hide(self.key) if self.key else None)
        header = W.HBox([self.subtitle, self.pin, self.hide],
                        layout=W.Layout(align_items="center", padding="2px 6px 0 8px"))
        self.box = W.VBox([header, self.figure], layout=W.Layout(
            border=f"1px solid {PALETTE['panel_border']}", margin="0", padding="0",
            min_width="300px"))
        self.box.add_class("afterfit-panel")  # a stable hook for the browser tests

    @property
    def dots(self) -> Any:
        """The mark of the rows (a Scatter), or of the lags for a "bars" panel (Bars)."""
        return self.bars if self.kind == "bars" else self.scatter

    @property
    def highlight(self) -> Any:
        """Selected rows that are not among the dots (None for a "bars" panel: no rows)."""
        return None if self.kind == "bars" else self.spot

    @property
    def brush(self) -> Any:
        """The brush (None for a "bars" panel: lags are not rows)."""
        return None if self.kind == "bars" else self.selector

    def assign(self, key: str, kind: str) -> None:
        """Show panel ``key`` here from now on (its data follow with :meth:`show`)."""
        self.key = key
        self.data = None
        self.drawn = np.empty(0, dtype=np.int64)
        self.extra = np.empty(0, dtype=np.int64)
        self.clear_brush()
        self.kind = kind  # its styles go to the page with the data (see show)

    def _style_kind(self, kind: str) -> None:
        points = kind != "bars"
        with _held([self.band, self.bars, self.scatter, self.spot, self.figure, self.x_axis]):
            if kind == "strip":
                # per level: a vertical band segment (drawn thick, translucent)
                _set(self.band, "fill", "none")
                _set(self.band, "stroke_width", 7.0)
                _set(self.band, "opacities", [0.22])
            else:
                _set(self.band, "fill", "between")
                _set(self.band, "stroke_width", 0.0)
                _set(self.band, "opacities", [1.0])
            _set(self.bars, "visible", not points)
            _set(self.scatter, "visible", points)
            _set(self.spot, "visible", points)
            _set(self.figure, "interaction", self.selector if points else None)
            _set(self.x_axis, "tick_format", "~g" if points else "d")
            if not points:
                _set(self.x_axis, "tick_values", None)
                _set(self.x_axis, "tick_labels", {})

    # -- data ---------------------------------------------------------------------------------
    def to_data(self, axis: str, values) -> np.ndarray:
        """Mark coordinates (unit scale) of ``axis`` "x" or "y" back in data units."""
        lo, hi = self.x_range if axis == "x" else self.y_range
        return lo + np.asarray(values, dtype=float) * (hi - lo)

    def _unit(self, axis: str, values) -> np.ndarray:
        lo, hi = self.x_range if axis == "x" else self.y_range
        return (np.asarray(values, dtype=float) - lo) / (hi - lo)

    def show(self, data: PanelData, drawn: DrawnPoints, *, snap: "_Snapshot | None" = None) -> None:
        """Send ``data`` to the page; ``drawn`` chooses which rows become dots.

        ``snap`` (the state ``data`` was built from) remembers ranges and density-cell codes of
        arrays that several panels share or that a refit does not change.
        """
        self.data = data
        x, y = data.x, data.y
        extent = snap.extent if snap is not None else _extent
        if data.kind == "strip":
            x_range = (-0.5, len(data.levels) - 0.5)
        elif data.kind == "bars":
            x_range = (0.0, float(np.nanmax(x)) + 1.0 if len(x) else 2.0)
        else:
            x_range = _padded([extent(x)])
        extents = [extent(y)]
        if data.smoother is not None:
            extents += [_extent(data.smoother["lower"].to_numpy(dtype=float)),
                        _extent(data.smoother["upper"].to_numpy(dtype=float))]
        if data.kind == "bars":
            extents.append((0.0, 0.0))
        self.x_range = (float(x_range[0]), float(x_range[1]))
        self.y_range = _padded(extents)
        self.kind = data.kind
        widgets = [self.density, self.band, self.guides, self.smooth, self.bars, self.scatter,
                   self.spot, self.x_axis, self.y_axis, self.figure, self.xs, self.ys]
        replaced = None
        with _held(widgets):
            self._style_kind(data.kind)
            _set(self.xs, "min", self.x_range[0])
            _set(self.xs, "max", self.x_range[1])
            _set(self.ys, "min", self.y_range[0])
            _set(self.ys, "max", self.y_range[1])
            _set(self.figure, "title", data.title)
            # long titles get a smaller font rather than being cut at the panel's edge
            size = "13px" if len(data.title) <= 34 else "11px"
            if self.figure.title_style.get("font-size") != size:
                self.figure.title_style = {**_TITLE_STYLE, "font-size": size}
            _set(self.x_axis, "label", data.x_label)
            _set(self.y_axis, "label", data.y_label)
            if data.kind == "strip":
                k = len(data.levels)
                step = max(1, math.ceil(k / _MAX_LEVEL_TICKS))
                ticks = np.arange(0, k, step, dtype=float)
                _set(self.x_axis, "tick_values", ticks)
                _set(self.x_axis, "tick_labels",
                     {str(int(t)): _short(data.levels[int(t)]) for t in ticks})
            elif data.kind == "bars":
                pass  # whole lags, with the axis's own ticks
            else:
                # about five round ticks: a panel is narrow and long labels would run together
                _set(self.x_axis, "tick_values", _round_ticks(*self.x_range))
                _set(self.x_axis, "tick_labels", {})
            self._show_guides(data.guides)
            self._show_smoother(data)
            if data.kind == "bars":
                _set(self.bars, "x", self._unit("x", x))
                _set(self.bars, "y", self._unit("y", np.nan_to_num(y)))
                _set(self.bars, "base", float(self._unit("y", 0.0)))
                _set(self.density, "visible", False)
            else:
                pos = drawn.positions
                xp, yp = x[pos], y[pos]
                ok = np.isfinite(xp) & np.isfinite(yp)
                self.drawn = pos[ok]
                _set(self.scatter, "selected", None)
                _set(self.scatter, "x", self._unit("x", xp[ok]))
                _set(self.scatter, "y", self._unit("y", yp[ok]))
                replaced = self._show_density(data, drawn, snap)
        if replaced is not None:  # after the mark has taken the new image
            replaced.close()

    def _show_guides(self, guides: tuple) -> None:
        if not guides:
            _set(self.guides, "visible", False)
            return
        gx = [self._unit("x", g[0]) for g in guides]
        gy = [self._unit("y", g[1]) for g in guides]
        m = max(len(a) for a in gx)
        xs = np.vstack([np.interp(np.linspace(0, 1, m), np.linspace(0, 1, len(a)), a) for a in gx])
        ys = np.vstack([np.interp(np.linspace(0, 1, m), np.linspace(0, 1, len(a)), a) for a in gy])
        colors = [PALETTE["cook" if self.key == "influence" else "guide"]] * len(gx)
        _set(self.guides, "x", xs)
        _set(self.guides, "y", ys)
        _set(self.guides, "colors", colors)
        _set(self.guides, "visible", True)

    def _show_smoother(self, data: PanelData) -> None:
        sm = data.smoother
        if sm is None:
            _set(self.smooth, "visible", False)
            _set(self.band, "visible", False)
            return
        c = self._unit("x", sm["centre"].to_numpy(dtype=float))
        m = self._unit("y", sm["mean"].to_numpy(dtype=float))
        lo = self._unit("y", sm["lower"].to_numpy(dtype=float))
        hi = self._unit("y", sm["upper"].to_numpy(dtype=float))
        if data.kind == "strip":
            # per level: a short bar at the mean and a vertical band of its interval
            half = 0.34 / (self.x_range[1] - self.x_range[0])
            _set(self.smooth, "x", np.column_stack([c - half, c + half]))
            _set(self.smooth, "y", np.column_stack([m, m]))
            _set(self.smooth, "colors", [PALETTE["smoother"]] * len(c))
            _set(self.band, "x", np.column_stack([c, c]))
            _set(self.band, "y", np.column_stack([lo, hi]))
            _set(self.band, "colors", [PALETTE["smoother"]] * len(c))
        else:
            _set(self.smooth, "x", c[None, :])
            _set(self.smooth, "y", m[None, :])
            _set(self.band, "x", np.vstack([c, c]))
            _set(self.band, "y", np.vstack([lo, hi]))
        _set(self.smooth, "visible", True)
        _set(self.band, "visible", bool(np.isfinite(lo).any() and np.isfinite(hi).any()))

    def _show_density(self, data: PanelData, drawn: DrawnPoints, snap) -> Any:
        """Draw the density shade; returns the image widget it replaced (to be closed)."""
        if drawn.complete:
            _set(self.density, "visible", False)
            return None
        bins = (60 if data.kind != "strip" else max(2, 8 * len(data.levels)), 40)
        xr, yr = self.x_range, self.y_range
        if snap is not None:
            ix = snap.codes(data.x, xr, bins[0])
            # most panels share the residuals (and their range): their row offsets once
            iy = snap.row_offsets(data.y, yr, bins)
        else:
            ix = bin_codes(data.x, value_range=xr, n=bins[0])
            iy = bin_codes(data.y, value_range=yr, n=bins[1])
        d = density_of_codes(ix, iy, x_range=xr, y_range=yr, bins=bins)
        _set(self.density, "visible", True)
        if np.array_equal(d.shade, self.shade):
            return None
        self.shade = d.shade
        # The mark follows a new image widget, not a new value of its widget: a fresh one
        # arrives with its pixels, so the page never shows an image before its data.
        old = self.density.image
        self.density.image = W.Image(value=_shade_png(d.shade), format="png")
        return old

    # -- selection ----------------------------------------------------------------------------
    def brushed_mask(self) -> np.ndarray | None:
        """Rows (over the fitted rows) inside this panel's brushed range; None when cleared."""
        b, d = self.brush, self.data
        if b is None or d is None:
            return None
        sx, sy = b.selected_x, b.selected_y
        if sx is None or sy is None or len(sx) < 2 or len(sy) < 2:
            return None
        x0, x1 = sorted(float(v) for v in sx[:2])
        y0, y1 = sorted(float(v) for v in sy[:2])
        with np.errstate(invalid="ignore"):
            return (d.x >= x0) & (d.x <= x1) & (d.y >= y0) & (d.y <= y1)

    def highlight_rows(self, mask: np.ndarray | None, *, seed: int) -> None:
        """Mark the selected rows: drawn dots change colour, others are drawn on top (capped)."""
        if self.highlight is None or self.data is None:
            return
        if mask is None:
            with self.dots.hold_sync(), self.highlight.hold_sync():
                _set(self.dots, "selected", None)
                _set(self.highlight, "x", np.zeros(0))
                _set(self.highlight, "y", np.zeros(0))
            self.extra = np.empty(0, dtype=np.int64)
            return
        inside = np.flatnonzero(mask[self.drawn])
        others = np.flatnonzero(mask)
        others = others[~np.isin(others, self.drawn)]
        x, y = self.data.x, self.data.y
        others = others[np.isfinite(x[others]) & np.isfinite(y[others])]
        if len(others) > _HIGHLIGHT_CAP:
            rng = np.random.default_rng(seed)
            others = np.sort(rng.choice(others, size=_HIGHLIGHT_CAP, replace=False))
        self.extra = others
        with self.dots.hold_sync(), self.highlight.hold_sync():
            _set(self.dots, "selected", inside.astype(np.int32))
            _set(self.highlight, "x", self._unit("x", x[others]))
            _set(self.highlight, "y", self._unit("y", y[others]))

    def clear_brush(self) -> None:
        """Remove this panel's brush rectangle (another panel holds the selection now)."""
        b = self.selector
        if b.selected_x is not None or b.selected_y is not None:
            with b.hold_sync():
                b.selected_x = None
                b.selected_y = None


def _png(rgba: np.ndarray) -> bytes:
    """PNG bytes of an ``(height, width, 4)`` uint8 RGBA image, top row first (PNG 1.2: IHDR
    with 8-bit RGBA, one zlib IDAT of rows each led by filter type 0, IEND)."""
    h, w, _ = rgba.shape
    raw = np.zeros((h, 4 * w + 1), dtype=np.uint8)
    raw[:, 1:] = rgba.reshape(h, 4 * w)

    def chunk(tag: bytes, body: bytes) -> bytes:
        return (struct.pack(">I", len(body)) + tag + body
                + struct.pack(">I", zlib.crc32(tag + body) & 0xFFFFFFFF))

    return (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", struct.pack(">IIBBBBB", w, h, 8, 6, 0, 0, 0))
            + chunk(b"IDAT", zlib.compress(raw.tobytes(), 6)) + chunk(b"IEND", b""))


def _shade_png(shade: np.ndarray) -> bytes:
    """The density shade as a PNG: one pixel per cell, the palette's colour with an opacity
    in proportion to ``shade`` (sqrt of the count), the largest at the palette's opacity."""
    rgb, top = PALETTE["density"]
    ny, nx = shade.shape
    rgba = np.empty((ny, nx, 4), dtype=np.uint8)
    rgba[..., :3] = rgb
    peak = max(float(shade.max(initial=0.0)), 1.0)
    # PNG rows run top down; the shade's first row is the lowest y cell
    rgba[..., 3] = np.rint(shade[::-1] * (255 * top / peak)).astype(np.uint8)
    return _png(rgba)


def _set(widget: Any, name: str, value: Any) -> None:
    """Set a trait only when the value differs, so nothing unchanged is sent or redrawn.

    (traitlets cannot compare arrays and would send every array again.)
    """
    old = getattr(widget, name)
    if isinstance(value, np.ndarray) or isinstance(old, np.ndarray):
        if (isinstance(value, np.ndarray) and isinstance(old, np.ndarray)
                and value.shape == old.shape and value.dtype == old.dtype
                and np.array_equal(value, old, equal_nan=value.dtype.kind == "f")):
            return
    elif old is value or (type(old) is type(value) and old == value):
        return
    setattr(widget, name, value)


class _held:
    """Hold the sync of several widgets at once (one message per widget, sent on exit)."""

    def __init__(self, widgets: list):
        self.widgets = widgets
        self.contexts: list = []

    def __enter__(self):
        for w in self.widgets:
            c = w.hold_sync()
            c.__enter__()
            self.contexts.append(c)
        return self

    def __exit__(self, *exc):
        while self.contexts:
            self.contexts.pop().__exit__(*exc)
        return False


def _round_ticks(lo: float, hi: float, n: int = 5) -> np.ndarray:
    """About ``n`` ticks at multiples of 1, 2 or 5 times a power of ten inside [lo, hi]."""
    span = hi - lo
    if not (np.isfinite(span) and span > 0):
        return np.array([lo])
    power = 10.0 ** math.floor(math.log10(span / n))
    step = min((m * power for m in (1, 2, 2.5, 5, 10)), key=lambda st: abs(span / st - n))
    first = math.ceil(lo / step) * step
    ticks = np.arange(first, hi + step * 1e-9, step)
    # drop the rounding noise of the multiplication (0.30000000000000004 -> 0.3)
    return np.round(ticks, max(0, -math.floor(math.log10(step)) + 2))


def _short(text: str, k: int = 16) -> str:
    return text if len(text) <= k else text[: k - 1] + "…"


# ---------------------------------------------------------------------------------------------
# the grid
# ---------------------------------------------------------------------------------------------
@dataclass
class _Layout:
    pinned: list = field(default_factory=list)
    hidden: list = field(default_factory=list)


class ResidualGrid(W.VBox):
    """Residual panels ranked by pattern score, with pinning, hiding and linked brushing.

    Parameters
    ----------
    study : Study
        The study whose current fit is drawn.
    run : callable, optional
        ``run(fn, label)`` from the Explorer; the grid itself never changes the Study.
    budget : int
        Most dots per panel (about 500 keeps a full redraw of the grid under half a second).
    max_panels : int
        Panels shown at first; a button shows more.
    seed : int, optional
        Seed of the random part of the drawn sample (default: the Study's seed).

    Attributes
    ----------
    panels : dict of key -> PanelView for the panels built so far.
    order : keys of the panels on screen, top first.
    problems : key -> message for panels the Study could not give (shown in the note line).
    selection : index labels of the brushed rows (empty when nothing is selected).
    """

    def __init__(self, study: Any, *, run: Callable | None = None, budget: int = 500,
                 max_panels: int = 12, seed: int | None = None):
        super().__init__(layout=W.Layout(width="100%"))
        self.add_class("afterfit-grid")  # a stable hook for the browser tests
        self._study = study
        self._run = run
        self.budget = int(budget)
        self.max_panels = int(max_panels)
        self.seed = int(getattr(study, "seed", 0) if seed is None else seed)
        self.panels: dict[str, PanelView] = {}
        self.order: list[str] = []
        self.titles: dict[str, str] = {}
        self.scores: dict[str, Score] = {}
        self._layout = _Layout()
        self._snap: _Snapshot | None = None
        self._recent: list[_Snapshot] = []  # the current state's snapshot and the one before
        self._built: dict[str, PanelData] = {}
        self._places: list[PanelView] = []  # the grid's places, top first
        self.problems: dict[str, str] = {}
        self._mask: np.ndarray | None = None
        self._selection = pd.Index([])
        self._source: str | None = None  # the panel holding the brush rectangle
        self._source_range: tuple | None = None
        self._busy = False
        self._listeners: list[Callable] = []
        self.cells = W.GridBox(layout=W.Layout(
            width="100%", grid_template_columns="repeat(auto-fill, minmax(330px, 1fr))",
            grid_gap="8px"))
        self.note = W.Label("", style={"font_size": "11px", "text_color": PALETTE["muted"]})
        self.more = W.Button(description="Show more panels", layout=W.Layout(width="auto"))
        self.more.on_click(lambda _b: self._show_more())
        self.hidden_pick = W.Dropdown(options=[], description="Hidden:",
                                      layout=W.Layout(width="360px"))
        self.unhide = W.Button(description="Show again", layout=W.Layout(width="auto"))
        self.unhide.on_click(lambda _b: self.show_panel(self.hidden_pick.value)
                             if self.hidden_pick.value else None)
        self.unhide_all = W.Button(description="Show all hidden", layout=W.Layout(width="auto"))
        self.unhide_all.on_click(lambda _b: self.show_all())
        self.hidden_bar = W.HBox([self.hidden_pick, self.unhide, self.unhide_all],
                                 layout=W.Layout(display="none", align_items="center"))
        self.children = [self.note, self.cells, W.HBox([self.more, self.hidden_bar])]
        self.refresh()

    @property
    def study(self) -> Any:
        """The Study drawn by this grid."""
        return self._study

    @property
    def selection(self) -> pd.Index:
        """Index labels of the selected rows (all of them, not only the drawn dots)."""
        return self._selection

    @property
    def hidden(self) -> list:
        """Keys of hidden panels, in the order they were hidden."""
        return list(self._layout.hidden)

    @property
    def pinned(self) -> list:
        """Keys of pinned panels, in the order they were pinned."""
        return list(self._layout.pinned)

    def on_select(self, fn: Callable[[pd.Index], Any]) -> Callable[[], None]:
        """Call ``fn(labels)`` after every brush (empty labels when cleared); returns a remover."""
        self._listeners.append(fn)
        return lambda: self._listeners.remove(fn) if fn in self._listeners else None

    # -- refresh ------------------------------------------------------------------------------
    def refresh(self) -> None:
        """Redraw every visible panel from the Study's current fit and re-apply the selection."""
        study = self._study
        fit, influence = study.fit, study.influence
        # The Study caches its results per state: the same fit and influence objects mean the
        # same state (a refresh without a change, undo or redo), whose panels were built here
        # already.  Otherwise the state is read anew, keeping what the rows share.
        snap = next((s for s in self._recent if s.fit_obj is fit and s.influence_obj is influence
                     and s.cache.fits(study)), None)
        if snap is None:
            old = self._snap
            snap = _Snapshot(study, budget=self.budget, seed=self.seed,
                             cache=old.cache if old is not None else None)
        for other in self._recent:
            if other is not snap:
                other.memo = _Memo()  # a state not on screen keeps its panels, not its codes
        self._recent = [snap] + [s for s in self._recent if s is not snap][:1]
        self._snap = snap
        self._built = snap.built
        self.problems = {}
        plan = panel_keys(self._study, cache=snap.cache)
        self.titles = dict(plan)
        self.scores = {key: _score_for(snap, key) for key, _title in plan}
        known = set(self.titles)
        self._layout.pinned = [k for k in self._layout.pinned if k in known]
        self._layout.hidden = [k for k in self._layout.hidden if k in known]
        self._arrange()
        # the selection follows the rows: rows excluded since are simply no longer selected
        if len(self._selection):
            mask = snap.rows.isin(self._selection)
            self._selection = snap.rows[mask]
            self._mask = mask if mask.any() else None
        else:
            self._mask = None
        self._paint_selection()

    def ranked(self) -> list[str]:
        """Every panel key, pinned first, then by score (worst first), unscored last."""
        base = list(self.titles)
        rest = sorted((k for k in base if k not in self._layout.pinned),
                      key=lambda k: self.scores[k].rank)
        return [k for k in self._layout.pinned if k in self.titles] + rest

    def _arrange(self) -> None:
        snap = self._snap
        visible = [k for k in self.ranked() if k not in self._layout.hidden]
        shown = visible[: self.max_panels]
        order = []
        for key in shown:
            if key not in self._built:
                try:
                    self._built[key] = build_panel(snap, key, self.titles[key])
                except Exception as exc:  # one panel the Study cannot give must not stop the rest
                    self.problems[key] = str(exc).strip() or type(exc).__name__
                    continue
            order.append(key)
        self.order = order
        # One place per panel on screen, in rank order: a panel that moves takes the widgets of
        # the place it moves to, which are on the page already.  (Reordering the children would
        # make the page build every figure after the first change anew.)
        while len(self._places) < len(order):
            self._places.append(PanelView(None, "scatter", on_brush=self._brushed,
                                          on_pin=self.pin, on_hide=self.hide_panel))
        self.panels = {}
        for view, key in zip(self._places, order):
            data = self._built[key]
            if view.key != key:
                view.assign(key, data.kind)
            self.panels[key] = view
            if view.pin.value != (key in self._layout.pinned):
                view.pin.value = key in self._layout.pinned
            if data.subtitle != view.subtitle.value:
                view.subtitle.value = data.subtitle
            if view.data is not data:  # pin, hide and "more" resend data, they compute nothing
                view.show(data, snap.drawn, snap=snap)
                if key == self._source and self._source_range is not None:
                    # the brush rectangle goes with its panel
                    with view.selector.hold_sync():
                        view.selector.selected_x, view.selector.selected_y = self._source_range
            _set(view.box.layout, "display", None)
        for view in self._places[len(order):]:
            _set(view.box.layout, "display", "none")
        boxes = [v.box for v in self._places]
        if list(self.cells.children) != boxes:
            self.cells.children = boxes
        n_more = len(visible) - len(shown)
        step = min(n_more, 6)
        self.more.description = (f"Show {step} more panel{'s' if step != 1 else ''}"
                                 + (f" ({n_more} not shown)" if n_more > step else ""))
        self.more.layout.display = None if n_more > 0 else "none"
        d = snap.drawn
        if d.complete:
            note = f"{d.n_rows:,} rows, all drawn. Brush a panel to select rows."
        else:
            note = (f"{d.n_rows:,} rows: each panel draws {len(d.positions):,} "
                    f"({d.n_kept:,} most extreme or influential, the rest a random sample) over "
                    "a density shade of all rows. A brush selects every row in its range.")
        if self.problems:
            note += " Not drawn: " + "; ".join(
                f"{self.titles.get(k, k)} ({msg})" for k, msg in self.problems.items())
        self.note.value = note
        hidden = self._layout.hidden
        options = tuple((self.titles[k], k) for k in hidden)
        if options != self.hidden_pick.options:
            self.hidden_pick.options = options
        if hidden and self.hidden_pick.value not in hidden:
            # the last one hidden, ready for "Show again" (new options select nothing)
            self.hidden_pick.value = hidden[-1]
        _set(self.hidden_bar.layout, "display", None if hidden else "none")

    def _show_more(self) -> None:
        self.max_panels += 6
        self._arrange()
        self._paint_selection()

    # -- pin / hide ---------------------------------------------------------------------------
    def pin(self, key: str, on: bool = True) -> None:
        """Keep panel ``key`` at the top (``on=False`` releases it)."""
        self._check_key(key)
        pinned = self._layout.pinned
        if on and key not in pinned:
            pinned.append(key)
            if key in self._layout.hidden:
                self._layout.hidden.remove(key)
        elif not on and key in pinned:
            pinned.remove(key)
        else:
            return
        self._arrange()
        self._paint_selection()

    def hide_panel(self, key: str) -> None:
        """Take panel ``key`` off the grid; it stays in the hidden list until shown again."""
        self._check_key(key)
        if key in self._layout.hidden:
            return
        self._layout.hidden.append(key)
        if key in self._layout.pinned:
            self._layout.pinned.remove(key)
        self._arrange()
        self._paint_selection()

    def show_panel(self, key: str) -> None:
        """Bring a hidden panel back."""
        if key in self._layout.hidden:
            self._layout.hidden.remove(key)
            self._arrange()
            self._paint_selection()

    def show_all(self) -> None:
        """Bring every hidden panel back."""
        if self._layout.hidden:
            self._layout.hidden.clear()
            self._arrange()
            self._paint_selection()

    def _check_key(self, key: str) -> None:
        if key not in self.titles:
            raise KeyError(f"no panel {key!r}; panels are: {', '.join(self.titles)}")

    # -- selection ----------------------------------------------------------------------------
    def _brushed(self, view: PanelView, change: dict) -> None:
        if change["new"] or self._busy:
            return  # still dragging: the work is done once, when the brush is released
        self._busy = True
        try:
            mask = view.brushed_mask()
            self._source = view.key if mask is not None else None
            b = view.selector
            self._source_range = ((list(b.selected_x), list(b.selected_y))
                                  if mask is not None else None)
            for other in self._places:
                if other is not view:
                    other.clear_brush()
            self._set_mask(mask)
        finally:
            self._busy = False
        self._announce()

    def select(self, labels) -> None:
        """Select rows by index label (rows not in the current fit are ignored)."""
        rows = self._snap.rows
        mask = rows.isin(pd.Index(labels))
        for v in self._places:
            v.clear_brush()
        self._source = None
        self._source_range = None
        self._set_mask(mask if mask.any() else None)
        self._announce()

    def clear_selection(self) -> None:
        """Select nothing."""
        self.select([])

    def _set_mask(self, mask: np.ndarray | None) -> None:
        rows = self._snap.rows
        if mask is None or not mask.any():
            self._mask = None
            self._selection = rows[:0]
        else:
            self._mask = mask
            self._selection = rows[mask]
        self._paint_selection()

    def _paint_selection(self) -> None:
        for key in self.order:
            self.panels[key].highlight_rows(self._mask, seed=self.seed)

    def _announce(self) -> None:
        for fn in list(self._listeners):
            fn(self._selection)


def _score_for(snap: _Snapshot, key: str) -> Score:
    """The score that ranks panel ``key``; cheap, so every panel can be ranked."""
    if key == "fitted":
        return snap.score_of("fitted")
    if key.startswith(("var:", "group:", "partial:")):
        # a partial residual plot shows the same leftover structure in its variable
        return snap.score_of(key.split(":", 1)[1])
    if key == "qq":
        return snap.check_score(GRID_CHECKS[0])
    if key == "spread":
        return snap.check_score(GRID_CHECKS[1])
    if key == "memory":
        return snap.check_score(GRID_CHECKS[2])
    if key == "influence":
        return snap.influence_score()
    return Score(np.nan, np.nan, "score")
