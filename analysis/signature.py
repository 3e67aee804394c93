"""Frequency signatures of cases, and how alike two of them are.

A signature is what the "past cases like this one" search compares: a case's
strongest peak frequencies (with their levels, for display) and the
fundamentals of its harmonic families.

The score of :func:`similarity` (0..1) answers "how well does the other case
explain the query's frequencies?":

* Each query frequency q earns a credit in 0..1:

  - direct match: the other has a peak o with |q − o| ≤ tol, where
    tol = max(rel_tol·max(q, o), abs_tol_hz); credit = 1 − 0.5·|q − o|/tol, so
    an exact match earns 1, a match at the edge of tolerance 0.5 and drift
    beyond tolerance nothing;
  - family match: query and other share a fundamental (one in each list,
    within the same tolerance), and q is within tolerance of an integer
    multiple n·g (1 ≤ n ≤ max_order) of the other's value g of it; credit =
    0.7 × the same closeness. This is what lets orders 1, 3, 5 of a 25 MHz
    clock find a case where orders 7, 9, 11 failed;
  - the larger of the two counts.

* The other's peaks earn credits the same way against the query.
* score = 0.75 · (Σ query credits) / M + 0.25 · (Σ other credits) / max(K, M),
  with M query and K other frequencies. The query's coverage dominates (the
  question is whether the other case explains *this* problem); the other's
  term keeps a case that shares one frequency among thirty from ranking with
  one that shares the whole family, and dividing by max(K, M) stops a tiny
  signature (one peak) from looking like a full match of a larger query.

So a single common frequency (a mains-related line, a common 48 MHz bus
clock) earns at most about 1/M of the query term, well below a case that
matches the whole family. Identical signatures score 1.

Symmetry: the score is not symmetric in general: the two coverages are
weighted differently, a peak may match several close peaks on the other side,
and family credit depends on which orders each side happens to show. Swapping
query and other gives the same score when both have the same number of
frequencies and every credit is a one-to-one direct match.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from analysis.errors import TraceError
from analysis.harmonics import find_families
from analysis.types import Family, Peak

_QUERY_WEIGHT = 0.75
_OTHER_WEIGHT = 0.25
_FAMILY_CREDIT = 0.7
# A match at the very edge of tolerance still earns half the credit.
_EDGE_CREDIT = 0.5
# How many direct matches the explanation spells out.
_EXPLAINED_MATCHES = 5


@dataclass(frozen=True, eq=False)
class Signature:
    """Peak frequencies (Hz) with their levels, and harmonic fundamentals (Hz).

    ``level`` may hold NaN when levels are unknown (typed frequencies).
    """

    frequency_hz: np.ndarray
    level: np.ndarray
    fundamentals_hz: np.ndarray

    def __post_init__(self) -> None:
        frequency = _positive_1d(self.frequency_hz, "frequency_hz")
        level = _float_1d(self.level, "level")
        if level.shape != frequency.shape:
            raise TraceError(
                f"signature: {frequency.size} frequencies but {level.size} levels, expected one each"
            )
        object.__setattr__(self, "frequency_hz", frequency)
        object.__setattr__(self, "level", level)
        object.__setattr__(
            self, "fundamentals_hz", _positive_1d(self.fundamentals_hz, "fundamentals_hz")
        )

    def to_dict(self) -> dict[str, list[float | None]]:
        """JSON-safe lists of floats; an unknown level is None."""
        return {
            "frequency_hz": [float(v) for v in self.frequency_hz],
            "level": [float(v) if np.isfinite(v) else None for v in self.level],
            "fundamentals_hz": [float(v) for v in self.fundamentals_hz],
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, object]) -> Signature:
        """Inverse of :meth:`to_dict`; raises TraceError on a malformed mapping."""
        if not isinstance(d, Mapping):
            raise TraceError(f"signature: expected a mapping, got {type(d).__name__}")
        missing = [k for k in ("frequency_hz", "level", "fundamentals_hz") if k not in d]
        if missing:
            raise TraceError(f"signature: missing {', '.join(missing)}")
        levels = d["level"]
        if not isinstance(levels, list | tuple):
            raise TraceError("signature: level must be a list of numbers or nulls")
        return cls(
            frequency_hz=_positive_1d(d["frequency_hz"], "frequency_hz"),
            level=_float_1d([np.nan if v is None else v for v in levels], "level"),
            fundamentals_hz=_positive_1d(d["fundamentals_hz"], "fundamentals_hz"),
        )


def _float_1d(values: object, name: str) -> np.ndarray:
    try:
        return np.asarray(values, dtype=float).reshape(-1)
    except (TypeError, ValueError):
        raise TraceError(f"signature: {name} must be a list of numbers") from None


def _positive_1d(values: object, name: str) -> np.ndarray:
    arr = _float_1d(values, name)
    if not np.all(np.isfinite(arr) & (arr > 0)):
        raise TraceError(f"signature: {name} must be positive frequencies in Hz")
    return arr


def signature_of(
    peaks: Sequence[Peak], families: Sequence[Family], *, max_peaks: int = 30
) -> Signature:
    """The strongest ``max_peaks`` peaks (by prominence, then level), sorted by
    frequency, and the families' fundamentals sorted ascending."""
    if int(max_peaks) < 1:
        raise TraceError(f"signature needs max_peaks ≥ 1, got {max_peaks}")
    frequency = np.array([p.frequency_hz for p in peaks], dtype=float)
    level = np.array([p.level for p in peaks], dtype=float)
    prominence = np.nan_to_num(np.array([p.prominence_db for p in peaks], dtype=float), nan=-np.inf)
    strongest = np.lexsort((-np.nan_to_num(level, nan=-np.inf), -prominence))[: int(max_peaks)]
    keep = strongest[np.argsort(frequency[strongest], kind="stable")]
    fundamentals = np.sort(np.array([f.fundamental_hz for f in families], dtype=float))
    return Signature(frequency_hz=frequency[keep], level=level[keep], fundamentals_hz=fundamentals)


def signature_from_frequencies(
    frequency_hz: ArrayLike, *, rel_tol: float = 0.002, min_peaks: int = 3
) -> Signature:
    """A signature from typed frequencies (levels unknown: NaN).

    Families are found with :func:`analysis.harmonics.find_families` at
    ``rel_tol``; at least three frequencies (``min_peaks``) make a family by
    default, because any two frequencies share some common divisor and two
    are no evidence of a comb.
    """
    frequency = np.sort(_positive_1d(frequency_hz, "frequency_hz"))
    peaks = [Peak(float(f), np.nan, 0.0, 0.0) for f in frequency]
    families = find_families(peaks, rel_tol=rel_tol, min_peaks=min_peaks)
    fundamentals = np.sort(np.array([f.fundamental_hz for f in families], dtype=float))
    return Signature(
        frequency_hz=frequency, level=np.full(frequency.size, np.nan), fundamentals_hz=fundamentals
    )


@dataclass(frozen=True)
class Match:
    """One query frequency and what in the other signature explains it.

    For a direct match ``other_hz`` is the other's peak; for a family match it
    is order × the other's fundamental. ``order`` and ``fundamental_hz`` are
    set when the query frequency sits on a shared family (the other's value of
    the fundamental). ``deviation`` = (query_hz − other_hz) / other_hz.
    """

    query_hz: float
    other_hz: float
    order: int | None
    fundamental_hz: float | None
    deviation: float


@dataclass(frozen=True)
class Similarity:
    score: float
    matches: tuple[Match, ...]
    shared_fundamentals_hz: tuple[float, ...]
    explanation: str


def similarity(
    query: Signature,
    other: Signature,
    *,
    rel_tol: float = 0.005,
    abs_tol_hz: float = 0.0,
    max_order: int = 50,
) -> Similarity:
    """Score how well ``other`` explains ``query`` (module docstring), with
    the matches behind the score and a sentence saying why."""
    return similarities(query, [other], rel_tol=rel_tol, abs_tol_hz=abs_tol_hz, max_order=max_order)[0]


def similarities(
    query: Signature,
    others: Sequence[Signature],
    *,
    rel_tol: float = 0.005,
    abs_tol_hz: float = 0.0,
    max_order: int = 50,
) -> list[Similarity]:
    """:func:`similarity` of ``query`` against each of ``others``, compared all at once."""
    if not others:
        return []
    c = _Comparison(query, others, rel_tol, abs_tol_hz, max_order)
    return [_similarity_of(query, other, c, k) for k, other in enumerate(others)]


def _similarity_of(query: Signature, other: Signature, c: _Comparison, k: int) -> Similarity:
    q = query.frequency_hz
    matches: list[Match] = []
    direct: list[bool] = []
    for i in np.flatnonzero((c.q_direct[k] > 0) | (c.q_family[k] > 0)):
        on_family = bool(c.q_family_on[k, i])
        order = int(c.q_family_order[k, i]) if on_family else None
        fundamental = float(c.q_family_hz[k, i]) if on_family else None
        is_direct = bool(c.q_direct[k, i] >= c.q_family[k, i])
        if is_direct:
            other_hz = float(other.frequency_hz[c.q_direct_j[k, i]])
        else:
            other_hz = float(order * fundamental)
        matches.append(
            Match(
                query_hz=float(q[i]),
                other_hz=other_hz,
                order=order,
                fundamental_hz=fundamental,
                deviation=float((q[i] - other_hz) / other_hz),
            )
        )
        direct.append(is_direct)
    return Similarity(
        score=float(c.score[k]),
        matches=tuple(matches),
        shared_fundamentals_hz=tuple(float(v) for v in query.fundamentals_hz[c.shared_q[k]]),
        explanation=_explain(query, c, k, matches, direct),
    )


def similarity_many(
    query: Signature,
    candidates: Sequence[Signature],
    *,
    rel_tol: float = 0.005,
    abs_tol_hz: float = 0.0,
    max_order: int = 50,
) -> np.ndarray:
    """Scores of ``query`` against every candidate at once (same score as
    :func:`similarity`), as a float array in the candidates' order.

    ``candidates`` is a sequence of signatures or a :class:`SignatureSet`
    (the cheaper form for many candidates read from a table)."""
    if not len(candidates):
        return np.zeros(0)
    return _Comparison(query, candidates, rel_tol, abs_tol_hz, max_order).score


@dataclass(frozen=True, eq=False)
class SignatureSet:
    """C signatures at once: peak frequencies as a NaN-padded (C, K) matrix and
    fundamentals as a NaN-padded (C, B) one (levels are not kept: scores do not
    use them). Built from signatures (:meth:`of`) or straight from table rows
    (:meth:`from_rows`) without making a Signature per candidate."""

    frequency_hz: np.ndarray
    fundamentals_hz: np.ndarray

    def __len__(self) -> int:
        return self.frequency_hz.shape[0]

    @classmethod
    def of(cls, signatures: Sequence[Signature]) -> SignatureSet:
        return cls(
            frequency_hz=_padded([c.frequency_hz for c in signatures])[0],
            fundamentals_hz=_padded([c.fundamentals_hz for c in signatures])[0],
        )

    @classmethod
    def from_rows(
        cls, group: ArrayLike, value_hz: ArrayLike, is_fundamental: ArrayLike
    ) -> SignatureSet:
        """One row per frequency: ``group`` numbers the signatures 0..C−1 in
        non-decreasing order (every number present), ``value_hz`` is the
        frequency and ``is_fundamental`` says whether it is a family's
        fundamental or a peak. Within a signature, rows keep their order."""
        group = np.asarray(group, dtype=np.int64).reshape(-1)
        value = _positive_1d(value_hz, "value_hz")
        fundamental = np.asarray(is_fundamental, dtype=bool).reshape(-1)
        if not (group.size == value.size == fundamental.size):
            raise TraceError("signature set: group, value_hz and is_fundamental differ in length")
        steps = np.diff(group)
        if group.size and (group[0] != 0 or np.any((steps < 0) | (steps > 1))):
            raise TraceError("signature set: group must number the signatures 0, 1, 2 … in order")
        n = int(group[-1]) + 1 if group.size else 0
        return cls(
            frequency_hz=_padded_groups(group[~fundamental], value[~fundamental], n),
            fundamentals_hz=_padded_groups(group[fundamental], value[fundamental], n),
        )

    def signature(self, i: int) -> Signature:
        """Signature ``i`` (levels unknown)."""
        f = self.frequency_hz[i]
        f = f[np.isfinite(f)]
        g = self.fundamentals_hz[i]
        return Signature(frequency_hz=f, level=np.full(f.size, np.nan), fundamentals_hz=g[np.isfinite(g)])


def _padded_groups(group: np.ndarray, values: np.ndarray, n: int) -> np.ndarray:
    """Values of sorted groups 0..n−1 as an (n, widest group) NaN-padded matrix, in row order."""
    counts = np.bincount(group, minlength=n)
    out = np.full((n, max(1, int(counts.max(initial=0)))), np.nan)
    if values.size:
        starts = np.cumsum(counts) - counts
        out[group, np.arange(values.size) - starts[group]] = values
    return out


def _padded(arrays: Sequence[np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """Ragged 1-D arrays as a (C, max length) NaN-padded matrix and its mask."""
    lengths = np.array([a.size for a in arrays], dtype=np.int64)
    width = max(1, int(lengths.max(initial=0)))
    out = np.full((len(arrays), width), np.nan)
    if lengths.sum():
        rows = np.repeat(np.arange(len(arrays)), lengths)
        starts = np.cumsum(lengths) - lengths
        cols = np.arange(lengths.sum()) - np.repeat(starts, lengths)
        out[rows, cols] = np.concatenate(arrays)
    return out, np.isfinite(out)


def _closeness(deviation: np.ndarray, tol: np.ndarray) -> np.ndarray:
    """1 at zero deviation, _EDGE_CREDIT at the tolerance, 0 beyond (and for NaN).

    In place on one temporary (the largest arrays of a search are its (C, M, K)
    deviations): 1 + (−(1 − _EDGE_CREDIT))·ratio is bit for bit 1 − (1 − _EDGE_CREDIT)·ratio.
    """
    with np.errstate(invalid="ignore", divide="ignore"):
        credit = np.divide(deviation, tol)
    no_tol = ~(np.asarray(tol) > 0)
    if no_tol.any():  # within no tolerance only an exact match counts (0/0 is NaN above)
        credit[np.broadcast_to(no_tol, credit.shape) & (deviation == 0)] = 0.0
    outside = ~(credit <= 1.0)  # NaN too
    credit *= -(1.0 - _EDGE_CREDIT)
    credit += 1.0
    credit[outside] = 0.0
    return credit


class _Comparison:
    """Credits of one query against C candidates, all as (C, ...) arrays."""

    def __init__(
        self,
        query: Signature,
        candidates: Sequence[Signature] | SignatureSet,
        rel_tol: float,
        abs_tol_hz: float,
        max_order: int,
    ):
        if not (
            np.isfinite(rel_tol) and rel_tol >= 0 and np.isfinite(abs_tol_hz) and abs_tol_hz >= 0
        ):
            raise TraceError("similarity tolerances must be ≥ 0")
        if rel_tol == 0 and abs_tol_hz == 0:
            raise TraceError("similarity needs rel_tol or abs_tol_hz above 0")
        self.rel_tol, self.abs_tol_hz, self.max_order = rel_tol, abs_tol_hz, max_order
        q = query.frequency_hz
        fq = query.fundamentals_hz
        if not isinstance(candidates, SignatureSet):
            candidates = SignatureSet.of(candidates)
        o, fo = candidates.frequency_hz, candidates.fundamentals_hz
        o_ok = np.isfinite(o)
        n_candidates = len(candidates)

        # Direct matches, (C, M, K); padding is NaN and never matches.
        qq = q[None, :, None]
        oo = o[:, None, :]
        direct = _closeness(np.abs(qq - oo), self.tol(qq, oo))
        self.q_direct = direct.max(axis=2, initial=0.0)
        self.q_direct_j = direct.argmax(axis=2)
        o_direct = direct.max(axis=1, initial=0.0)

        # Shared fundamentals: one in each list within tolerance, (C, A, B).
        fqq = fq[None, :, None]
        foo = fo[:, None, :]
        share = np.abs(fqq - foo) <= self.tol(fqq, foo)
        self.shared_q = share.any(axis=2)  # (C, A): the query's shared fundamentals
        shared_o = share.any(axis=1)  # (C, B): the other's

        # Query peaks on the other's shared families, and the other's peaks on
        # the query's: (C, M) and (C, K).
        q_rows = np.broadcast_to(q, (n_candidates, q.size))
        fq_rows = np.broadcast_to(fq, (n_candidates, fq.size))
        self.q_family, self.q_family_on, self.q_family_order, self.q_family_hz = _on_family(
            q_rows, fo, shared_o, self
        )
        o_family, self.o_family_on, self.o_family_order, self.o_family_hz = _on_family(
            o, fq_rows, self.shared_q, self
        )

        q_credit = np.maximum(self.q_direct, self.q_family)
        o_credit = np.where(o_ok, np.maximum(o_direct, o_family), 0.0)
        if q.size == 0:
            self.score = np.zeros(n_candidates)
        else:
            q_cover = q_credit.sum(axis=1) / q.size
            o_cover = o_credit.sum(axis=1) / np.maximum(o_ok.sum(axis=1), q.size)
            self.score = _QUERY_WEIGHT * q_cover + _OTHER_WEIGHT * o_cover

    def tol(self, a: np.ndarray, b: np.ndarray) -> np.ndarray:
        """Matching tolerance between frequencies a and b (broadcast)."""
        return np.maximum(self.rel_tol * np.maximum(a, b), self.abs_tol_hz)


def _on_family(
    f: np.ndarray, fundamentals: np.ndarray, shared: np.ndarray, c: _Comparison
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Family credit of frequencies f (C, N) on the shared fundamentals among
    ``fundamentals`` (C, B).

    Returns, per (C, N): the credit, whether the frequency sits on a shared
    family, its order and that family's fundamental (the best-fitting one).
    """
    shape = f.shape
    if fundamentals.shape[1] == 0:
        return (
            np.zeros(shape),
            np.zeros(shape, bool),
            np.zeros(shape, np.int64),
            np.full(shape, np.nan),
        )
    g = np.where(shared, fundamentals, np.nan)[:, None, :]
    ff = f[:, :, None]
    with np.errstate(invalid="ignore"):
        order = np.rint(ff / g)
    valid = (order >= 1) & (order <= c.max_order)
    closeness = np.where(valid, _closeness(np.abs(ff - order * g), c.tol(ff, ff)), 0.0)
    best = closeness.argmax(axis=2)[..., None]
    best_close = np.take_along_axis(closeness, best, axis=2)[..., 0]
    best_order = np.take_along_axis(np.nan_to_num(order), best, axis=2)[..., 0]
    best_g = np.take_along_axis(np.broadcast_to(g, closeness.shape), best, axis=2)[..., 0]
    on = best_close > 0
    return _FAMILY_CREDIT * best_close, on, best_order.astype(np.int64), best_g


def _format_hz(value: float) -> str:
    for scale, unit in ((1e9, "GHz"), (1e6, "MHz"), (1e3, "kHz")):
        if abs(value) >= scale:
            return f"{value / scale:.4g} {unit}"
    return f"{value:.4g} Hz"


def _orders_text(orders: Sequence[int]) -> str:
    return ", ".join(str(n) for n in sorted(set(orders)))


def _explain(
    query: Signature, c: _Comparison, k: int, matches: Sequence[Match], direct: Sequence[bool]
) -> str:
    """Shared families with their orders, then the direct matches, in words."""
    parts: list[str] = []
    for g in query.fundamentals_hz[c.shared_q[k]]:
        # Query orders on the other's value of this fundamental (within tolerance).
        here = [
            m.order
            for m in matches
            if m.order is not None and abs(m.fundamental_hz - g) <= c.tol(m.fundamental_hz, g)
        ]
        there = c.o_family_order[k][c.o_family_on[k] & (c.o_family_hz[k] == g)].tolist()
        if not here and not there:
            continue
        if sorted(set(here)) == sorted(set(there)):
            parts.append(f"same {_format_hz(g)} family: orders {_orders_text(here)} match")
        else:
            parts.append(
                f"same {_format_hz(g)} family: orders {_orders_text(here) or 'none'} here, "
                f"orders {_orders_text(there) or 'none'} there"
            )
    direct_matches = [m for m, d in zip(matches, direct, strict=True) if d]
    if direct_matches:
        words = []
        for m in direct_matches[:_EXPLAINED_MATCHES]:
            if m.deviation == 0:
                words.append(f"{_format_hz(m.query_hz)} matched")
            else:
                words.append(
                    f"{_format_hz(m.query_hz)} matched {_format_hz(m.other_hz)} "
                    f"within {abs(m.deviation) * 100:.2g} %"
                )
        more = len(direct_matches) - _EXPLAINED_MATCHES
        parts.append(
            f"{len(direct_matches)} of {query.frequency_hz.size} frequencies match: "
            + ", ".join(words)
            + (f" and {more} more" if more > 0 else "")
        )
    return "; ".join(parts) if parts else "no frequency or family in common"
