"""Which samples of a long series to draw: min and max per pixel column, for display only.

A plot cannot show more than one vertical stroke per pixel column, so drawing, for each column,
its first, lowest, highest and last sample gives the same picture as drawing every sample, at a
cost that depends on the width of the plot, not the length of the run.  The record itself is
never decimated: callers index their full arrays with the returned indices.

Pure numpy, no plotting import: the report and the dashboard's trace endpoint both use it.
"""

from __future__ import annotations

import itertools

import numpy as np

__all__ = ["decimate_minmax"]


def _column_starts(t: np.ndarray, columns: int) -> np.ndarray:
    """Start index of each non-empty pixel column of a non-decreasing t (NaN last), and len(t)."""
    finite_t = t[np.isfinite(t)]
    lo, hi = (float(finite_t[0]), float(finite_t[-1])) if finite_t.size else (0.0, 0.0)
    span = hi - lo
    if not (span > 0 and np.isfinite(span)):
        return np.array([0, t.size], dtype=np.intp)
    x = t - lo  # in place from here: one float and one integer array the length of t at most
    x *= columns / span
    np.nan_to_num(x, copy=False, nan=columns - 1)
    np.clip(x, 0, columns - 1, out=x)
    col = x.astype(np.intp)
    del x
    return np.concatenate(([0], np.flatnonzero(col[1:] != col[:-1]) + 1, [t.size])).astype(np.intp)


def decimate_minmax(t: np.ndarray, y: np.ndarray, columns: int,
                    keep: np.ndarray | None = None) -> np.ndarray:
    """Sorted indices of the samples to draw ``y`` against ``t`` in ``columns`` pixel columns.

    Kept, for each column of equal width in t: the first and last sample, and the sample with the
    lowest and the highest y ignoring NaN (so each column's min and max are exact); every sample
    where y turns NaN or back (so gaps in the trace stay gaps); and the indices in ``keep`` (e.g.
    phase boundaries).  At most 4 * columns + len(keep) + 2 * (number of gaps) indices.  A trace's
    t only grows, so no sort is needed; any other t is put in order first.
    """
    t = np.asarray(t, dtype=float)
    y = np.asarray(y, dtype=float)
    if t.shape != y.shape or t.ndim != 1:
        raise ValueError("t and y must be 1-D arrays of the same length")
    if columns < 1:
        raise ValueError("columns must be at least 1")
    n = t.size
    if n <= 4 * columns:
        return np.arange(n, dtype=np.intp)
    order = None
    if not (t[1:] >= t[:-1]).all():
        order = np.argsort(t, kind="stable")  # NaN times last
        t, y = t[order], y[order]
    bounds = _column_starts(t, columns).tolist()
    picked: list[int] = []
    for a, b in itertools.pairwise(bounds):  # one pass per pixel column, not per sample
        seg = y[a:b]
        picked += (a, b - 1)
        if not np.isnan(seg).all():
            picked += (a + int(np.nanargmin(seg)), a + int(np.nanargmax(seg)))
    gap = np.isnan(y)
    edges = np.flatnonzero(gap[1:] != gap[:-1])
    out = np.concatenate((np.array(picked, dtype=np.intp), edges, edges + 1))
    if order is not None:
        out = order[out]
    if keep is not None:
        extra = np.asarray(keep, dtype=np.intp)
        out = np.concatenate((out, extra[(extra >= 0) & (extra < n)]))
    return np.unique(out)
