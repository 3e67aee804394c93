"""Harmonic families: fundamentals whose integer multiples explain several peaks.

A clock or a switching converter shows in a spectrum as a comb n·f0. The
engineer wants "these seven peaks are the 25 MHz PHY clock", not seven
unrelated peaks, so :func:`find_families` groups peaks into families.

How a family is chosen (greedy, best first):

1. Candidates for f0: each of the strongest peaks divided by 1..16 (the first
   order is often missing or below the scan's start), plus the spacing of
   neighbouring strong peaks and half of it (an odd-only comb is spaced 2·f0).
2. Every candidate is scored against every peak at once (numpy
   broadcasting). Peak f matches order n = round(f/f0) when
   ``|f − n·f0| ≤ max(2·resolution, rel_tol·f, width/2)``, n ≤ max_order. The
   first two terms are the issue's rule ("the larger of 2 resolution steps and
   0.2 %"); half the peak's width is added because a wide (spread-spectrum)
   peak's reported frequency can sit anywhere on its plateau. One peak per
   order (the closest). f0 is refined twice by weighted least squares over
   all its matches, f0 = Σ w·n·f / Σ w·n² with w = 1/tol², and the peaks
   matched again.
3. Simplest explanation first: a candidate's score is its number of matched
   orders minus 0.5 × the orders it predicts between its lowest and highest
   matched order that are not there (for an odd-only set, only the missing odd
   orders count: a 50 % duty clock has no even ones). A sub-harmonic f0/k
   explains every peak f0 does but leaves gaps, so it wins only by explaining
   strictly more peaks, enough to fill its gaps: f0/2 over a family of m
   orders needs more than (m − 1)/3 extra (odd-order) peaks. Two round-number
   clocks (16 MHz and a lone 40 MHz peak) therefore do not merge into an
   8 MHz family, while 16, 24, 32, 40, 48 MHz do. Ties go to the higher f0.
4. A family must have at least ``min_peaks`` orders, at least half of the
   orders it predicts between its lowest and highest must be present (a comb
   built from chance coincidences is mostly holes), and it must be unlikely
   to be a coincidence: a peak j inside the family's span falls on one of its
   orders by chance with probability p_j = min(1, 2·tol_j/f0) (tol_j/f0 for an
   odd-only comb, which offers half the slots); the number of such chance
   matches is about Poisson with mean Σ p_j, and the family is kept only if
   P(≥ its count) ≤ ``false_alarm`` (per candidate). Tiny fundamentals, whose
   dense combs catch random peaks, fail this test.
5. The chosen family's peaks leave every other candidate's matches and the
   choice repeats, up to ``max_families`` times, on the same refined
   candidates: they are not refined again without those peaks. A fresh
   search per family gave the same families for 570 of 600 random peak
   sets, recovered no more comb peaks and cost twice as much
   (DEVELOPERS.md, "Harmonic families").

Spread spectrum: a spread clock turns each harmonic into a plateau whose width
grows with the order (±0.5 % or down-spread 1 % of n·f0). A family is flagged
``spread_spectrum`` when its peaks' widths (minus the resolution) fit
width ≈ k·n with k/f0 ≥ 0.2 %, each peak within a factor 2 of that line, the
proportional fit beats a constant width (a narrow line's width is the
resolution bandwidth, the same at every order), and the median width is at
least 5 resolution steps (when the resolution is known).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from numpy.typing import ArrayLike
from scipy import special

from analysis.arrays import distinct_sorted
from analysis.errors import TraceError
from analysis.types import Family, Peak

# Lowest visible order tried for a missing-first-order family (f/1 .. f/16).
_MAX_DIVISOR = 16
# Candidates are seeded from the strongest peaks only; all peaks are matched.
_MAX_SEEDS = 64
# Score lost per order a family predicts inside its span but does not show.
_GAP_PENALTY = 0.5
_REFINE_PASSES = 2
# Spread-spectrum criterion (see the module docstring).
_SPREAD_MIN_FRACTION = 0.002
_SPREAD_MIN_WIDTH_OVER_RESOLUTION = 5.0
_SPREAD_RATIO_LIMIT = 2.0


def find_families(
    peaks: Sequence[Peak],
    *,
    resolution_hz: float | ArrayLike = 0.0,
    rel_tol: float = 0.002,
    min_peaks: int = 3,
    max_order: int = 50,
    max_families: int = 10,
    false_alarm: float = 1e-3,
) -> tuple[Family, ...]:
    """Group peaks into harmonic families, best explanation first.

    ``resolution_hz`` is the frequency step (bin spacing or RBW), one value or
    one per peak. Each peak belongs to at most one family; peaks that fit no
    family are left out. Returns families in the order they were chosen (the
    best-scoring first), each with its refined fundamental, its sorted orders
    and the matched peaks' frequencies in order. Raises TraceError on bad input.
    """
    _check_options(rel_tol, min_peaks, max_order, max_families, false_alarm)
    if not peaks:
        return ()
    frequency_hz, prominence_db, width_hz = _peak_arrays(peaks)
    resolution = _per_peak(resolution_hz, frequency_hz.size)

    # Work on peaks sorted by frequency: orders are then non-decreasing along
    # each candidate's row, which makes "one peak per order" a run operation.
    by_frequency = np.argsort(frequency_hz, kind="stable")
    f = frequency_hz[by_frequency]
    width = width_hz[by_frequency]
    res = resolution[by_frequency]
    known_width = np.where(np.isfinite(width) & (width > 0), width, 0.0)
    tol = np.maximum(np.maximum(2.0 * res, rel_tol * f), 0.5 * known_width)
    # The least-squares weight of each peak (see _refine), the same in every round.
    weight = 1.0 / np.maximum(tol, 1e-9 * f) ** 2

    f0 = _candidates(f, prominence_db[by_frequency])
    # Order 0 (f/f0 < 0.5) is within tolerance only of a peak whose tolerance
    # exceeds its frequency; _match can skip that test when there is none.
    order_zero = bool((f <= tol).any())
    cols = f.size
    # The search works on the matched cells of the candidates × peaks grid
    # (flat indices, row-major): a few per candidate. Each step is a handful
    # of whole-array operations; with tens of peaks and hundreds of
    # candidates their count, not their size, is what the search costs.
    # A candidate matching no peak keeps its f0 through the refinement
    # (nothing to fit), so it matches nothing and never makes a family.
    cells, cell_order = _match(f0, f, tol, max_order, order_zero)
    for refinement in range(_REFINE_PASSES):
        if refinement > 0:
            # Candidates refined from the same matches now share their f0
            # exactly, and everything from here on depends on f0 alone:
            # keep one of each (ties between them are ties in everything).
            f0.sort()
            f0 = distinct_sorted(f0)
            cells, cell_order = _match(f0, f, tol, max_order, order_zero)
        f0 = _refine(f0, f, weight, cells, cell_order)
    cells, cell_order = _match(f0, f, tol, max_order, order_zero)
    # From here on a candidate only loses matches: one with fewer than
    # min_peaks can never make a family, and its cells are dropped.
    cells, cell_order = _viable(cells, cell_order, cells // cols, f0.size, min_peaks)

    # Greedy choice on these refined combs: the best family claims its peaks,
    # which leave every other comb, and the choice repeats.
    claimed = np.zeros(cols, dtype=bool)
    families: list[Family] = []
    # Every candidate left has at least min_peaks unclaimed peaks among its
    # cells, so the search goes on while any is left.
    while len(families) < max_families and cells.size:
        active = ~claimed
        # The combs of the candidates with cells (`candidate`), and their figures.
        kept, candidate, score, missing, highest, odd, count = _best_comb(cells, cell_order, cols)
        # The chance test only for the combs that pass the cheaper two (comb
        # by comb, so the same figures as for all of them at once).
        idx = ((count >= min_peaks) & (missing <= count)).nonzero()[0]
        if idx.size == 0:
            break
        trial_f0 = f0[candidate[idx]]
        expected = _chance_matches(trial_f0, f, tol, active, highest[idx], odd[idx])
        passed = _poisson_sf(count[idx] - 1, expected) <= false_alarm
        idx, trial_f0 = idx[passed], trial_f0[passed]
        if idx.size == 0:
            break
        # Best score, ties to the higher fundamental (the simpler comb).
        best = int(candidate[idx[np.lexsort((-trial_f0, -score[idx]))[0]]])
        kept_cells, kept_order = cells[kept], cell_order[kept]
        mine = kept_cells // cols == best
        columns = kept_cells[mine] - best * cols  # ascending: the row's peaks by frequency
        n = kept_order[mine]
        fundamental = float(_refine(f0[best : best + 1], f, weight, columns, n)[0])
        orders = tuple(n.tolist())
        families.append(
            Family(
                fundamental_hz=fundamental,
                orders=orders,
                odd_only=len(orders) >= 3 and all(v % 2 == 1 for v in orders),
                spread_spectrum=_is_spread(n, width[columns], res[columns], fundamental),
                peak_frequencies_hz=tuple(f[columns].tolist()),
            )
        )
        claimed[columns] = True
        row, col = np.divmod(cells, cols)
        free = ~claimed[col]
        cells, cell_order = _viable(cells[free], cell_order[free], row[free], f0.size, min_peaks)
    return tuple(families)


def _check_options(
    rel_tol: float, min_peaks: int, max_order: int, max_families: int, false_alarm: float
) -> None:
    if not (np.isfinite(rel_tol) and rel_tol >= 0):
        raise TraceError(f"harmonic tolerance must be a fraction ≥ 0, got {rel_tol!r}")
    if int(min_peaks) < 1 or int(max_order) < 1 or int(max_families) < 0:
        raise TraceError(
            "harmonic search needs min_peaks ≥ 1, max_order ≥ 1 and max_families ≥ 0, "
            f"got {min_peaks}, {max_order}, {max_families}"
        )
    if not (0 < false_alarm <= 1):
        raise TraceError(f"false-alarm probability must be in (0, 1], got {false_alarm!r}")


def _peak_arrays(peaks: Sequence[Peak]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Frequencies, prominences (an unknown one counts as 0 dB) and widths."""
    # One pass over the peaks; each column is then a contiguous copy.
    table = np.array([(p.frequency_hz, p.prominence_db, p.width_hz) for p in peaks], dtype=float)
    frequency_hz, prominence_db, width_hz = table.T.copy()
    # min propagates NaN, which fails the comparison like a frequency ≤ 0.
    if not (frequency_hz.min() > 0 and frequency_hz.max() < math.inf):
        bad = ~(np.isfinite(frequency_hz) & (frequency_hz > 0))
        i = int(np.flatnonzero(bad)[0])
        raise TraceError(
            f"peak {i + 1}: frequency must be a positive number, got {frequency_hz[i]}"
        )
    prominence_db[np.isnan(prominence_db)] = 0.0
    return frequency_hz, prominence_db, width_hz


def _per_peak(value: float | ArrayLike, size: int) -> np.ndarray:
    if isinstance(value, int | float):  # the usual case: one step for every peak
        if not (0 <= value < math.inf):
            raise TraceError("resolution must be a non-negative frequency step in Hz")
        return np.full(size, float(value))
    arr = np.asarray(value, dtype=float)
    if arr.ndim == 0:
        arr = np.full(size, float(arr))
    if arr.shape != (size,):
        raise TraceError(f"resolution must be one value or one per peak ({size}), got {arr.shape}")
    if not np.all(np.isfinite(arr) & (arr >= 0)):
        raise TraceError("resolution must be a non-negative frequency step in Hz")
    return arr


def _candidates(f: np.ndarray, prominence_db: np.ndarray) -> np.ndarray:
    """Trial fundamentals seeded from the strongest peaks (see module docstring),
    ascending and distinct. ``f`` is sorted."""
    if f.size <= _MAX_SEEDS:
        seeds = f  # every peak is a seed
    else:
        seeds = np.sort(f[np.argsort(-prominence_db, kind="stable")[:_MAX_SEEDS]])
    divided = (seeds[:, None] / _DIVISORS).ravel()
    spacing = seeds[1:] - seeds[:-1]
    spacing = spacing[spacing > 0]
    trial = np.concatenate([divided, spacing, spacing / 2.0])
    trial.sort()
    return distinct_sorted(trial)


# 1 … _MAX_DIVISOR as a row, read-only.
_DIVISORS = np.arange(1, _MAX_DIVISOR + 1, dtype=np.float64)[None, :]
_DIVISORS.flags.writeable = False


def _match(
    f0: np.ndarray, f: np.ndarray, tol: np.ndarray, max_order: int, order_zero: bool = True
) -> tuple[np.ndarray, np.ndarray]:
    """The matched cells of the (candidate, peak) grid, one peak per order (the closest).

    Returns their flat indices (row-major, ascending) and their orders: peak f
    matches candidate f0 at order n = round(f/f0) when 1 ≤ n ≤ max_order and
    |f − n·f0| ≤ its ``tol``; of peaks sharing an order the closest is kept
    (the first on exact ties). ``order_zero`` False says no f ≤ its tol, so
    no cell of order 0 (|f − 0| = f) is within tolerance.
    """
    orders = np.divide(f[None, :], f0[:, None])
    np.rint(orders, out=orders)  # whole numbers, so the tests below are exact
    deviation = orders * f0[:, None]
    np.subtract(f[None, :], deviation, out=deviation)
    np.abs(deviation, out=deviation)
    cells = (deviation <= tol).ravel().nonzero()[0]
    # 1 ≤ n ≤ max_order, tested on the few cells within reach only.
    cell_order = orders.ravel()[cells]
    in_range = cell_order <= max_order
    if order_zero:
        in_range &= cell_order >= 1
    cells = cells[in_range]
    cell_order = cell_order[in_range].astype(np.int64)
    if cells.size < 2:
        return cells, cell_order
    # Orders do not decrease along a row (f is sorted), so the matched peaks
    # sharing a row and an order are neighbours in the cell list: one key
    # per (row, order), equal keys side by side.
    key = cells // f.size
    key *= max_order + 1
    key += cell_order
    run_start = np.empty(cells.size, dtype=bool)
    run_start[0] = True
    np.not_equal(key[1:], key[:-1], out=run_start[1:])
    if run_start.all():  # the usual case: no two peaks share an order
        return cells, cell_order
    # Of each run keep the closest (the first on exact ties).
    run_id = np.cumsum(run_start) - 1
    dev = deviation.ravel()[cells]
    closest = (dev == np.minimum.reduceat(dev, run_start.nonzero()[0])[run_id]).nonzero()[0]
    closest_run = run_id[closest]
    first = np.empty(closest.size, dtype=bool)
    first[0] = True
    np.not_equal(closest_run[1:], closest_run[:-1], out=first[1:])
    chosen = closest[first]
    return cells[chosen], cell_order[chosen]


def _viable(
    cells: np.ndarray, cell_order: np.ndarray, row: np.ndarray, rows: int, min_peaks: int
) -> tuple[np.ndarray, np.ndarray]:
    """The cells of the candidates (``row``: each cell's) with at least min_peaks cells."""
    enough = (np.bincount(row, minlength=rows) >= min_peaks)[row]
    return cells[enough], cell_order[enough]


def _refine(
    f0: np.ndarray, f: np.ndarray, weight: np.ndarray, cells: np.ndarray, orders: np.ndarray
) -> np.ndarray:
    """Weighted least-squares fundamental per candidate; rows without cells unchanged.

    ``cells`` are flat indices into the (len(f0), len(f)) grid, ``orders``
    their orders. Minimises Σ ((f − n·f0) / tol)², i.e. f0 = Σ w·n·f / Σ w·n²
    with w = 1/tol² (``weight``). As tol grows with f, every order's relative
    deviation counts about equally; the plain Σ n·f / Σ n² would let one stray
    high-order match drag f0.
    """
    row, col = np.divmod(cells, f.size)
    n = orders.astype(np.float64)
    weighted = weight[col] * n
    denominator = np.bincount(row, weights=weighted * n, minlength=f0.size)
    numerator = np.bincount(row, weights=weighted * f[col], minlength=f0.size)
    refined = f0.copy()
    np.divide(numerator, denominator, out=refined, where=denominator > 0)
    return refined


def _best_comb(cells: np.ndarray, cell_order: np.ndarray, cols: int) -> tuple[np.ndarray, ...]:
    """The simplest comb inside each candidate's matches.

    Two readings are scored: all matched orders, or the odd ones only (a stray
    even-order coincidence must not turn a 50 % duty clock into a gappy
    all-orders comb). In each, the comb is cut above the order that maximises
    score = matched − 0.5 × missing, where missing counts the orders (odd
    orders for an odd-only comb) between the lowest and the cut that have no
    peak: a chance match far above the family would otherwise add a long run
    of holes. ``cells`` (ascending flat indices into the candidates × cols
    grid, at least one) and ``cell_order`` are _match's. Returns which cells
    are kept, the candidates that have cells (ascending) and, for each of
    them, the score, the missing count, the highest kept order, whether the
    comb is odd-only and how many cells it keeps.
    """
    # A row's matches are a contiguous segment of the cells, so counts along
    # a row are ranks within its segment and per-row maxima a reduceat. Both
    # readings go through at once: the odd-only reading's cells follow the
    # others, as rows numbered from `rows` on (past every real row). The
    # choice between the two is made per segment of the all-orders reading:
    # one per candidate with cells.
    size = cells.size
    cell_row = cells // cols
    cell_col = cells - cell_row * cols
    cell_odd = (cell_order & 1) == 1  # orders are ≥ 1
    rows = int(cell_row[-1]) + 1
    odd_cells = cell_odd.nonzero()[0]
    total = size + odd_cells.size
    chosen = np.concatenate((np.arange(size), odd_cells))
    row = np.concatenate((cell_row, cell_row[odd_cells] + rows))
    order = cell_order[chosen]
    new_row = np.empty(total, dtype=bool)
    new_row[0] = True
    np.not_equal(row[1:], row[:-1], out=new_row[1:])
    segment = new_row.nonzero()[0]
    segment_id = new_row.cumsum(dtype=np.intp)
    segment_id -= 1
    count = np.arange(1, total + 1) - segment[segment_id]
    span = order - order[segment][segment_id]
    # Orders in the span: all of them, or (the odd-only reading's cells, from
    # `size` on) every other one; spans are ≥ 0.
    possible = span + 1
    possible[size:] = (span[size:] >> 1) + 1
    score = count - _GAP_PENALTY * (possible - count)
    segment_best = np.maximum.reduceat(score, segment)
    # Ties go to the longer comb: more peaks explained for the same score.
    at_best = (score == segment_best[segment_id]).nonzero()[0]
    best_id = segment_id[at_best]
    last_of_segment = np.empty(at_best.size, dtype=bool)
    last_of_segment[-1] = True
    np.not_equal(best_id[1:], best_id[:-1], out=last_of_segment[:-1])
    segment_cut = cell_col[chosen[at_best[last_of_segment]]]  # one per segment
    # Segments 0 … plain − 1 are the all-orders reading of the rows with
    # cells (ascending); the odd-only ones follow, for a subset of those rows.
    plain = int(segment_id[size - 1]) + 1
    candidate = cell_row[segment[:plain]]
    best_score = segment_best[:plain]
    best_cut = segment_cut[:plain]
    best_odd = np.zeros(plain, dtype=bool)
    if segment.size > plain:
        odd_best = segment_best[plain:]
        into = np.searchsorted(candidate, row[segment[plain:]] - rows)
        # The odd-only reading where strictly better (written over the
        # all-orders figures: those views are not needed again).
        better = odd_best > best_score[into]
        better_into = into[better]
        best_score[better_into] = odd_best[better]
        best_cut[better_into] = segment_cut[plain:][better]
        best_odd[better_into] = True
    cell_segment = segment_id[:size]
    kept = cell_col <= best_cut[cell_segment]
    kept &= ~best_odd[cell_segment] | cell_odd
    # Every comb keeps at least its first cell (the cut is at or above it),
    # so every segment has kept cells, in order.
    kept_segment = cell_segment[kept]
    count = np.bincount(kept_segment, minlength=plain)
    # Orders do not decrease along a row (f is sorted): a comb's highest kept
    # order is that of its last kept cell.
    last = np.empty(kept_segment.size, dtype=bool)
    last[-1] = True
    np.not_equal(kept_segment[1:], kept_segment[:-1], out=last[:-1])
    highest = cell_order[kept][last]
    missing = (count - best_score) / _GAP_PENALTY
    return kept, candidate, best_score, missing, highest, best_odd, count


def _poisson_sf(k: np.ndarray, mu: np.ndarray) -> np.ndarray:
    """scipy.stats.poisson.sf(k, mu) for whole numbers k, without its per-call
    argument handling: P(X > k), 1 for k < 0, NaN for a negative or NaN mean."""
    out = np.minimum(np.maximum(special.pdtrc(np.maximum(k, 0).astype(float), mu), 0.0), 1.0)
    out[k < 0] = 1.0
    out[~(mu >= 0)] = np.nan
    return out


def _chance_matches(
    f0: np.ndarray,
    f: np.ndarray,
    tol: np.ndarray,
    active: np.ndarray,
    highest: np.ndarray,
    odd_only: np.ndarray,
) -> np.ndarray:
    """Expected number of peaks up to the family's highest order that would
    fall on one of its orders by chance (an odd-only comb offers half the slots)."""
    inside = f[None, :] <= ((highest + 0.5) * f0)[:, None]
    inside &= active
    # tol/f0 × slots (1 or 2, so exactly slots·tol/f0), at most 1.
    p = tol[None, :] / f0[:, None]
    p *= (2.0 - odd_only)[:, None]
    np.minimum(p, 1.0, out=p)
    p *= inside
    return p.sum(axis=1)


def _median(values: np.ndarray) -> float:
    """np.median of a few finite values (the middle one, or the mean of the
    middle two), without its argument handling."""
    ordered = np.sort(values)
    half = ordered.size // 2
    if ordered.size % 2:
        return float(ordered[half])
    return float((ordered[half - 1] + ordered[half]) / 2.0)


def _is_spread(
    orders: np.ndarray, width_hz: np.ndarray, resolution_hz: np.ndarray, fundamental_hz: float
) -> bool:
    """Spread-spectrum criterion of the module docstring."""
    if orders.size < 2 or not (np.isfinite(width_hz) & (width_hz > 0)).all():
        return False
    if (resolution_hz > 0).any() and _median(width_hz) < (
        _SPREAD_MIN_WIDTH_OVER_RESOLUTION * _median(resolution_hz)
    ):
        return False
    n = orders.astype(float)
    excess = np.maximum(width_hz - resolution_hz, 0.0)
    k = float((n * excess).sum() / (n * n).sum())
    if k <= 0 or k / fundamental_hz < _SPREAD_MIN_FRACTION:
        return False
    ratio = excess / (k * n)
    if (ratio < 1 / _SPREAD_RATIO_LIMIT).any() or (ratio > _SPREAD_RATIO_LIMIT).any():
        return False
    sse_proportional = float(((excess - k * n) ** 2).sum())
    sse_constant = float(((excess - excess.mean()) ** 2).sum())
    return sse_proportional < sse_constant
