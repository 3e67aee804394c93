"""Plotting envelope: a trace of millions of points reduced for a chart.

A browser chart cannot draw 10⁷ points, and plain decimation (every k-th
sample) drops narrow peaks, which are exactly what an emissions engineer is
looking for. :func:`envelope` splits the trace into buckets and keeps, from
each, the sample with the minimum and the sample with the maximum level, in x
order, so every peak (and every notch) survives.

Buckets are equal in width in log10(x) on a log frequency axis, or equal in
index otherwise. On a log axis a linearly spaced trace (an FFT) has few
samples per bucket at low frequencies, so many buckets are empty and are
skipped; the number of buckets is then raised (up to 8×) until the non-empty
ones fill ``max_points`` as closely as possible.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from analysis.errors import TraceError

# Bucket-count search on a log axis: at most this many times the nominal count.
_MAX_BUCKET_GROWTH = 8
_SEARCH_STEPS = 12


def envelope(
    x: ArrayLike, y: ArrayLike, *, max_points: int = 4000, log_x: bool = True
) -> tuple[np.ndarray, np.ndarray]:
    """At most ``max_points`` (x, y) points keeping each bucket's min and max.

    Requires 1-D x and y of the same length, finite, x non-decreasing. With
    ``log_x``, samples at x ≤ 0 (a DC bin) form one bucket of their own. A
    trace of at most ``max_points`` points comes back unchanged (as float
    arrays). The output x is non-decreasing and every output point is an input
    sample. Raises TraceError on bad input.
    """
    x_arr, y_arr = _check(x, y, max_points)
    if x_arr.size <= max_points:
        return x_arr.copy(), y_arr.copy()
    starts = bucket_starts(x_arr, max_points=max_points, log_x=log_x)
    keep = _extreme_indices(y_arr, starts)
    return x_arr[keep], y_arr[keep]


def bucket_starts(x: np.ndarray, *, max_points: int, log_x: bool) -> np.ndarray:
    """Start index of every non-empty bucket of sorted ``x`` (first is 0).

    Exposed so a reference implementation can rebuild the same buckets.
    """
    n_target = max(1, max_points // 2)
    if not log_x:
        return np.unique((np.arange(n_target, dtype=np.int64) * x.size) // n_target)
    n_positive_from = int(np.searchsorted(x, 0.0, side="right"))
    if n_positive_from >= x.size:  # nothing positive: one bucket
        return np.zeros(1, dtype=np.int64)
    lo = np.log10(x[n_positive_from])
    hi = np.log10(x[-1])
    head = np.zeros(1 if n_positive_from > 0 else 0, dtype=np.int64)
    budget = n_target - head.size
    if budget < 1:  # room for one bucket only
        return np.zeros(1, dtype=np.int64)
    if hi <= lo:
        return np.r_[head, n_positive_from].astype(np.int64)

    def starts_for(n_buckets: int) -> np.ndarray:
        edges = 10.0 ** (lo + (hi - lo) * np.arange(n_buckets) / n_buckets)
        inner = np.searchsorted(x, edges[1:], side="left")
        return np.unique(np.r_[n_positive_from, inner[inner < x.size]])

    # The non-empty count grows (nearly monotonically) with the bucket count;
    # bisect for the largest count that stays within the budget.
    best = starts_for(budget)
    if best.size < budget:
        low, high = budget, budget * _MAX_BUCKET_GROWTH
        for _ in range(_SEARCH_STEPS):
            if high - low <= 1:
                break
            mid = (low + high) // 2
            trial = starts_for(mid)
            if trial.size <= budget:
                low, best = mid, trial
            else:
                high = mid
    return np.r_[head, best].astype(np.int64)


def _check(x: ArrayLike, y: ArrayLike, max_points: int) -> tuple[np.ndarray, np.ndarray]:
    x_arr = np.asarray(x, dtype=float)
    y_arr = np.asarray(y, dtype=float)
    if x_arr.ndim != 1 or x_arr.shape != y_arr.shape:
        raise TraceError(
            f"envelope needs x and y as two 1-D arrays of one length, got {x_arr.shape} and {y_arr.shape}"
        )
    if int(max_points) < 2:
        raise TraceError(f"envelope needs max_points ≥ 2, got {max_points}")
    if not (np.isfinite(x_arr).all() and np.isfinite(y_arr).all()):
        raise TraceError("envelope needs finite numbers in x and y")
    if x_arr.size > 1 and np.any(x_arr[1:] < x_arr[:-1]):
        i = int(np.flatnonzero(x_arr[1:] < x_arr[:-1])[0]) + 1
        raise TraceError(f"point {i + 1}: x must not decrease ({x_arr[i - 1]} then {x_arr[i]})")
    return x_arr, y_arr


def _extreme_indices(y: np.ndarray, starts: np.ndarray) -> np.ndarray:
    """Indices of each bucket's first minimum and first maximum, in order."""
    lengths = np.diff(np.r_[starts, y.size])
    positions = []
    for reduce in (np.minimum, np.maximum):
        extreme = reduce.reduceat(y, starts)
        # Samples equal to their bucket's extreme; take the first per bucket.
        hits = np.flatnonzero(y == np.repeat(extreme, lengths))
        bucket = np.searchsorted(starts, hits, side="right") - 1
        _, first = np.unique(bucket, return_index=True)
        positions.append(hits[first])
    both = np.sort(np.column_stack(positions), axis=1).ravel()
    # A bucket whose min and max are one sample yields it once.
    return both[np.r_[True, both[1:] != both[:-1]]]
