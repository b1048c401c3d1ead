"""Order statistics of cells grouped by an integer code: one compiled counting sort, then each group sorted.

The tables (depth statistics by age bin, rates by segment, flank and age band) take medians and quartiles
of up to a million sampled cells in a few hundred groups: a numpy percentile call per group and layer cost
twice as much, most of it in the selection, which numpy's vectorised sort outruns at these sizes.
"""
from __future__ import annotations

import numpy as np
from numba import njit


class Groups:
    """Cells sorted once by a non-negative integer code.

    Parameters
    ----------
    codes : numpy.ndarray
        Each cell's code (non-negative integers).
    cells : numpy.ndarray, optional
        The cells' indices in the flattened layers the statistics read (default: 0, 1, 2, ...).

    Attributes
    ----------
    codes : numpy.ndarray
        The codes present, ascending.
    starts, stops : numpy.ndarray
        Each present code's run in :attr:`cells`.
    cells : numpy.ndarray
        Indices of the grouped cells, code by code.
    """

    def __init__(self, codes: np.ndarray, cells: np.ndarray | None = None):
        codes = np.asarray(codes, np.int64).ravel()
        if cells is None:
            cells = np.arange(len(codes))
        span = int(codes.max()) + 1 if codes.size else 0
        if span > 4 * codes.size + (1 << 20):  # sparse codes: ranked first
            present, codes = np.unique(codes, return_inverse=True)
            span = len(present)
        else:
            present = np.arange(span)
        order, first, count = _counting_sort(codes, span)
        kept = count > 0
        self.cells, self.codes, self.starts = np.asarray(cells)[order], present[kept], first[kept]
        self.stops = self.starts + count[kept]

    def __len__(self) -> int:
        return len(self.codes)

    def quantiles(self, values: np.ndarray, percents) -> tuple[np.ndarray, np.ndarray]:
        """Count of finite ``values`` per group and their percentiles (numpy's linear definition; NaN
        where a group has no finite value); shapes (groups,) and (groups, len(percents))."""
        grouped = np.asarray(values).ravel()[self.cells]
        for start, stop in zip(self.starts.tolist(), self.stops.tolist()):
            grouped[start:stop].sort()  # numpy's vectorised sort; NaN goes last
        counts = np.add.reduceat(np.isfinite(grouped), self.starts, dtype=np.int64) if len(self) else np.zeros(0, np.int64)
        out = np.full((len(self), len(percents)), np.nan)
        some = counts > 0
        starts, last = self.starts[some], counts[some] - 1
        for k, percent in enumerate(percents):
            position = last * (percent / 100)
            below = np.floor(position).astype(np.int64)
            above = np.minimum(below + 1, last)
            out[some, k] = _lerp(grouped[starts + below].astype(np.float64), grouped[starts + above], position - below)
        return counts, out


def _lerp(low: np.ndarray, high: np.ndarray, fraction: np.ndarray) -> np.ndarray:
    """Linear interpolation as numpy's percentile does it (from the high end past the middle)."""
    step = high - low
    return np.where(fraction >= 0.5, high - step * (1 - fraction), low + step * fraction)


@njit(cache=True, nogil=True)
def _counting_sort(codes, span):
    count = np.zeros(span, np.int64)
    for code in codes:
        count[code] += 1
    first = np.empty(span, np.int64)
    total = 0
    for k in range(span):
        first[k] = total
        total += count[k]
    cells = np.empty(total, np.int64)
    fill = first.copy()
    for i in range(len(codes)):
        cells[fill[codes[i]]] = i
        fill[codes[i]] += 1
    return cells, first, count
