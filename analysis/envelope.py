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

import math

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
    x_arr, y_arr, largest_step = _check(x, y, max_points)
    if x_arr.size <= max_points:
        return x_arr.copy(), y_arr.copy()
    starts = bucket_starts(x_arr, max_points=max_points, log_x=log_x, max_step=largest_step)
    extremes = (np.minimum.reduceat(y_arr, starts), np.maximum.reduceat(y_arr, starts))
    # _check left y to these: NaN propagates into the minima, ±inf shows in them.
    if not np.isfinite((extremes[0].min(), extremes[1].max())).all():
        raise TraceError("envelope needs finite numbers in x and y")
    keep = _extreme_indices(y_arr, starts, extremes)
    return x_arr[keep], y_arr[keep]


def bucket_starts(
    x: np.ndarray, *, max_points: int, log_x: bool, max_step: float | None = None
) -> np.ndarray:
    """Start index of every non-empty bucket of sorted ``x`` (first is 0).

    ``max_step``, if given, must be at least the largest x[i+1] − x[i]; it
    only makes the bucket-count search faster (the buckets are the same).
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

    def inner_starts(n_buckets: int) -> np.ndarray:
        # Where each bucket after the first begins, dropping edges past the
        # last sample. Sorted, since the edges are: runs of equal values are
        # empty buckets.
        edges = 10.0 ** (lo + (hi - lo) * np.arange(1, n_buckets) / n_buckets)
        inner = np.searchsorted(x, edges, side="left")
        return inner[: np.searchsorted(inner, x.size)]

    # Where samples are closer together than half the narrowest bucket any
    # count in the search gives (a margin far beyond rounding), every bucket
    # holds a sample: from x[dense_from] on, empty buckets cannot occur, so
    # counting them needs only the samples below (few, on a linear FFT axis)
    # instead of a search of the whole trace for every edge.
    dense_from = x.size
    narrowest_decades = (hi - lo) / (budget * _MAX_BUCKET_GROWTH)
    if max_step is not None and max_step > 0 and narrowest_decades > 1e-9:
        relative_width = np.expm1(narrowest_decades * np.log(10.0))
        dense_from = int(np.searchsorted(x, 2.0 * max_step / relative_width, side="left"))

    # Bucket counts from the samples' logs (see edges_below) need t's rounding
    # — a few ulps of log10(x) times n_buckets / (hi − lo) — far below its
    # 1e-6 margin; a log range too narrow for that evaluates every edge.
    head_x = x[n_positive_from : dense_from + 1]
    head_log: list[np.ndarray] = []  # log10(head_x) − lo, computed on first use
    precise = 4.4e-16 * max(1.0, abs(lo), abs(hi)) * budget * _MAX_BUCKET_GROWTH < 1e-8 * (hi - lo)

    def edges_below(values: np.ndarray, above_lo: np.ndarray, n_buckets: int) -> np.ndarray:
        # How many of the edges 10 ** (lo + (hi − lo)·j / n_buckets), j = 1 …
        # n_buckets − 1, are ≤ each value, as searchsorted(edges, values,
        # side="right") says, without evaluating every edge: away from an
        # edge it is floor(t), t = (log10(value) − lo)·n_buckets / (hi − lo);
        # a value within 1e-6 of an edge is compared with that edge, computed
        # as above.
        t = above_lo * (n_buckets / (hi - lo))
        nearest = np.rint(t)
        count = np.floor(t)
        near = np.abs(t - nearest) < 1e-6
        if near.any():
            j = nearest[near]
            edge = 10.0 ** (lo + (hi - lo) * j / n_buckets)
            count[near] = j - 1 + ((j >= 1) & (j <= n_buckets - 1) & (edge <= values[near]))
        np.maximum(count, 0, out=count)  # np.clip(count, 0, n_buckets − 1), without its wrapper
        return np.minimum(count, n_buckets - 1, out=count)

    def count_for(n_buckets: int) -> int:
        head_size = dense_from - n_positive_from
        if head_size < n_buckets or (dense_from < x.size and head_size < 8 * n_buckets):
            # Bucket number of each sample up to x[dense_from]; every bucket
            # above that one, up to x[-1]'s, holds a sample.
            if not precise:
                edges = 10.0 ** (lo + (hi - lo) * np.arange(1, n_buckets) / n_buckets)
                head = np.searchsorted(edges, head_x, side="right")
                last = int(np.searchsorted(edges, x[-1], side="right"))
                return 1 + _changes(head) + last - int(head[-1])
            if not head_log:
                head_log.append(np.log10(head_x) - lo)
            head = edges_below(head_x, head_log[0], n_buckets)
            # x[-1] is 10 ** hi: every edge, the highest (hi − lo) / n_buckets
            # decades below it, lies under it.
            last = n_buckets - 1
            return 1 + _changes(head) + last - int(head[-1])
        inner = inner_starts(n_buckets)
        if inner.size == 0:
            return 1
        # Every edge lies above x[n_positive_from], so inner ≥ n_positive_from.
        return 1 + int(inner[0] != n_positive_from) + _changes(inner)

    def starts_for(n_buckets: int) -> np.ndarray:
        starts = np.concatenate(([n_positive_from], inner_starts(n_buckets)))
        return starts[_run_starts(starts)]

    # The non-empty count grows (nearly monotonically) with the bucket count;
    # bisect for the largest count that stays within the budget. Only counts
    # are needed on the way (no arrays of starts, no sorting).
    best_buckets = budget
    if count_for(budget) < budget:
        low, high = budget, budget * _MAX_BUCKET_GROWTH
        for _ in range(_SEARCH_STEPS):
            if high - low <= 1:
                break
            mid = (low + high) // 2
            if count_for(mid) <= budget:
                low = best_buckets = mid
            else:
                high = mid
    return np.concatenate((head, starts_for(best_buckets))).astype(np.int64)


def _check(x: ArrayLike, y: ArrayLike, max_points: int) -> tuple[np.ndarray, np.ndarray, float]:
    """x and y as float arrays, and the largest step of x."""
    x_arr = np.asarray(x, dtype=float)
    y_arr = np.asarray(y, dtype=float)
    if x_arr.ndim != 1 or x_arr.shape != y_arr.shape:
        raise TraceError(
            f"envelope needs x and y as two 1-D arrays of one length, got {x_arr.shape} and {y_arr.shape}"
        )
    if int(max_points) < 2:
        raise TraceError(f"envelope needs max_points ≥ 2, got {max_points}")
    if x_arr.size == 0:
        return x_arr, y_arr, 0.0
    largest_step = _largest_step(x_arr)
    # Where x does not decrease its extremes are its ends; min and max of y
    # propagate NaN and show ±inf. Anything amiss is then looked for in full.
    # A trace longer than max_points has y's checked by envelope, from the
    # bucket extremes it computes anyway (one pass over y fewer).
    y_extremes = (y_arr.min(), y_arr.max()) if x_arr.size <= int(max_points) else (0.0, 0.0)
    if not np.isfinite((largest_step, x_arr[0], x_arr[-1], *y_extremes)).all():
        if not (np.isfinite(x_arr).all() and np.isfinite(y_arr).all()):
            raise TraceError("envelope needs finite numbers in x and y")
        decreasing = np.flatnonzero(x_arr[1:] < x_arr[:-1])
        if decreasing.size:
            i = int(decreasing[0]) + 1
            raise TraceError(f"point {i + 1}: x must not decrease ({x_arr[i - 1]} then {x_arr[i]})")
    return x_arr, y_arr, largest_step


# Steps of x are taken this many at a time, in one reused buffer that stays
# in cache, rather than as one array the size of the trace.
_STEP_BLOCK = 1 << 16


def _largest_step(x: np.ndarray) -> float:
    """max(x[i+1] − x[i]), or NaN as soon as a step is negative or NaN."""
    largest = 0.0
    buffer = np.empty(min(x.size - 1, _STEP_BLOCK))
    with np.errstate(over="ignore", invalid="ignore"):
        for a in range(0, x.size - 1, _STEP_BLOCK):
            b = min(x.size - 1, a + _STEP_BLOCK)
            step = np.subtract(x[a + 1 : b + 1], x[a:b], out=buffer[: b - a])
            if not step.min() >= 0:
                return math.nan
            largest = max(largest, float(step.max()))
    return largest


def _extreme_indices(
    y: np.ndarray, starts: np.ndarray, extremes: tuple[np.ndarray, np.ndarray]
) -> np.ndarray:
    """Indices of each bucket's first minimum and first maximum, in order
    (``extremes``: each bucket's minimum and maximum)."""
    lengths = np.diff(starts, append=y.size)
    # Samples equal to their bucket's extreme, looked for in runs of whole
    # buckets of about _STEP_BLOCK samples, so that the per-sample work stays
    # in cache.
    group = np.searchsorted(starts, np.arange(0, y.size, _STEP_BLOCK), side="right") - 1
    group = group[_run_starts(group)]  # np.unique of a sorted array
    hits: tuple[list[np.ndarray], list[np.ndarray]] = ([], [])
    for g0, g1 in zip(group.tolist(), [*group[1:].tolist(), starts.size], strict=True):
        a = int(starts[g0])
        b = int(starts[g1]) if g1 < starts.size else y.size
        for found, extreme in zip(hits, extremes, strict=True):
            expected = np.repeat(extreme[g0:g1], lengths[g0:g1])
            found.append(a + (y[a:b] == expected).nonzero()[0])
    positions = []
    for found in hits:
        at = np.concatenate(found)
        bucket = np.searchsorted(starts, at, side="right") - 1
        # Hits ascend, so do their buckets: a bucket's first hit is where
        # the bucket number changes.
        positions.append(at[_run_starts(bucket)])
    both = np.sort(np.column_stack(positions), axis=1).ravel()
    # A bucket whose min and max are one sample yields it once.
    return both[_run_starts(both)]


def _changes(values: np.ndarray) -> int:
    """How many neighbours differ (np.count_nonzero(np.diff(values)), without
    the intermediate array of differences)."""
    return int(np.count_nonzero(values[1:] != values[:-1]))


def _run_starts(values: np.ndarray) -> np.ndarray:
    """Where each run of equal values begins (np.r_[True, v[1:] != v[:-1]],
    without np.r_'s parsing)."""
    first = np.empty(values.size, dtype=bool)
    first[:1] = True
    np.not_equal(values[1:], values[:-1], out=first[1:])
    return first
