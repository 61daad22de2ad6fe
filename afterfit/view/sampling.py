"""Which fitted rows a residual panel draws as dots, and the density image of all the others.

A browser draws about 1,000 SVG dots per panel before a full redraw of the grid takes longer than
a second, so for large tables every panel draws a *sample* over a density image of every row.
The sample must never hide what the analyst is looking for: rows with extreme residuals, high
influence or any diagnostic flag are always kept, and the rest is a seeded random draw that stays
the same from one refit to the next (dots do not jump around when nothing about them changed).

Nothing here is a statistic of the model: it only chooses and counts rows.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

__all__ = ["DrawnPoints", "Density", "choose_points", "density", "bin_codes",
           "density_of_codes"]


@dataclass(frozen=True)
class DrawnPoints:
    """The rows a panel draws as dots.

    Attributes
    ----------
    positions : int64 positions into the fitted rows (``study.rows``), ascending.
    n_rows : number of fitted rows.
    n_kept : how many of ``positions`` were kept for being extreme, influential or flagged
        (the rest are a seeded random sample).
    """

    positions: np.ndarray
    n_rows: int
    n_kept: int

    @property
    def complete(self) -> bool:
        """True when every fitted row is drawn (no density image needed)."""
        return len(self.positions) == self.n_rows


@dataclass(frozen=True)
class Density:
    """Counts of rows on a regular grid, for a panel's density image.

    Attributes
    ----------
    x_centres, y_centres : centres of the grid cells (float64).
    shade : sqrt of the counts, shape ``(len(y_centres), len(x_centres))``, float32; sqrt keeps
        sparse regions visible next to dense ones.
    max_count : the largest cell count (0 when there are no finite points).
    """

    x_centres: np.ndarray
    y_centres: np.ndarray
    shade: np.ndarray
    max_count: int


def _top(values: np.ndarray, k: int) -> np.ndarray:
    """Positions of the ``k`` largest values, largest first (NaN counts as largest)."""
    n = len(values)
    k = min(k, n)
    if k <= 0:
        return np.empty(0, dtype=np.int64)
    # partition sorts NaN last, as the largest values, so no copy of the column is needed
    part = np.argpartition(values, n - k)[n - k:] if k < n else np.arange(n)
    v = values[part]
    v = np.where(np.isnan(v), np.inf, v)
    return part[np.argsort(-v, kind="stable")].astype(np.int64)


def choose_points(
    influence: pd.DataFrame, *, budget: int = 500, kept_share: float = 0.4, seed: int = 0
) -> DrawnPoints:
    """Choose at most ``budget`` fitted rows to draw as dots.

    Parameters
    ----------
    influence : the Study's influence frame (one row per fitted row, in fitted order) with
        ``student_ext``, ``cooks_d`` and boolean ``flag_*`` columns.
    budget : the most dots a panel draws.
    kept_share : the share of ``budget`` reserved for rows kept for being extreme or influential
        (top ``|student_ext|``, top ``cooks_d`` and flagged rows, taken in turn).
    seed : seed of the random part; the same seed and row count give the same draw.

    Returns
    -------
    DrawnPoints
    """
    if budget < 1:
        raise ValueError(f"budget must be at least 1 point, got {budget!r}")
    if not 0.0 <= kept_share <= 1.0:
        raise ValueError(f"kept_share must be between 0 and 1, got {kept_share!r}")
    n = len(influence)
    if n <= budget:
        return DrawnPoints(np.arange(n, dtype=np.int64), n, 0)

    n_keep = int(round(budget * kept_share))
    rankings = []
    if "student_ext" in influence:
        rankings.append(_top(np.abs(influence["student_ext"].to_numpy(dtype=float)), n_keep))
    if "cooks_d" in influence:
        cooks = influence["cooks_d"].to_numpy(dtype=float)
        rankings.append(_top(cooks, n_keep))
    else:
        cooks = np.zeros(n)
    flag_cols = [c for c in influence.columns if str(c).startswith("flag_")]
    if flag_cols:
        # column by column: no (rows x flags) copy of the frame
        any_flag = np.zeros(n, dtype=bool)
        for c in flag_cols:
            any_flag |= influence[c].to_numpy(dtype=bool)
        flagged = np.flatnonzero(any_flag)
        # many rows can carry a flag at large n: keep the most influential of them
        order = _top(cooks[flagged], n_keep)
        rankings.append(flagged[order].astype(np.int64))

    # take the rankings in turn so each kind of extreme gets its share
    kept: list[int] = []
    seen: set[int] = set()
    depth = max((len(r) for r in rankings), default=0)
    for i in range(depth):
        if len(kept) >= n_keep:
            break
        for r in rankings:
            if i < len(r) and len(kept) < n_keep:
                p = int(r[i])
                if p not in seen:
                    seen.add(p)
                    kept.append(p)

    # the random part is drawn from all rows, then the kept ones are skipped: it stays the same
    # across refits even when the kept rows change
    rng = np.random.default_rng(seed)
    draw = rng.choice(n, size=min(n, budget + len(kept)), replace=False)
    rest = [int(p) for p in draw if int(p) not in seen][: budget - len(kept)]
    positions = np.sort(np.asarray(kept + rest, dtype=np.int64))
    return DrawnPoints(positions, n, len(kept))


def bin_codes(values: np.ndarray, *, value_range: tuple[float, float], n: int) -> np.ndarray:
    """The cell (``0 .. n - 1``) of each value on ``n`` equal cells spanning ``value_range``.

    Values outside the range are clipped into the edge cells; NaN and infinite values get the
    code ``n`` (no cell).  The codes are int16 (a density grid has far fewer than 32,767 cells
    per side), so a panel can keep those of a variable from one refit to the next cheaply.
    """
    if not 2 <= n < 32767:
        raise ValueError(f"a density grid side needs 2 to 32,766 cells, got {n!r}")
    lo, hi = map(float, value_range)
    if not hi > lo:
        raise ValueError(f"empty range for the density grid: {value_range!r}")
    v = np.asarray(values, dtype=float)
    t = np.subtract(v, lo)
    t *= n / (hi - lo)
    np.clip(t, 0, n - 1, out=t)
    finite = np.isfinite(v)
    if not finite.all():
        t[~finite] = n
    return t.astype(np.int16)


def density_of_codes(
    ix: np.ndarray, iy: np.ndarray, *, x_range: tuple[float, float], y_range: tuple[float, float],
    bins: tuple[int, int],
) -> Density:
    """Count rows per cell from their x and y cell codes (see :func:`bin_codes`).

    ``iy`` may also be given as intp row offsets, ``iy * (nx + 1)``, which a caller can keep for
    several panels that share their y values.
    """
    nx, ny = bins
    x0, x1 = map(float, x_range)
    y0, y1 = map(float, y_range)
    # one spare column and row collect the rows without a cell (code n); they are dropped
    if iy.dtype == np.intp:
        cell = iy + ix
    else:
        cell = np.multiply(iy, nx + 1, dtype=np.intp)
        cell += ix
    counts = np.bincount(cell, minlength=(nx + 1) * (ny + 1))
    counts = counts[: (nx + 1) * (ny + 1)].reshape(ny + 1, nx + 1)[:ny, :nx]
    xs = x0 + (np.arange(nx) + 0.5) * (x1 - x0) / nx
    ys = y0 + (np.arange(ny) + 0.5) * (y1 - y0) / ny
    return Density(xs, ys, np.sqrt(counts).astype(np.float32), int(counts.max(initial=0)))


def density(
    x: np.ndarray, y: np.ndarray, *, x_range: tuple[float, float], y_range: tuple[float, float],
    bins: tuple[int, int] = (60, 40),
) -> Density:
    """Count the finite points ``(x, y)`` on a ``bins`` grid spanning the given ranges.

    Points outside the ranges are clipped into the edge cells (the panel's scales are set from
    the same data, so this only happens through rounding).
    """
    nx, ny = bins
    if nx < 2 or ny < 2:
        raise ValueError(f"the density grid needs at least 2 x 2 cells, got {bins!r}")
    x0, x1 = map(float, x_range)
    y0, y1 = map(float, y_range)
    if not (x1 > x0 and y1 > y0):
        raise ValueError(f"empty range for the density grid: x {x_range!r}, y {y_range!r}")
    ix = bin_codes(x, value_range=(x0, x1), n=nx)
    iy = bin_codes(y, value_range=(y0, y1), n=ny)
    return density_of_codes(ix, iy, x_range=(x0, x1), y_range=(y0, y1), bins=(nx, ny))
