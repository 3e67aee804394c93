"""Noise floor, peaks and readings of a spectrum.

Two kinds of spectra arrive: receiver traces (thousands of log-spaced points,
already smoothed by the RBW and detector) and FFT spectra of scope records
(millions of linear bins whose floor is Rayleigh noise). One peak finder
serves both; what differs is how far above the floor a point must stand
before it can be an emission rather than noise.

The work is sized for the FFT case: everything that touches every point is a
single vectorised pass (a bucket maximum), and the floor, local maxima and
prominences are computed only around the few points that stand above the
detection threshold.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass

import numpy as np
import scipy.signal
import scipy.special
from numpy.typing import ArrayLike

from analysis.arrays import distinct_sorted
from analysis.errors import TraceError
from analysis.fft import leakage_envelope_db
from analysis.types import Peak, Spectrum

# The floor is a median over buckets 0.02 decade wide (4.7 % in frequency,
# wider than a ±0.5 % or 1 % spread-spectrum plateau, so the plateau does not
# lift its own floor) holding at least 64 points of a receiver trace, 512 bins
# of an FFT spectrum. Where points are sparse in log frequency (the low end of
# an FFT spectrum) buckets grow to that count: a window's main lobe then
# covers a minority of the bucket, and the median of Rayleigh bins (which the
# window correlates over ~ENBW bins) is good to about ±0.5 dB, not ±1.5 dB as
# with 64 bins.
_BUCKET_DECADES = 0.02
_MIN_BUCKET_POINTS = 64
_MIN_BUCKET_BINS = 512
# A bucket's median is estimated from at most this many of its points (a
# 1024-sample median of Rayleigh noise is good to ±0.2 dB). Even, as
# _bucket_medians assumes.
_MAX_MEDIAN_SAMPLES = 1024
# Quasi-random sample positions (golden-ratio sequence): unlike a fixed
# stride they cannot lock onto a harmonic comb and sample only its lines.
# Sorted, so that gathering them walks memory forwards (a median does not
# depend on the order of its samples).
_GOLDEN_RATIO_FRACTION = (math.sqrt(5.0) - 1.0) / 2.0
_SAMPLE_FRACTIONS = np.sort(
    np.modf(np.arange(1, _MAX_MEDIAN_SAMPLES + 1) * _GOLDEN_RATIO_FRACTION)[0]
)
# The Rayleigh threshold assumes the median floor is known; the estimate
# scatters by 0.2–0.5 dB (see above), and a floor 0.3 dB low multiplies the
# false-alarm rate several times over, so FFT thresholds carry this margin.
_FLOOR_SCATTER_MARGIN_DB = 1.0
# 1.4826·MAD estimates σ of Gaussian data.
_MAD_TO_SIGMA = 1.482602218505602
# Width is measured where the level has fallen this far below the peak (the
# 6 dB bandwidth receivers are specified by; on a noisy plateau 3 dB dips
# would cut the width short).
WIDTH_DROP_DB = 6.0


@dataclass(frozen=True)
class _FloorModel:
    starts: np.ndarray  # first index of each bucket
    stops: np.ndarray  # one past its last index
    centre_log_hz: np.ndarray  # log10 of each bucket's centre frequency
    median: np.ndarray  # median level of each bucket
    spread_db: float  # robust σ of the level about the floor (1.4826·MAD), NaN if not computed


def _check_spectrum(spectrum: Spectrum) -> tuple[np.ndarray, np.ndarray]:
    frequency_hz = np.asarray(spectrum.frequency_hz, dtype=np.float64)
    level = np.asarray(spectrum.level, dtype=np.float64)
    if frequency_hz.ndim != 1 or level.shape != frequency_hz.shape:
        raise TraceError(
            f"a spectrum needs one frequency per level, got shapes {frequency_hz.shape} "
            f"and {level.shape}"
        )
    if frequency_hz.size and not frequency_hz[0] > 0:
        raise TraceError("a spectrum's frequencies must be above 0 Hz")
    return frequency_hz, level


def _require_numbers(level: np.ndarray) -> None:
    # np.max propagates NaN: one pass, no temporary.
    if math.isnan(float(level.max())):
        raise TraceError("the spectrum has levels that are not numbers (NaN)")


def _bucket_bounds(frequency_hz: np.ndarray, min_points: int) -> np.ndarray:
    """Bucket edges (indices, 0 … n): 0.02-decade buckets merged until each
    holds at least ``min_points`` points.

    Works on edges only (O(buckets)): a coordinate that advances by
    min(1, points/min_points) per log bucket is cut at integer steps, so where
    log buckets are crowded they stay as they are and where they are sparse
    several merge into one of about min_points points.
    """
    n = frequency_hz.size
    lo, hi = math.log10(frequency_hz[0]), math.log10(frequency_hz[-1])
    k = max(1, math.ceil((hi - lo) / _BUCKET_DECADES))
    edges = np.empty(k + 1, dtype=np.intp)
    edges[0], edges[k] = 0, n
    edges[1:k] = np.searchsorted(frequency_hz, 10.0 ** (lo + _bucket_steps(k)))
    edges = distinct_sorted(edges)
    # coordinate = [0, cumsum(min(1, diff(edges) / min_points))]
    coordinate = np.empty(edges.size)
    coordinate[0] = 0.0
    advance = (edges[1:] - edges[:-1]) / min_points
    np.minimum(advance, 1.0, out=advance)
    np.cumsum(advance, out=coordinate[1:])
    end = float(coordinate[-1])
    buckets = max(1, int(end + 1e-9))
    # np.linspace(0.0, end, buckets + 1), value for value (end > 0: the
    # edges hold 0 and n ≥ 1, so at least one step advances).
    grid = np.arange(buckets + 1, dtype=np.float64)
    grid *= end / buckets
    grid[-1] = end
    cuts = np.interp(grid, coordinate, edges)
    return distinct_sorted(np.rint(cuts).astype(np.intp))


# 0.02 × (1, 2, …): the inner bucket edges' offsets in log10 f from the lowest
# frequency, computed once (elementwise, so a slice holds the same values).
_BUCKET_STEP_CACHE = _BUCKET_DECADES * np.arange(1, 4096)


def _bucket_steps(k: int) -> np.ndarray:
    """``_BUCKET_DECADES * np.arange(1, k)``."""
    if k <= _BUCKET_STEP_CACHE.size:
        return _BUCKET_STEP_CACHE[: k - 1]
    return _BUCKET_DECADES * np.arange(1, k)


def _bucket_medians(
    level: np.ndarray, starts: np.ndarray, lengths: np.ndarray
) -> tuple[np.ndarray, list[tuple[np.ndarray, np.ndarray]]]:
    """Median level of each bucket, and the samples it was taken from: pairs
    of (rows of samples, which buckets those rows are); +inf pads the rows
    of buckets with fewer points."""
    median = np.empty(starts.size)
    samples: list[tuple[np.ndarray, np.ndarray]] = []
    crowded = lengths > _MAX_MEDIAN_SAMPLES
    n_crowded = int(np.count_nonzero(crowded))
    if n_crowded:
        # Full rows share their middle positions: a partition suffices.
        rows = crowded.nonzero()[0] if n_crowded < starts.size else slice(None)
        offsets = (_SAMPLE_FRACTIONS[None, :] * lengths[rows, None]).astype(np.intp)
        offsets += starts[rows, None]
        values = level[offsets]
        # An even count: the median is the mean of the two middle values.
        # Once partitioned at the upper one, everything left of it is the
        # smaller half, whose maximum is the lower one: one selection, not two.
        upper = _MAX_MEDIAN_SAMPLES // 2
        values.partition(upper, axis=1)
        median[rows] = 0.5 * (values[:, :upper].max(axis=1) + values[:, upper])
        samples.append((values, rows))
    if n_crowded < starts.size:
        rows = (~crowded).nonzero()[0] if n_crowded else slice(None)
        count = lengths[rows]
        shortest, longest = int(count.min()), int(count.max())
        values = _padded_rows(level, starts[rows], count, shortest, longest)
        values.sort(axis=1)
        # The middle values, sorted positions (count − 1) // 2 and count // 2;
        # when every row has the same upper one (rows of one or two lengths),
        # a column each.
        upper_at = shortest // 2
        if longest // 2 == upper_at:
            upper = values[:, upper_at]
            if shortest == longest:
                lower = values[:, (shortest - 1) // 2]
            else:
                lower = np.where(count % 2 == 1, upper, values[:, upper_at - 1])
        else:
            line = np.arange(count.size)
            lower, upper = values[line, (count - 1) // 2], values[line, count // 2]
        median[rows] = 0.5 * (lower + upper)
        samples.append((values, rows))
    return median, samples


def _padded_rows(
    level: np.ndarray, first: np.ndarray, count: np.ndarray, shortest: int, width: int
) -> np.ndarray:
    """Rows ``level[first[r] : first[r] + count[r]]``, padded with +inf to
    the longest, ``width`` = count.max() (count ≥ 1, shortest = count.min(),
    ranges inside ``level``).

    Copied out of a strided view whose row i is level[i : i + width] (a
    row at a time, not element by element); the rows that start within the
    last width − 1 points, past the view, are gathered with clipped indices.
    Cells past a row's count hold whatever follows it and are replaced.
    """
    n = level.size
    j = np.arange(width)
    if level.flags.c_contiguous:
        last_start = n - width
        windows = np.ndarray(
            (last_start + 1, width), level.dtype, level, 0, (level.itemsize, level.itemsize)
        )
        values = windows[np.minimum(first, last_start)]
        late = (first > last_start).nonzero()[0]
        if late.size:
            values[late] = np.take(level, first[late, None] + j, mode="clip")
    else:
        values = np.take(level, first[:, None] + j, mode="clip")
    if shortest < width:
        tail = values[:, shortest:]
        tail[j[shortest:] >= count[:, None]] = np.inf
    return values


def _floor_model(
    frequency_hz: np.ndarray, level: np.ndarray, *, from_fft: bool, spread: bool = False
) -> _FloorModel:
    """Bucket medians of the level; with ``spread``, also the robust σ of the
    level about them (only receiver traces need it)."""
    bounds = _bucket_bounds(frequency_hz, _MIN_BUCKET_BINS if from_fft else _MIN_BUCKET_POINTS)
    starts, stops = bounds[:-1], bounds[1:]
    lengths = stops - starts
    median, samples = _bucket_medians(level, starts, lengths)
    spread_db = math.nan
    if spread:
        # |sample − its bucket's median|, in place (the samples are not needed
        # again). Padding and infinite levels give +inf or NaN, which sort
        # after every finite deviation: the median of the finite ones is a
        # median of the first `finite` order statistics of all of them.
        parts = []
        for values, rows in samples:
            np.subtract(values, median[rows, None], out=values)
            np.abs(values, out=values)
            parts.append(values.ravel())
        deviation = parts[0] if len(parts) == 1 else np.concatenate(parts)
        finite = int(np.count_nonzero(np.isfinite(deviation)))
        spread_db = _MAD_TO_SIGMA * _median_of_smallest(deviation, finite)
    log_f = np.log10(frequency_hz[np.concatenate((starts, stops - 1))])
    centre = 0.5 * (log_f[: starts.size] + log_f[starts.size :])
    return _FloorModel(starts, stops, centre, median, spread_db)


def _median_in_place(values: np.ndarray) -> float:
    """np.median of a 1-D array without NaN (the same value: the middle one,
    or the mean of the middle two), partitioning ``values`` in place instead
    of a copy; NaN for an empty one."""
    return _median_of_smallest(values, values.size)


def _median_of_smallest(values: np.ndarray, count: int) -> float:
    """The median of the ``count`` smallest of ``values`` (in numpy's sort
    order, NaN last): the middle one or the mean of the middle two, the
    same as np.median of those; NaN if ``count`` is 0. Partitions ``values``
    in place, once: of two middle values the lower is the maximum of the
    part left of the upper (a partition at two positions costs several times
    one at a single position)."""
    if count == 0:
        return math.nan
    half = count // 2
    values.partition(half)
    if count % 2:
        return float(values[half])
    return float((values[:half].max() + values[half]) / 2.0)


def _floor_at(model: _FloorModel, frequency_hz: np.ndarray, index: np.ndarray) -> np.ndarray:
    """The floor at the given indices: bucket medians interpolated in log f."""
    return np.interp(np.log10(frequency_hz[index]), model.centre_log_hz, model.median)


def noise_floor(spectrum: Spectrum) -> np.ndarray:
    """A robust local noise floor, one value per point, in the spectrum's unit.

    Running median in log frequency: medians over buckets 0.02 decade wide
    (merged to at least 64 points of a receiver trace, 512 bins of an FFT
    spectrum, where points are sparse), interpolated
    linearly in log f between bucket centres and held flat beyond the first
    and last. Narrow emissions, harmonic combs and spread-spectrum plateaus
    up to a few percent wide do not lift it.
    """
    frequency_hz, level = _check_spectrum(spectrum)
    if frequency_hz.size == 0:
        return np.empty(0)
    _require_numbers(level)
    model = _floor_model(frequency_hz, level, from_fft=spectrum.from_fft)
    return _floor_at(model, frequency_hz, np.arange(frequency_hz.size))


def detection_threshold_db(spectrum: Spectrum, *, false_alarm: float = 1e-4) -> float:
    """How far above the median floor noise alone reaches with probability
    ``false_alarm`` anywhere in the spectrum (the expected number of noise
    points above it is ``false_alarm``).

    FFT spectra: bin magnitudes of noise are Rayleigh-distributed, so a bin
    exceeds k times the median magnitude with probability 2^(−k²) =
    exp(−ln2·k²). Asking that n bins together exceed with probability at most
    ``false_alarm`` (union bound; neighbouring bins are correlated by the
    window, which only makes the bound safer) gives n·2^(−k²) = false_alarm,
    k² = log2(n/false_alarm), i.e. 10·log10(log2(n/false_alarm)) dB: 15.5 dB
    for 5 million bins at 1e-4, 14.4 dB for 10,000 — plus 1 dB because the
    median floor is itself an estimate (it scatters by 0.2–0.5 dB).

    Receiver traces: the detector has averaged the noise, whose spread in dB
    is treated as Gaussian with σ estimated robustly (1.4826·MAD about the
    floor): z·σ with z the one-sided Gaussian quantile of false_alarm/n
    (5.6σ for 10,001 points). A noise-free trace gives 0.
    """
    frequency_hz, level = _check_spectrum(spectrum)
    _check_false_alarm(false_alarm)
    if frequency_hz.size == 0:
        return 0.0
    return _statistical_threshold(
        spectrum.from_fft, frequency_hz.size, false_alarm, None, frequency_hz, level
    )


def _check_false_alarm(false_alarm: float) -> None:
    if not (isinstance(false_alarm, int | float) and 0 < false_alarm < 1):
        raise TraceError(f"false_alarm must be a probability between 0 and 1, not {false_alarm!r}")


def _statistical_threshold(
    from_fft: bool,
    n: int,
    false_alarm: float,
    model: _FloorModel | None,
    frequency_hz: np.ndarray,
    level: np.ndarray,
) -> float:
    per_point = false_alarm / n
    if from_fft:
        rayleigh_db = 10.0 * math.log10(max(1.0, math.log2(1.0 / per_point)))
        return rayleigh_db + _FLOOR_SCATTER_MARGIN_DB
    if model is None or math.isnan(model.spread_db):
        model = _floor_model(frequency_hz, level, from_fft=False, spread=True)
    z = float(-scipy.special.ndtri(per_point))
    return max(0.0, z) * model.spread_db


def _fractional_frequency(frequency_hz: np.ndarray, position: np.ndarray) -> np.ndarray:
    """Frequency at fractional indices, interpolated between neighbours."""
    base = np.minimum(np.maximum(np.floor(position).astype(np.intp), 0), frequency_hz.size - 2)
    fraction = position - base
    return frequency_hz[base] + fraction * (frequency_hz[base + 1] - frequency_hz[base])


# Up to this many points in hot buckets, _candidates gathers them at once.
_GATHER_POINTS = 65_536


def _candidates(
    frequency_hz: np.ndarray, level: np.ndarray, model: _FloorModel, threshold_db: float
) -> np.ndarray:
    """Indices whose level stands at least threshold_db above the floor.

    One pass over every point (a per-bucket maximum) finds the buckets that
    can hold such a point: the interpolated floor over a bucket never drops
    below the lowest of its own and its neighbours' medians. The exact floor
    is then evaluated in those buckets only.
    """
    bucket_max = np.maximum.reduceat(level, model.starts)
    if math.isnan(float(bucket_max.max())):  # np.max propagates NaN
        raise TraceError("the spectrum has levels that are not numbers (NaN)")
    padded = np.concatenate((model.median[:1], model.median, model.median[-1:]))
    lowest_floor = np.minimum(np.minimum(padded[:-2], padded[1:-1]), padded[2:])
    bound = lowest_floor + threshold_db
    hot = (bucket_max >= bound).nonzero()[0]
    if hot.size == 0:
        return np.empty(0, dtype=np.intp)
    # The points of the hot buckets that reach their bucket's bound, then the
    # exact floor at those few. Few hot points (a receiver trace): one gather
    # over all hot buckets, as per-bucket calls would cost more than the
    # comparisons; many (an FFT spectrum): one slice per hot bucket (a loop
    # over buckets, not points), which does not copy the points first.
    lengths = model.stops[hot] - model.starts[hot]
    ends = np.cumsum(lengths)
    if ends[-1] <= _GATHER_POINTS:
        shift = np.repeat(model.starts[hot] - (ends - lengths), lengths)
        index = np.arange(int(ends[-1])) + shift
        index = index[level[index] >= np.repeat(bound[hot], lengths)]
    else:
        index = np.concatenate(
            [
                model.starts[b] + (level[model.starts[b] : model.stops[b]] >= bound[b]).nonzero()[0]
                for b in hot
            ]
        )
    above = level[index] >= _floor_at(model, frequency_hz, index) + threshold_db
    return index[above]


def _stretch_minima(level: np.ndarray, starts: np.ndarray, stops: np.ndarray) -> np.ndarray:
    """Minimum level over each [start, stop) of disjoint, ordered, non-empty
    stretches, in one reduceat: interleaved (start, stop) pairs reduce each
    stretch, and the odd entries (stop → next start) are discarded."""
    if starts.size == 0:
        return np.empty(0)
    bounds = np.empty(2 * starts.size, dtype=np.intp)
    bounds[0::2] = starts
    bounds[1::2] = stops
    if bounds[-1] == level.size:
        bounds = bounds[:-1]  # the last stretch runs to the end
    return np.minimum.reduceat(level, bounds)[0::2]


def _topography(
    frequency_hz: np.ndarray, level: np.ndarray, model: _FloorModel, candidates: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Local maxima among the candidates, their prominence and the floor there.

    Works on a compressed copy: the candidates and their immediate neighbours,
    levels clipped from below at the floor, and one point standing for each
    stretch left out, at its lowest level (a base can only be a stretch's
    minimum). On it
    ``scipy.signal.find_peaks`` finds the local maxima (plateaus give their
    middle point, as scipy does) and ``scipy.signal.peak_prominences`` (or,
    for thousands of maxima, _prominences: the same values) the
    prominences — the same as on the full spectrum clipped at its floor, at
    the cost of a few points per candidate.
    """
    n = level.size
    # np.unique, by sorting: numpy 2's np.unique hashes integers first, which
    # for a few hundred indices costs several times the sort. With −1 and n
    # (the points just outside the spectrum) as its ends.
    fenced = np.empty(3 * candidates.size + 2, dtype=np.intp)
    fenced[0], fenced[1] = -1, n
    np.subtract(candidates, 1, out=fenced[2 : candidates.size + 2])
    fenced[candidates.size + 2 : 2 * candidates.size + 2] = candidates
    np.add(candidates, 1, out=fenced[2 * candidates.size + 2 :])
    fenced.sort()
    fenced = distinct_sorted(fenced)
    neighbourhood = fenced[1:-1]
    floor = _floor_at(model, frequency_hz, neighbourhood)
    clipped = np.maximum(level[neighbourhood], floor)

    # The stretches left out: between neighbourhoods, and before the first
    # and after the last (between the fences and the neighbourhoods). Each
    # becomes one point: its lowest level, clipped at the lower floor of its
    # two ends (of its one end at the spectrum's ends). Gap g lies between
    # fenced[g] and fenced[g + 1], i.e. before neighbourhood point g.
    gap = ((fenced[1:] - fenced[:-1]) > 1).nonzero()[0]
    gap_start = fenced[gap] + 1
    gap_stop = fenced[gap + 1]
    fenced_floor = np.empty(floor.size + 2)
    fenced_floor[1:-1] = floor
    fenced_floor[0], fenced_floor[-1] = floor[0], floor[-1]
    gap_floor = np.minimum(fenced_floor[gap], fenced_floor[gap + 1])
    gap_value = np.maximum(_stretch_minima(level, gap_start, gap_stop), gap_floor)
    # np.insert(clipped, gap, gap_value) and np.insert(arange(size), gap, -1),
    # without its argument handling: gap increases strictly, so inserted
    # value i lands at gap[i] + i.
    total = clipped.size + gap.size
    inserted = gap + np.arange(gap.size)
    kept = np.ones(total, dtype=bool)
    kept[inserted] = False
    compressed = np.empty(total)
    compressed[kept] = clipped
    compressed[inserted] = gap_value
    origin = np.empty(total, dtype=np.intp)  # position in the neighbourhood
    origin[kept] = np.arange(neighbourhood.size)
    origin[inserted] = -1

    maxima, _ = scipy.signal.find_peaks(compressed)
    at = origin[maxima]
    real = at >= 0
    if maxima.size <= _SCIPY_PROMINENCE_MAXIMA:
        maxima, at = maxima[real], at[real]
        prominence = scipy.signal.peak_prominences(compressed, maxima)[0]
    else:
        prominence = _prominences(compressed, maxima)[real]
        at = at[real]
    return neighbourhood[at], prominence, floor[at]


# Up to this many maxima, scipy.signal.peak_prominences; beyond, _prominences.
# scipy walks from each peak to the nearest higher point, which for maxima
# of one height (a clipped or quantised plateau) is quadratic in their
# count: measured 6 ms for 2,048 such maxima, 20 s for 150,000 (0.16 s with
# _prominences). For a few maxima its walk is short and cheaper than the
# sparse tables.
_SCIPY_PROMINENCE_MAXIMA = 2048


def _prominences(x: np.ndarray, maxima: np.ndarray) -> np.ndarray:
    """scipy.signal.peak_prominences(x, maxima)[0] for *all* the local maxima
    of ``x`` (as scipy.signal.find_peaks(x) gives them), in O(k log k).

    Between two neighbouring maxima x falls to a valley and rises again, never
    above the higher of the two; before the first and after the last it
    holds one valley each. So scipy's walk from maximum i to the nearest
    strictly higher point (or the end) passes exactly the valleys between i
    and the nearest strictly higher *maximum* on that side (or all of them
    to the end), and its base is their minimum. Nearest higher maxima come
    from a sparse table of maxima by binary lifting, the valley minima from
    a sparse table of minima: a few whole-array steps per power of two.
    """
    height = x[maxima]
    k = height.size
    # valley[m]: the lowest point between maxima m − 1 and m (valley[0]
    # before the first, valley[k] after the last).
    starts = np.empty(k + 1, dtype=np.intp)
    starts[0] = 0
    starts[1:] = maxima
    valley = np.minimum.reduceat(x, starts)
    tallest = _sparse_table(height, np.maximum)
    # Binary lifting: the longest run of maxima ≤ height[i] just left of i
    # ([first, i)) and just right of it ([i + 1, stop)).
    line = np.arange(k)
    first = line.copy()
    stop = line + 1
    for power in range(len(tallest) - 1, -1, -1):
        step = 1 << power
        table = tallest[power]  # table[s] = max(height[s : s + step])
        trial = first - step
        fits = trial >= 0
        fits[fits] = table[trial[fits]] <= height[fits]
        first[fits] = trial[fits]
        fits = stop + step <= k
        fits[fits] = table[stop[fits]] <= height[fits]
        stop[fits] += step
    # One table at a time: each holds about k·log2(k) values.
    del tallest, table
    lowest = _sparse_table(valley, np.minimum)
    left_base = _range_query(lowest, np.minimum, first, line)
    right_base = _range_query(lowest, np.minimum, line + 1, stop)
    return height - np.maximum(left_base, right_base)


def _sparse_table(values: np.ndarray, op: np.ufunc) -> list[np.ndarray]:
    """table[p][s] = op over values[s : s + 2**p], for every 2**p ≤ len(values)."""
    table = [values]
    while 2 ** len(table) <= values.size:
        half = 2 ** (len(table) - 1)
        previous = table[-1]
        table.append(op(previous[:-half], previous[half:]))
    return table


def _range_query(
    table: list[np.ndarray], op: np.ufunc, lo: np.ndarray, hi: np.ndarray
) -> np.ndarray:
    """op over values[lo : hi + 1] per pair (lo ≤ hi), from _sparse_table(values, op):
    two overlapping power-of-two stretches, one pass per distinct power."""
    count = hi - lo + 1
    power = (np.frexp(count)[1] - 1).astype(np.intp)  # exact floor(log2(count))
    out = np.empty(lo.size)
    for p in np.unique(power):
        rows = power == p
        out[rows] = op(table[p][lo[rows]], table[p][hi[rows] - (1 << int(p)) + 1])
    return out


# Widths are searched within ±64 points, then ±512, ±4096, ±32,768 and
# ±65,536 for the peaks whose −6 dB run reaches the window's edge; each round
# works on at most this many window cells at once.
_WIDTH_WINDOWS = (64, 512, 4096, 32_768, 65_536)
_WIDTH_CELLS = 4_000_000


def _width_bounds(
    level: np.ndarray,
    index: np.ndarray,
    reference: np.ndarray,
    bridge_points: np.ndarray,
    windows: tuple[int, ...] = _WIDTH_WINDOWS,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Fractional indices where the level around each peak falls below its
    reference for good: the run of points above the reference that holds
    the peak, with dips of at most ``bridge_points`` points bridged (noise on
    a plateau dips 6 dB below its highest point every few points; a genuine
    edge stays down), each end interpolated linearly between the last point
    above and the first below. Runs longer than ±65,536 points are cut there.

    Searched in the half-widths ``windows`` (a run of _WIDTH_WINDOWS, in
    order). Returns (done, left, right): ``done`` is False for the peaks
    whose run reaches past the last of ``windows`` short of ±65,536 (their
    ends are then cut at that window, and the rest of _WIDTH_WINDOWS finds
    them). Each peak's result depends on its own arguments only.
    """
    first = windows[0]
    if index.size <= max(1, _WIDTH_CELLS // (2 * first + 1)):
        # The first round in one chunk (usually every width is found in it):
        # its results are the answer for the rows it finishes, and the later
        # rounds overwrite the others.
        done, left, right = _width_round(level, index, reference, bridge_points, first)
        done |= first == _WIDTH_WINDOWS[-1]
        if done.all():
            return done, left, right
        todo = (~done).nonzero()[0]
        windows = windows[1:]
    else:
        done = np.zeros(index.size, dtype=bool)
        left = np.empty(index.size)
        right = np.empty(index.size)
        todo = np.arange(index.size)
    for half in windows:
        final = half == _WIDTH_WINDOWS[-1]
        rows_per_chunk = max(1, _WIDTH_CELLS // (2 * half + 1))
        unfinished = []
        for chunk in range(0, todo.size, rows_per_chunk):
            rows = todo[chunk : chunk + rows_per_chunk]
            finished, left[rows], right[rows] = _width_round(
                level, index[rows], reference[rows], bridge_points[rows], half
            )
            finished |= final
            done[rows] = finished
            unfinished.append(rows[~finished])
        todo = np.concatenate(unfinished)
        if todo.size == 0:
            break
    return done, left, right


def _finish_widths(
    level: np.ndarray,
    index: np.ndarray,
    bridge_points: np.ndarray,
    rows: np.ndarray,
    done: np.ndarray,
    left: np.ndarray,
    right: np.ndarray,
) -> None:
    """The rest of the width search (after its first window) for ``rows``
    not yet done, in place."""
    pending = rows[~done[rows]]
    if pending.size == 0:
        return
    done[pending], left[pending], right[pending] = _width_bounds(
        level,
        index[pending],
        level[index[pending]] - WIDTH_DROP_DB,
        bridge_points[pending],
        _WIDTH_WINDOWS[1:],
    )


@functools.cache
def _window_offsets(half: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """np.arange(-half, half + 1), np.arange(2·half + 1), and per column what
    an unbroken cell counts as in the search for breaks (−1 left of the
    peak, 2·half + 1 right of it: never the nearest break); read-only."""
    size = 2 * half + 1
    offsets, columns = np.arange(-half, half + 1), np.arange(size)
    no_break = np.where(columns < half, -1, size)
    for array in (offsets, columns, no_break):
        array.flags.writeable = False
    return offsets, columns, no_break


def _width_round(
    level: np.ndarray,
    index: np.ndarray,
    reference: np.ndarray,
    bridge_points: np.ndarray,
    half: int,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """One window size of _width_bounds: (found both ends, left, right)."""
    n = level.size
    offsets, columns, no_break = _window_offsets(half)
    size = offsets.size
    position = index[:, None] + offsets[None, :]
    # Rows whose window lies inside the spectrum and short of its ends
    # (usually all) need no mask of the cells inside, no clipped gathers, and
    # are done exactly when both breaks are found.
    all_inside = int(index.min()) - half > 0 and int(index.max()) + half < n - 1
    if all_inside:
        values = level[position]
        above = values > reference[:, None]
    else:
        values = np.take(level, position, mode="clip")
        above = values > reference[:, None]
        above &= (position >= 0) & (position < n)
    # A dip is bridged where the nearest points above on both sides are at
    # most bridge_points + 1 columns apart. The sentinels for "none on this
    # side" are so far out that a gap to them is never bridged (bridge_points
    # capped at the window size, which no gap inside it exceeds), and cells
    # outside the spectrum, never above, have none on their outer side.
    far = 2 * size + 2
    previous_above = np.maximum.accumulate(np.where(above, columns, -far), axis=1)
    next_above = np.minimum.accumulate(np.where(above, columns, far)[:, ::-1], axis=1)[:, ::-1]
    gap_limit = np.minimum(bridge_points, size) + 1
    unbroken = next_above - previous_above <= gap_limit[:, None]
    unbroken |= above
    breaks = np.where(unbroken, no_break, columns)
    left_break = breaks[:, :half].max(axis=1)
    right_break = breaks[:, half + 1 :].min(axis=1)
    left_found = left_break >= 0
    right_found = right_break < size
    # Done when a break is found on each side, or the window reaches the end.
    if all_inside:
        done = left_found & right_found
    else:
        done = (left_found | (index - half <= 0)) & (right_found | (index + half >= n - 1))

    # The break columns (left < half < right) and their neighbours towards
    # the peak, as indices into the spectrum: row r, column c is point
    # index[r] + c − half.
    edge = np.empty((2, index.size), dtype=np.intp)
    np.maximum(left_break, 0, out=edge[0])
    np.minimum(right_break, size - 1, out=edge[1])
    edge -= half
    edge += index
    neighbour = edge + _TOWARDS_PEAK
    if all_inside:
        edge_value, neighbour_value = level[edge], level[neighbour]
    else:
        edge_value = np.take(level, edge, mode="clip")
        neighbour_value = np.take(level, neighbour, mode="clip")
    with np.errstate(divide="ignore", invalid="ignore"):
        fraction = (reference - edge_value) / (neighbour_value - edge_value)
    np.maximum(fraction, 0.0, out=fraction)
    np.minimum(fraction, 1.0, out=fraction)
    if not all_inside:
        left_found &= edge[0] >= 0
        right_found &= edge[1] < n
    left_position = np.where(left_found, edge[0] + fraction[0], np.maximum(index - half, 0))
    right_position = np.where(right_found, edge[1] - fraction[1], np.minimum(index + half, n - 1))
    return done, left_position, right_position


# Offsets from a width's break column to its neighbour towards the peak.
_TOWARDS_PEAK = np.array([[1], [-1]], dtype=np.intp)
_TOWARDS_PEAK.flags.writeable = False


def _refine(
    frequency_hz: np.ndarray,
    level: np.ndarray,
    index: np.ndarray,
    floor: np.ndarray,
    width_bins: np.ndarray,
    enbw_bins: float | None,
) -> tuple[np.ndarray, np.ndarray]:
    """Frequency and level of FFT peaks between bins.

    With the window's ENBW known: the power centroid over the main lobe
    (±⌈ENBW⌉ bins), with the floor's mean noise power per bin (the Rayleigh
    median power / ln 2) taken off each bin. By Parseval a sine's lobe holds
    ENBW × its power, so the summed power / ENBW is the sine's level and the
    centroid its frequency, to 0.005 bin and 0.01 dB for the cosine windows
    (a 3-point parabola on dB values is off by 0.14 bin and 0.16 dB on the
    flat-top's flattened lobe). Peaks wider at −6 dB than twice the ENBW are
    not single sines (a sine measures 1.2–1.4 × ENBW) and keep their highest
    point.

    Without it: a parabola through the dB values of the three points around
    the maximum.
    """
    n = level.size
    if enbw_bins is None:
        left = level[np.maximum(index - 1, 0)]
        centre = level[index]
        right = level[np.minimum(index + 1, n - 1)]
        curvature = left - 2.0 * centre + right
        with np.errstate(divide="ignore", invalid="ignore"):
            offset = np.where(curvature < 0, 0.5 * (left - right) / curvature, 0.0)
        offset = np.clip(offset, -0.5, 0.5)
        edge = (index == 0) | (index == n - 1)
        offset[edge] = 0.0
        step = 0.5 * (
            frequency_hz[np.minimum(index + 1, n - 1)] - frequency_hz[np.maximum(index - 1, 0)]
        )
        return frequency_hz[index] + offset * step, centre - 0.25 * (left - right) * offset

    half_lobe = max(1, math.ceil(enbw_bins - 1e-9))
    span = np.arange(-half_lobe, half_lobe + 1)
    window = index[:, None] + span[None, :]
    inside = (window >= 0) & (window < n)
    window = np.clip(window, 0, n - 1)
    noise_power = np.power(10.0, floor / 10.0) / math.log(2.0)
    power = np.where(inside, np.power(10.0, level[window] / 10.0) - noise_power[:, None], 0.0)
    total = power.sum(axis=1)
    sine_like = (total > 0) & (width_bins <= 2.0 * enbw_bins)
    safe_total = np.where(sine_like, total, 1.0)
    centroid = (power * frequency_hz[window]).sum(axis=1) / safe_total
    lower = frequency_hz[np.maximum(index - 1, 0)]
    upper = frequency_hz[np.minimum(index + 1, n - 1)]
    refined_frequency = np.where(sine_like, np.clip(centroid, lower, upper), frequency_hz[index])
    refined_level = np.where(sine_like, 10.0 * np.log10(safe_total / enbw_bins), level[index])
    return refined_frequency, refined_level


# Sidelobes of a strong sine may stand this much above the window's leakage
# envelope (noise adding in phase) and still count as leakage.
_LEAKAGE_MARGIN_DB = 3.0
# Only the strongest peaks are checked as sources of leakage.
_MAX_LEAKERS = 64


def _leaked(
    bin_frequency_hz: np.ndarray,
    peak_frequency_hz: np.ndarray,
    peak_level: np.ndarray,
    bin_hz: float,
    enbw_bins: float,
) -> np.ndarray:
    """Which FFT peaks are sidelobes of a stronger one.

    A peak is leakage when some stronger peak's window response at that
    distance (the envelope, taken half a bin nearer to cover where between
    bins the sidelobe's maximum fell) reaches within 3 dB of it.
    """
    leaked = np.zeros(peak_level.size, dtype=bool)
    strongest = np.argsort(-peak_level, kind="stable")[:_MAX_LEAKERS]
    offset_bins = np.abs(bin_frequency_hz[:, None] - peak_frequency_hz[None, strongest]) / bin_hz
    envelope = leakage_envelope_db(enbw_bins, np.maximum(offset_bins - 0.5, 0.0))
    if envelope is None:
        return leaked
    stronger = peak_level[None, strongest] > peak_level[:, None]
    reach = peak_level[None, strongest] + envelope + _LEAKAGE_MARGIN_DB
    return (stronger & (peak_level[:, None] <= reach)).any(axis=1)


def _merge_close(
    frequency_hz: np.ndarray, level: np.ndarray, resolution_hz: np.ndarray
) -> np.ndarray:
    """Indices (into the frequency-sorted peaks) that survive merging: peaks
    chained by gaps up to the resolution form one group, whose highest peak
    is kept. (Up to, not below: two maxima two steps apart on a uniform grid
    are exactly two steps apart.)"""
    if frequency_hz.size < 2:
        return np.arange(frequency_hz.size)
    limit = np.maximum(resolution_hz[:-1], resolution_hz[1:]) * (1 + 1e-9)
    apart = (frequency_hz[1:] - frequency_hz[:-1]) > limit
    if apart.all():  # every peak its own group
        return np.arange(frequency_hz.size)
    group = np.empty(frequency_hz.size, dtype=np.intp)
    group[0] = 0
    np.cumsum(apart, out=group[1:])
    order = np.lexsort((-level, group))
    first = np.concatenate(([True], group[order][1:] != group[order][:-1]))
    return np.sort(order[first])


def find_peaks(
    spectrum: Spectrum,
    *,
    prominence_db: float = 6.0,
    false_alarm: float = 1e-4,
    resolution_hz: float | None = None,
    max_peaks: int = 200,
) -> tuple[Peak, ...]:
    """The emissions in a spectrum, sorted by frequency.

    A peak is a local maximum (never the first or last point)
      * standing at least ``detection_threshold_db`` above the noise floor, so
        that noise alone produces one with probability ``false_alarm`` over
        the whole spectrum (Rayleigh statistics for FFT spectra, a robust
        Gaussian spread for receiver traces), and
      * whose prominence is at least ``prominence_db``: its height above the
        higher of its two bases, a base being the lowest level between the
        peak and the nearest higher point on that side, never taken below the
        local floor. An isolated peak's prominence is its height above the
        floor; a bump on the flank of a higher peak, or on a plateau, counts
        only its own dip. On a noise-free floor this is exactly
        ``scipy.signal.find_peaks(level, prominence=prominence_db)``.
    A bump whose base stands above the detection threshold (a bump on a
    plateau or on another emission's flank) needs a dip as deep as the
    detection threshold, not just ``prominence_db``: noise on a plateau dips
    6 dB every few points. On FFT spectra whose window is known (rbw_hz /
    bin width is one of fft.WINDOWS' ENBWs), peaks within a stronger peak's
    leakage envelope (+3 dB) are its sidelobes and are dropped.
    Peaks within a resolution of each other — ``resolution_hz``, else the
    spectrum's ``rbw_hz``, else two local frequency steps — merge into the
    highest. If more than ``max_peaks`` remain, the most prominent are kept.

    ``level`` of FFT peaks is refined between bins (see ``_refine``); a
    receiver's peak is its highest point. ``width_hz`` is the width where the
    level has fallen 6 dB below the peak's highest point and stays there
    (dips no longer than the resolution are bridged), interpolated between
    points: a sine gives about its RBW (flat-top FFT: 4.4 bins), a
    spread-spectrum plateau its full spread. ``prominence_db`` is the
    prominence above.
    """
    frequency_hz, level = _check_spectrum(spectrum)
    if not (math.isfinite(prominence_db) and prominence_db >= 0):
        raise TraceError(f"prominence_db must be a non-negative number, not {prominence_db!r}")
    _check_false_alarm(false_alarm)
    if resolution_hz is not None and not (math.isfinite(resolution_hz) and resolution_hz > 0):
        raise TraceError(f"resolution_hz must be a positive number of Hz, not {resolution_hz!r}")
    if not (isinstance(max_peaks, int) and max_peaks >= 0):
        raise TraceError(f"max_peaks must be a non-negative whole number, not {max_peaks!r}")
    n = frequency_hz.size
    if n < 3 or max_peaks == 0:
        return ()

    model = _floor_model(
        frequency_hz, level, from_fft=spectrum.from_fft, spread=not spectrum.from_fft
    )
    threshold_db = max(
        prominence_db,
        _statistical_threshold(spectrum.from_fft, n, false_alarm, model, frequency_hz, level),
    )
    candidates = _candidates(frequency_hz, level, model, threshold_db)
    if candidates.size == 0:
        return ()
    index, prominence, floor = _topography(frequency_hz, level, model, candidates)
    # A bump joined to a higher peak above the detection threshold (its base
    # stands that high) is part of one structure — a plateau, a lobe — and
    # its own dip must be as significant as a detection, not just 6 dB:
    # noise on a plateau makes 6 dB dips all the time.
    top = level[index]
    detected = floor + threshold_db
    joined = top - prominence >= detected
    required_db = np.where(joined, threshold_db, prominence_db)
    keep = (prominence >= required_db) & (top >= detected)
    keep &= (index > 0) & (index < n - 1)
    index, prominence, floor = index[keep], prominence[keep], floor[keep]
    if index.size == 0:
        return ()

    step_hz = frequency_hz[index + 1] - frequency_hz[index - 1]  # two local steps
    if resolution_hz is not None:
        resolution = np.full(index.size, float(resolution_hz))
    elif spectrum.rbw_hz is not None:
        resolution = np.full(index.size, float(spectrum.rbw_hz))
    else:
        resolution = step_hz
    bridge_points = np.maximum(2, np.rint(2.0 * resolution / step_hz)).astype(np.intp)
    # Widths within ±64 points first; the longer runs only for the peaks
    # kept in the end. Many deep-dipped maxima on one long run (every other
    # point of a plateau) would otherwise search that run once per maximum.
    width_done, left_position, right_position = _width_bounds(
        level, index, level[index] - WIDTH_DROP_DB, bridge_points, _WIDTH_WINDOWS[:1]
    )

    if spectrum.from_fft:
        enbw_bins = None
        bin_hz = 0.5 * _median_in_place(step_hz.copy())
        if spectrum.rbw_hz is not None:
            enbw_bins = spectrum.rbw_hz / bin_hz
            if 2.0 * enbw_bins >= _WIDTH_WINDOWS[0]:
                # _refine tells sines (at most 2 ENBW wide) from wider peaks:
                # here a width cut at ±64 points could still be a sine's.
                _finish_widths(
                    level,
                    index,
                    bridge_points,
                    np.arange(index.size),
                    width_done,
                    left_position,
                    right_position,
                )
        # A run cut at ±64 points is wider than 64 points, as its whole
        # width would be: no sine either way.
        peak_frequency, peak_level = _refine(
            frequency_hz, level, index, floor, right_position - left_position, enbw_bins
        )
        if enbw_bins is not None:
            leaked = _leaked(
                frequency_hz[index],
                peak_frequency,
                peak_level,
                bin_hz,
                enbw_bins,
            )
            keep = ~leaked
            index, prominence, peak_frequency, peak_level, resolution = (
                index[keep],
                prominence[keep],
                peak_frequency[keep],
                peak_level[keep],
                resolution[keep],
            )
            bridge_points, width_done, left_position, right_position = (
                bridge_points[keep],
                width_done[keep],
                left_position[keep],
                right_position[keep],
            )
    else:
        peak_frequency, peak_level = frequency_hz[index], level[index].copy()

    survivors = _merge_close(peak_frequency, peak_level, resolution)
    if survivors.size > max_peaks:
        most_prominent = np.argsort(-prominence[survivors], kind="stable")[:max_peaks]
        survivors = np.sort(survivors[most_prominent])
    _finish_widths(
        level, index, bridge_points, survivors, width_done, left_position, right_position
    )
    # Both ends in one pass: [right positions, left positions].
    ends_hz = _fractional_frequency(
        frequency_hz, np.concatenate((right_position[survivors], left_position[survivors]))
    )
    width_hz = ends_hz[: survivors.size] - ends_hz[survivors.size :]

    # Python floats by tolist (the same values as float() of each element),
    # the fields in Peak's order.
    return tuple(
        map(
            Peak,
            peak_frequency[survivors].tolist(),
            peak_level[survivors].tolist(),
            prominence[survivors].tolist(),
            width_hz.tolist(),
        )
    )


def readings_at(spectrum: Spectrum, frequency_hz: ArrayLike, tolerance_hz: ArrayLike) -> np.ndarray:
    """The highest level within ±tolerance of each requested frequency.

    For each f (broadcast with its tolerance t): the maximum of the levels at
    points with f − t ≤ frequency ≤ f + t, NaN where no point lies within.
    One pass over the spectrum (maxima of the stretches between all query
    edges) plus a sparse table over those stretches answers every query.
    """
    spectrum_hz, level = _check_spectrum(spectrum)
    try:
        query_hz, tolerance = np.broadcast_arrays(
            np.asarray(frequency_hz, dtype=np.float64), np.asarray(tolerance_hz, dtype=np.float64)
        )
    except ValueError:
        raise TraceError("frequencies and tolerances must be numbers of matching shape") from None
    if not (
        np.isfinite(query_hz).all() and np.isfinite(tolerance).all() and (tolerance >= 0).all()
    ):
        raise TraceError("frequencies must be finite and tolerances finite and non-negative")
    result = np.full(query_hz.shape, np.nan)
    if spectrum_hz.size == 0 or query_hz.size == 0:
        return result
    _require_numbers(level)
    lo = np.searchsorted(spectrum_hz, (query_hz - tolerance).ravel(), side="left")
    hi = np.searchsorted(spectrum_hz, (query_hz + tolerance).ravel(), side="right")
    hit = hi > lo
    if not hit.any():
        return result
    lo, hi = lo[hit], hi[hit]

    # Stretches between consecutive query edges; their maxima in one reduceat.
    edges = np.unique(np.concatenate((lo, hi)))
    n = spectrum_hz.size
    if edges[-1] == n:
        stretch_max = np.maximum.reduceat(level, edges[:-1])
    else:
        stretch_max = np.maximum.reduceat(level, edges)[:-1]
    first = np.searchsorted(edges, lo)
    last = np.searchsorted(edges, hi) - 1  # inclusive stretch index

    # Sparse table: table[p][i] = max of stretches i … i + 2^p − 1.
    table = _sparse_table(stretch_max, np.maximum)
    answer = _range_query(table, np.maximum, first, last)
    flat = result.ravel()
    flat[hit] = answer
    return flat.reshape(query_hz.shape)
