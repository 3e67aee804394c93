"""Source attribution: label peaks with the known sources that explain them.

Given the board's known sources (a 16 MHz crystal, a 2.2 MHz buck, ...),
:func:`attribute` explains each peak as

* a harmonic n·f_a, n = 1..``max_harmonic`` (100 by default: clock harmonics
  routinely fail a scan far above the fifth order), or
* a mixing product Σ nᵢ·fᵢ of 2..``max_terms`` different sources, each
  |nᵢ| ≤ ``max_order`` (5): two sources meeting in a non-linearity give
  n·f_a ± m·f_b, e.g. a clock amplitude-modulated by a switching converter
  shows sidebands f_clock ± f_sw.

Tolerance: a source's frequency is known to ± tolerance_hz, and n times the
frequency is known to n times that, so a candidate Σ nᵢ·fᵢ has tolerance
Σ |nᵢ|·tolᵢ, plus the peak's own frequency resolution (``resolution_hz``,
0 by default). A peak matches when |f_peak − Σ nᵢ·fᵢ| is within it.

Orders are tried only while they stay distinguishable: a candidate whose
tolerance reaches half of the smallest source frequency in it is dropped
(order n and n + 1 would both fit, so the label would say nothing).

Simplicity, when several candidates fit: fewer terms first (a single harmonic
before any mixing product), then the smaller total Σ |nᵢ|, then the smaller
|error|. A peak nothing explains within tolerance is left out of the result,
never forced onto the nearest candidate.
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence

import numpy as np
from numpy.typing import ArrayLike

from analysis.errors import TraceError
from analysis.types import Attribution, Peak, Source, Term

# Peaks are matched in chunks so the candidate × peak matrix stays small.
_CELLS_PER_CHUNK = 4_000_000


def attribute(
    peaks: Sequence[Peak],
    sources: Sequence[Source],
    *,
    max_order: int = 5,
    max_terms: int = 2,
    max_harmonic: int = 100,
    resolution_hz: float | ArrayLike = 0.0,
) -> tuple[Attribution, ...]:
    """Explain each peak by the simplest combination of sources within tolerance.

    Returns one Attribution per explained peak, in the peaks' order; terms
    follow the order of ``sources``; error_hz = f_peak − Σ order·f_source.
    ``resolution_hz`` is one value or one per peak. Raises TraceError on bad
    sources or options.
    """
    if int(max_order) < 1 or int(max_terms) < 1 or int(max_harmonic) < 1:
        raise TraceError(
            "attribution needs max_order, max_terms and max_harmonic ≥ 1, "
            f"got {max_order}, {max_terms}, {max_harmonic}"
        )
    names, source_hz, source_tol = _source_arrays(sources)
    if not peaks or not names:
        return ()
    frequency_hz = np.array([p.frequency_hz for p in peaks], dtype=float)
    if not np.all(np.isfinite(frequency_hz)):
        i = int(np.flatnonzero(~np.isfinite(frequency_hz))[0])
        raise TraceError(f"peak {i + 1}: frequency must be a number, got {frequency_hz[i]}")
    resolution = np.asarray(resolution_hz, dtype=float)
    if resolution.ndim == 0:
        resolution = np.full(frequency_hz.size, float(resolution))
    if resolution.shape != frequency_hz.shape or not np.all(
        np.isfinite(resolution) & (resolution >= 0)
    ):
        raise TraceError(
            f"resolution must be one non-negative value or one per peak ({frequency_hz.size})"
        )

    cand = _candidates(source_hz, source_tol, int(max_order), int(max_terms), int(max_harmonic))
    if cand.hz.size == 0:
        return ()
    result: list[Attribution] = []
    chunk = max(1, _CELLS_PER_CHUNK // max(1, cand.hz.size))
    for start in range(0, frequency_hz.size, chunk):
        f = frequency_hz[start : start + chunk]
        res = resolution[start : start + chunk]
        error = f[:, None] - cand.hz[None, :]
        fits = np.abs(error) <= cand.tol_hz[None, :] + res[:, None]
        # Candidates are sorted by simplicity class; take the simplest class
        # that fits, then the smallest |error| inside it.
        no_fit = np.iinfo(np.int64).max
        simplest = np.where(fits, cand.rank[None, :], no_fit).min(axis=1)
        in_class = fits & (cand.rank[None, :] == simplest[:, None])
        best = np.argmin(np.where(in_class, np.abs(error), np.inf), axis=1)
        for i in np.flatnonzero(simplest != no_fit):
            k = best[i]
            terms = tuple(
                Term(source=names[s], order=int(o))
                for s, o in zip(cand.source_idx[k], cand.orders[k], strict=True)
                if o != 0
            )
            result.append(
                Attribution(frequency_hz=float(f[i]), terms=terms, error_hz=float(error[i, k]))
            )
    return tuple(result)


def _source_arrays(sources: Sequence[Source]) -> tuple[list[str], np.ndarray, np.ndarray]:
    names = [s.name for s in sources]
    if len(set(names)) != len(names):
        raise TraceError(f"source names must be unique, got {names}")
    hz = np.array([s.frequency_hz for s in sources], dtype=float)
    tol = np.array([s.tolerance_hz for s in sources], dtype=float)
    for name, f, t in zip(names, hz, tol, strict=True):
        if not (np.isfinite(f) and f > 0):
            raise TraceError(f"source {name}: frequency must be a positive number of Hz, got {f}")
        if not (np.isfinite(t) and t >= 0):
            raise TraceError(f"source {name}: tolerance must be ≥ 0 Hz, got {t}")
    return names, hz, tol


class _Candidates:
    """All combinations Σ orders·f as flat arrays, sorted by simplicity."""

    def __init__(
        self,
        hz: np.ndarray,
        tol_hz: np.ndarray,
        source_idx: np.ndarray,
        orders: np.ndarray,
    ):
        n_terms = np.count_nonzero(orders, axis=1)
        total = np.abs(orders).sum(axis=1)
        order = np.lexsort((total, n_terms))
        self.hz = hz[order]
        self.tol_hz = tol_hz[order]
        self.source_idx = source_idx[order]
        self.orders = orders[order]
        # Dense rank of (terms, total order): equal rank = equally simple.
        key = n_terms[order] * (total.max(initial=0) + 1) + total[order]
        self.rank = np.cumsum(np.r_[0, np.diff(key)] != 0).astype(np.int64)


def _candidates(
    source_hz: np.ndarray,
    source_tol: np.ndarray,
    max_order: int,
    max_terms: int,
    max_harmonic: int,
) -> _Candidates:
    """Harmonics of each source and mixing products of 2..max_terms sources."""
    n_src = source_hz.size
    width = min(max_terms, n_src)
    hz, tol, idx, orders = [], [], [], []

    n = np.arange(1, max_harmonic + 1)
    for s in range(n_src):
        hz.append(n * source_hz[s])
        tol.append(n * source_tol[s])
        idx.append(np.tile(np.r_[s, np.zeros(width - 1, dtype=int)], (n.size, 1)))
        orders.append(np.column_stack([n] + [np.zeros(n.size, dtype=int)] * (width - 1)))

    signed = np.r_[np.arange(-max_order, 0), np.arange(1, max_order + 1)]
    # A loop over source combinations (a handful); the orders are a grid.
    for r in range(2, width + 1):
        grid = np.array(list(itertools.product(signed, repeat=r)), dtype=int)
        for combo in itertools.combinations(range(n_src), r):
            c = np.array(combo)
            hz.append(grid @ source_hz[c])
            tol.append(np.abs(grid) @ source_tol[c])
            pad = width - r
            idx.append(np.tile(np.r_[c, np.zeros(pad, dtype=int)], (grid.shape[0], 1)))
            orders.append(np.hstack([grid, np.zeros((grid.shape[0], pad), dtype=int)]))

    hz_a = np.concatenate(hz)
    tol_a = np.concatenate(tol)
    idx_a = np.concatenate(idx)
    orders_a = np.concatenate(orders)
    # Smallest source frequency in each candidate, for the distinguishability rule.
    involved = np.where(orders_a != 0, source_hz[idx_a], np.inf).min(axis=1)
    keep = (hz_a > 0) & (tol_a < involved / 2)
    return _Candidates(hz_a[keep], tol_a[keep], idx_a[keep], orders_a[keep])
