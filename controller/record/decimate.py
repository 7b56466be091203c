"""Which samples of a long series to draw: min and max per pixel column, for display only.

A plot cannot show more than one vertical stroke per pixel column, so drawing, for each column,
its first, lowest, highest and last sample gives the same picture as drawing every sample, at a
cost that depends on the width of the plot, not the length of the run.  The record itself is
never decimated: callers index their full arrays with the returned indices.

Pure numpy, no plotting import: the report and the dashboard's trace endpoint both use it.
"""

from __future__ import annotations

import numpy as np

__all__ = ["decimate_minmax"]


def _first_per_group(order: np.ndarray, group: np.ndarray) -> np.ndarray:
    """Of indices sorted by (group, key), the first of each group."""
    g = group[order]
    head = np.ones(order.size, dtype=bool)
    head[1:] = g[1:] != g[:-1]
    return order[head]


def decimate_minmax(t: np.ndarray, y: np.ndarray, columns: int,
                    keep: np.ndarray | None = None) -> np.ndarray:
    """Sorted indices of the samples to draw ``y`` against ``t`` in ``columns`` pixel columns.

    Kept, for each column of equal width in t: the first and last sample, and the sample with the
    lowest and the highest finite y (so each column's min and max are exact); every sample where y
    turns finite or non-finite (so gaps in the trace stay gaps); and the indices in ``keep`` (e.g.
    phase boundaries).  At most 4 * columns + len(keep) + 2 * (number of gaps) indices.
    """
    t = np.asarray(t, dtype=float)
    y = np.asarray(y, dtype=float)
    if t.shape != y.shape or t.ndim != 1:
        raise ValueError("t and y must be 1-D arrays of the same length")
    if columns < 1:
        raise ValueError("columns must be at least 1")
    n = t.size
    extra = np.empty(0, dtype=np.intp) if keep is None else np.asarray(keep, dtype=np.intp)
    if n <= 4 * columns:
        return np.arange(n, dtype=np.intp)
    lo, hi = float(np.nanmin(t)), float(np.nanmax(t))
    span = hi - lo
    if span > 0 and np.isfinite(span):
        col = np.floor((t - lo) * (columns / span))
        col = np.clip(np.nan_to_num(col, nan=0.0), 0, columns - 1).astype(np.intp)
    else:
        col = np.zeros(n, dtype=np.intp)
    idx = np.arange(n, dtype=np.intp)
    finite = np.isfinite(y)
    # np.lexsort sorts by the last key first; NaN sorts last, so the head of a group is finite if any is
    lowest = _first_per_group(np.lexsort((y, col)), col)
    highest = _first_per_group(np.lexsort((-y, col)), col)
    first = _first_per_group(np.lexsort((idx, col)), col)
    last = _first_per_group(np.lexsort((-idx, col)), col)
    edges = np.flatnonzero(finite[1:] != finite[:-1])
    picked = np.concatenate((first, last, lowest[finite[lowest]], highest[finite[highest]],
                             edges, edges + 1, extra[(extra >= 0) & (extra < n)]))
    return np.unique(picked)
