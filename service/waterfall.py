"""A waterfall: stored spectra reduced to at most N rows × M frequency columns by max-pooling.

Pure numpy over plain arrays; knows nothing of the store, HTTP or frames.

Max, not mean: a line that grows must stay visible however far a view is zoomed out, so
each cell holds the largest value of the lines and spectra that fall in it (the same rule
the dashboard's spectrum plot uses per pixel column).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

__all__ = ["Waterfall", "pool_columns", "pool_rows"]


@dataclass(frozen=True, slots=True)
class Waterfall:
    """``values`` float32 [rows, cols] (NaN: no line in the cell's range); row r pools the
    spectra with t0_ns[r] <= t_ns <= t_ns[r] (``spectra[r]`` of them); column k covers
    [fmin_hz + k·w, fmin_hz + (k+1)·w) with w = (fmax_hz − fmin_hz)/cols."""

    values: np.ndarray
    t0_ns: list[int]
    t_ns: list[int]
    spectra: list[int]
    fmin_hz: float
    fmax_hz: float


def pool_columns(
    values: np.ndarray, f0_hz: float, df_hz: float, fmin_hz: float, fmax_hz: float,
    cols: int,
) -> np.ndarray:
    """One spectrum (float, line q at f0_hz + q·df_hz) as ``cols`` columns over
    [fmin_hz, fmax_hz): the largest line in each; a column holding no line (more columns
    than lines) takes the line nearest its centre; NaN outside the spectrum's lines."""
    v = np.asarray(values, dtype=np.float64)
    width = (fmax_hz - fmin_hz) / cols
    f = f0_hz + df_hz * np.arange(v.size)
    k = np.floor((f - fmin_hz) / width).astype(np.int64)
    inside = (k >= 0) & (k < cols)
    out = np.full(cols, -np.inf)
    np.maximum.at(out, k[inside], v[inside])
    empty = np.isneginf(out)
    if np.any(empty):
        centre = fmin_hz + (np.flatnonzero(empty) + 0.5) * width
        q = np.round((centre - f0_hz) / df_hz).astype(np.int64)
        ok = (q >= 0) & (q < v.size)
        fill = np.full(q.size, np.nan)
        fill[ok] = v[q[ok]]
        out[empty] = fill
    return out


def pool_rows(
    spectra: Sequence[tuple[int, np.ndarray, float, float]], rows: int, cols: int,
    fmin_hz: float, fmax_hz: float,
    convert: Callable[[np.ndarray, int], np.ndarray] | None = None,
) -> Waterfall:
    """Spectra (t_ns, values, f0_hz, df_hz), oldest first, as at most ``rows`` rows: when
    there are more, consecutive spectra are pooled (their element-wise max) in groups of
    equal count (the last groups one smaller).

    ``convert(values, i)``: applied to the line-by-line max of a group's spectra on the same
    lines (``i``: the index of the last of them) before the columns are pooled — for values
    stored as any increasing function of the ones shown (codes of a level), whose max is
    the max of what they stand for; spectra on the same lines must then share one
    conversion."""
    if not (rows >= 1 and cols >= 1 and fmax_hz > fmin_hz):
        raise ValueError("rows and cols must be >= 1 and fmax_hz above fmin_hz")
    n = len(spectra)
    groups = np.array_split(np.arange(n), min(rows, n)) if n else []
    out = np.full((len(groups), cols), np.nan, dtype=np.float32)
    t0, t1, counts = [], [], []
    for r, g in enumerate(groups):
        # spectra on the same lines are pooled line by line first (one max over time), then
        # into columns once per set of lines: the same cells, far fewer column passes
        grids: dict[tuple[float, float, int], tuple[np.ndarray, int]] = {}
        for i in g:
            _t, v, f0, df = spectra[int(i)]
            key = (f0, df, len(v))
            have = grids.get(key)
            grids[key] = (np.array(v) if have is None else np.fmax(have[0], v), int(i))
        pooled = np.full(cols, np.nan)
        for (f0, df, _n), (v, last) in grids.items():
            shown = v if convert is None else convert(v, last)
            pooled = np.fmax(pooled, pool_columns(shown, f0, df, fmin_hz, fmax_hz, cols))
        out[r] = pooled
        t0.append(int(spectra[int(g[0])][0]))
        t1.append(int(spectra[int(g[-1])][0]))
        counts.append(int(g.size))
    return Waterfall(out, t0, t1, counts, float(fmin_hz), float(fmax_hz))
