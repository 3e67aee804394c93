"""The team's memory: past cases found by their frequency signature.

A new product fails at 48, 96 and 144 MHz; this finds the board that failed
the same way two years ago and the fix that worked, with the dB it bought.

Index (in the database, never in Python memory). Every analysed scan and
hunt capture of a case, and at closure its failing frequencies, become a
``SignatureItem`` with one ``SignatureRow`` per peak and per harmonic
family's fundamental. The rows carry copies of what the filters need (team,
product, outcome, opened on, emission kind), so the candidate query reads
one table. Writes happen in the transaction that stores the analysis or
closes the case. An open case is found through its analysed scans and
captures; its failing frequencies join the index when it closes (until then
they change with every confirmation and edit).

Search, in two steps:

1. Candidates, in one SQL query that reads the index and nothing else, the
   same text on SQLite and PostgreSQL: one range per query frequency (its
   possible direct partners) and one per query fundamental (the stored
   fundamentals it can share), each a B-tree range scan of the frequency
   index that reads at most ``rows_per_range`` rows (fewer when a query has
   many ranges: ROWS_PER_QUERY in all), those nearest the range's centre
   (half from each side). Grouped by case, the pre-score sums over the
   ranges a case matches the range's weight × its closeness (1 at the
   centre, ½ at the edge); a fundamental weighs 0.7 × the number of
   query frequencies on its orders, as sharing it earns the family credit for
   each of them. The best ``candidates`` (200) go on.
2. Scores: the candidates' items are loaded (each item's frequencies packed
   in one column, ``SignatureItem.packed_hz``), one Signature per item, and
   scored at once with ``analysis.signature.similarity_many`` (the score its
   module documents: query coverage, family credit, the other's coverage).
   A case scores as its best item. The page's hits are then explained with
   ``analysis.signature.similarity``.

Each range is a superset of what the score can credit (``query_ranges``),
and a past item earns family credit only through a fundamental it shares
with the query, which that fundamental's range finds. So while no range
holds more than ``rows_per_range`` visible rows, every case the score can
credit is a candidate (then cut to the best 200 by pre-score). Beyond that,
on a frequency that thousands of past cases share, the closest matches are
kept and the work stays bounded: a query's cost does not grow with the
number of cases (``manage.py bench_search`` measures it).

Why not one VALUES list of ranges joined on ``frequency_hz BETWEEN lo AND
hi``: PostgreSQL estimates each inequality of such a join at one third, so
it expects a tenth of the table per range and prefers reading the whole
index in case order; ranges given as constants, one subquery each, are
estimated from the statistics and read from the index alone. Multiples n·g
of the query's fundamentals are not ranges of their own either: on common
clocks they match a large share of all rows while adding nothing the
fundamental's range does not find.

Who sees what: the requesting user's teams' cases (open or closed), plus the
closed cases of teams that share theirs (``Team.share_closed_cases``). Every
hit is checked again against the case's own row before it is shown, so a
copy in the index that is out of step (a reopened case, say) never widens
what a user sees.

The improvement of a verified countermeasure is read from its latest
verification with levels: level before − level after, in dB (positive =
quieter), at the case's worst failing frequency among those measured (the
one with the least margin before the fix), and the mean over all measured
failing frequencies.
"""

from __future__ import annotations

import datetime as dt
import logging
import uuid
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

import numpy as np
from django.conf import settings
from django.core.exceptions import ValidationError
from django.db import connection, transaction
from django.db.models import F
from django.utils import timezone

from analysis.errors import TraceError
from analysis.frequencies import (
    Tolerance,
    format_hz,
    parse_frequencies,
    parse_tolerance,
    tolerance_from_percent,
)
from analysis.signature import (
    Signature,
    SignatureSet,
    Similarity,
    signature_from_frequencies,
    similarities,
    similarity_many,
)
from emicase.models import (
    AnalysisStatus,
    Capture,
    Case,
    Countermeasure,
    Domain,
    FailingFrequency,
    Membership,
    Scan,
    SignatureItem,
    SignatureRow,
    Team,
    Verification,
    VerificationResult,
)

log = logging.getLogger("emicase.search")

Outcome = SignatureRow.Outcome
Role = SignatureRow.Role

# How many candidates (by pre-score) are scored exactly.
CANDIDATES = 200
# Index rows read per query range at most, nearest its centre (half a side), and
# per query: a query of many ranges reads fewer rows from each.
ROWS_PER_RANGE = 400
ROWS_PER_QUERY = 8000
# Harmonic orders the score considers (analysis.signature's default).
MAX_ORDER = 50
# Family credit per query frequency on a shared fundamental (analysis.signature).
_FAMILY_WEIGHT = 0.7
# A query searches with at most this many frequencies and fundamentals: two
# subqueries per range stay well inside SQLite's 500-term compound limit.
MAX_QUERY_FREQUENCIES = 100
MAX_QUERY_FUNDAMENTALS = 20
# A fundamental of the case's scans joins a case query when at least this
# many failing frequencies sit on its orders (one could be chance).
_FAMILY_EVIDENCE = 2
MAX_HITS = 50
# A trace analysed on the fly is at most this large (setting
# EMICASE_SEARCH_MAX_TRACE_BYTES): a search answers while the engineer waits.
DEFAULT_MAX_TRACE_BYTES = 20 * 1024 * 1024


def max_trace_bytes() -> int:
    return int(getattr(settings, "EMICASE_SEARCH_MAX_TRACE_BYTES", DEFAULT_MAX_TRACE_BYTES))


_OUTCOME_OF_CLOSURE = {Case.Closure.FIXED: Outcome.FIXED, Case.Closure.WAIVED: Outcome.WAIVED}


# ================================================================= the index


def _outcome(case: Case) -> int:
    return _OUTCOME_OF_CLOSURE.get(case.closure, Outcome.OPEN)


def _opened_on(case: Case) -> dt.date:
    return timezone.localtime(case.opened_at).date()


def _case_for_index(case_id: int) -> Case:
    return Case.objects.select_related("product").get(pk=case_id)


def pack_signature(peaks_hz, fundamentals_hz) -> tuple[int, bytes]:
    """(peak count, ``SignatureItem.packed_hz``): the peaks, then the fundamentals, each
    ascending, as little-endian float64: the order the item's rows sort in."""
    peaks = np.sort(np.asarray(peaks_hz, dtype=float).ravel())
    fundamentals = np.sort(np.asarray(fundamentals_hz, dtype=float).ravel())
    return int(peaks.size), np.concatenate([peaks, fundamentals]).astype("<f8").tobytes()


def _store_item(
    *,
    case: Case,
    source: str,
    signature: Signature,
    emission_kind: str = "",
    scan=None,
    capture=None,
) -> SignatureItem:
    """Write one item and its rows. Call inside a transaction, after removing the item it replaces."""
    peak_count, packed = pack_signature(signature.frequency_hz, signature.fundamentals_hz)
    item = SignatureItem.objects.create(
        case=case,
        source=source,
        scan=scan,
        capture=capture,
        emission_kind=emission_kind,
        peak_count=peak_count,
        packed_hz=packed,
    )
    common = {
        "item": item,
        "case_id": case.pk,
        "team_id": case.product.team_id,
        "product_id": case.product_id,
        "emission_kind": emission_kind,
        "outcome": _outcome(case),
        "opened_on": _opened_on(case),
    }
    SignatureRow.objects.bulk_create(
        [
            SignatureRow(role=Role.PEAK, frequency_hz=float(f), **common)
            for f in signature.frequency_hz
        ]
        + [
            SignatureRow(role=Role.FUNDAMENTAL, frequency_hz=float(f), **common)
            for f in signature.fundamentals_hz
        ]
    )
    return item


def _is_after_scan(scan: Scan) -> bool:
    return Verification.objects.filter(after_scan=scan).exists()


def signature_index_scan(*, scan: Scan, signature: Signature | None) -> SignatureItem | None:
    """Index (or re-index) an analysed scan's signature. Call inside the transaction that stores its results.

    Scans without a case and after-scans of a countermeasure are not
    indexed (any earlier item of theirs is removed). Returns the item or None.
    """
    SignatureItem.objects.filter(scan=scan).delete()
    if scan.case_id is None or signature is None or _is_after_scan(scan):
        return None
    return _store_item(
        case=_case_for_index(scan.case_id),
        source=SignatureItem.Source.SCAN,
        signature=signature,
        emission_kind=scan.emission_kind,
        scan=scan,
    )


def signature_index_capture(
    *, capture: Capture, signature: Signature | None
) -> SignatureItem | None:
    """Index (or re-index) an analysed hunt capture's signature. Call inside the transaction that stores it.

    Captures that re-measure a spot after a countermeasure are not indexed.
    Near-field captures carry no emission kind. Returns the item or None.
    """
    SignatureItem.objects.filter(capture=capture).delete()
    if signature is None or capture.countermeasure_id is not None:
        return None
    return _store_item(
        case=_case_for_index(capture.case_id),
        source=SignatureItem.Source.CAPTURE,
        signature=signature,
        capture=capture,
    )


def _kind_of_failing(ff: FailingFrequency, scan_kinds: dict[int, str]) -> str:
    """A failing frequency's emission kind: its scan's, else read from its unit (field strength = radiated)."""
    if ff.scan_id in scan_kinds:
        return scan_kinds[ff.scan_id]
    unit = ff.unit.lower()
    if unit.endswith("/m"):
        return Scan.EmissionKind.RADIATED
    if unit in ("dbuv", "dbµv", "dbua", "dbµa"):
        return Scan.EmissionKind.CONDUCTED
    return ""


def _rows_by_item(case_ids: Sequence[int], sources: Iterable[str] | None = None) -> dict[int, dict]:
    """The stored signatures of the cases' items: item id → {case, kind, peaks, fundamentals}."""
    qs = SignatureRow.objects.filter(case_id__in=list(case_ids))
    if sources is not None:
        qs = qs.filter(item__source__in=list(sources))
    out: dict[int, dict] = {}
    for item_id, case_id, kind, role, f in qs.order_by(
        "item_id", "role", "frequency_hz"
    ).values_list("item_id", "case_id", "emission_kind", "role", "frequency_hz"):
        entry = out.setdefault(
            item_id, {"case": case_id, "kind": kind, "peaks": [], "fundamentals": []}
        )
        entry["fundamentals" if role == Role.FUNDAMENTAL else "peaks"].append(f)
    return out


def _supported_fundamentals(
    frequency_hz: np.ndarray, fundamentals_hz: np.ndarray, rel_tol: float, abs_tol_hz: float
) -> np.ndarray:
    """Those fundamentals with at least _FAMILY_EVIDENCE of the frequencies on their orders (≤ MAX_ORDER)."""
    if frequency_hz.size == 0 or fundamentals_hz.size == 0:
        return np.zeros(0)
    g = np.unique(fundamentals_hz)[:, None]
    f = frequency_hz[None, :]
    order = np.rint(f / g)
    tol = np.maximum(rel_tol * f, abs_tol_hz)
    on = (order >= 1) & (order <= MAX_ORDER) & (np.abs(f - order * g) <= tol)
    return g[on.sum(axis=1) >= _FAMILY_EVIDENCE, 0]


def failing_signature(
    frequency_hz: Sequence[float], extra_fundamentals_hz: Sequence[float], tolerance: Tolerance
) -> Signature:
    """A signature of failing frequencies: their own families (three or more on one comb) plus the
    given fundamentals (from the case's scans) that at least two of them sit on."""
    f = np.unique(np.asarray(frequency_hz, dtype=float))
    own = signature_from_frequencies(f)
    extra = _supported_fundamentals(
        f, np.asarray(extra_fundamentals_hz, dtype=float), tolerance.rel_tol, tolerance.abs_tol_hz
    )
    fundamentals = _merge_close(np.concatenate([own.fundamentals_hz, extra]), tolerance)
    return Signature(frequency_hz=f, level=np.full(f.size, np.nan), fundamentals_hz=fundamentals)


def _merge_close(values: np.ndarray, tolerance: Tolerance) -> np.ndarray:
    """Sorted values with near-duplicates (within tolerance of the previous kept one) dropped."""
    values = np.sort(values)
    kept: list[float] = []
    for v in values:  # a handful of fundamentals
        if not kept or v - kept[-1] > max(tolerance.rel_tol * v, tolerance.abs_tol_hz):
            kept.append(float(v))
    return np.array(kept, dtype=float)


def team_tolerance(team: Team) -> Tolerance:
    return tolerance_from_percent(team.frequency_tolerance_pct)


def _scan_fundamentals(case: Case, kind: str | None) -> np.ndarray:
    items = _rows_by_item([case.pk], sources=[SignatureItem.Source.SCAN])
    return np.array(
        [
            g
            for it in items.values()
            if kind is None or it["kind"] == kind
            for g in it["fundamentals"]
        ],
        dtype=float,
    )


def signature_case_closed(*, case: Case) -> None:
    """Index a closing case's failing frequencies (one item per emission kind) and mark its outcome.

    Call inside the transaction that closes the case.
    """
    case = _case_for_index(case.pk)
    SignatureItem.objects.filter(case=case, source=SignatureItem.Source.FAILING).delete()
    failing = list(case.failing_frequencies.all())
    scan_kinds = dict(
        Scan.objects.filter(pk__in={ff.scan_id for ff in failing if ff.scan_id}).values_list(
            "pk", "emission_kind"
        )
    )
    by_kind: dict[str, list[float]] = {}
    for ff in failing:
        by_kind.setdefault(_kind_of_failing(ff, scan_kinds), []).append(ff.frequency_hz)
    tolerance = team_tolerance(case.product.team)
    for kind, frequencies in sorted(by_kind.items()):
        signature = failing_signature(frequencies, _scan_fundamentals(case, kind), tolerance)
        _store_item(
            case=case, source=SignatureItem.Source.FAILING, signature=signature, emission_kind=kind
        )
    signature_case_outcome(case=case)


def signature_case_outcome(*, case: Case) -> int:
    """Copy the case's outcome (open, fixed, waived) onto its index rows. Returns how many rows changed.

    Call inside the transaction that closes or reopens the case.
    """
    outcome = _outcome(Case.objects.only("closure").get(pk=case.pk))
    return (
        SignatureRow.objects.filter(case_id=case.pk)
        .exclude(outcome=outcome)
        .update(outcome=outcome)
    )


def _stored_signature(results: dict) -> Signature | None:
    try:
        return Signature.from_dict(results["signature"])
    except (KeyError, TypeError, TraceError):
        return None


@transaction.atomic
def signature_reindex_case(*, case: Case) -> int:
    """Rebuild a case's index from its stored analysis results. Returns how many items were written."""
    case = Case.objects.select_for_update().get(pk=case.pk)
    SignatureItem.objects.filter(case=case).delete()
    done = AnalysisStatus.DONE
    n = 0
    for scan in Scan.objects.filter(case=case, status=done).only(
        "pk", "case", "emission_kind", "results"
    ):
        n += signature_index_scan(scan=scan, signature=_stored_signature(scan.results)) is not None
    captures = Capture.objects.filter(case=case, status=done).only(
        "pk", "case", "countermeasure", "results"
    )
    for capture in captures:
        n += (
            signature_index_capture(capture=capture, signature=_stored_signature(capture.results))
            is not None
        )
    if case.is_closed:
        signature_case_closed(case=case)
        n += SignatureItem.objects.filter(case=case, source=SignatureItem.Source.FAILING).count()
    return n


# ================================================================= queries


@dataclass(frozen=True, eq=False)
class Query:
    """What to search with: a signature, the tolerance to match it at, and words for the page.

    ``case_id`` is the querying case, left out of its own results.
    """

    signature: Signature
    tolerance: Tolerance
    kind: str  # "case", "frequencies" or "trace"
    label: str
    case_id: int | None = None
    warnings: tuple[str, ...] = ()


def default_tolerance(user) -> Tolerance:
    """The frequency tolerance of the user's first team (by name), else the installation's default."""
    team = (
        Team.objects.filter(memberships__user=user).order_by("name").first()
        if user.is_authenticated
        else None
    )
    if team is None:
        return tolerance_from_percent(settings.EMICASE_DEFAULT_TOLERANCE_PCT)
    return team_tolerance(team)


def _tolerance(text: str, user) -> Tolerance:
    if not text or not text.strip():
        return default_tolerance(user)
    try:
        return parse_tolerance(text)
    except TraceError as exc:
        raise ValidationError({"tolerance": str(exc)}) from None


def query_from_frequencies(*, text: str, tolerance: str = "", user) -> Query:
    """A query from typed frequencies (``48 MHz, 96 MHz, 144.2 MHz``) and an optional tolerance
    (``0.5 %``, ``50 ppm``, ``200 kHz``; default: the user's team's). ValidationError on nonsense."""
    try:
        frequency_hz = parse_frequencies(text, max_count=MAX_QUERY_FREQUENCIES)
    except TraceError as exc:
        raise ValidationError({"frequencies": str(exc)}) from None
    tol = _tolerance(tolerance, user)
    signature = _bounded(signature_from_frequencies(frequency_hz))
    label = ", ".join(format_hz(f) for f in signature.frequency_hz)
    return Query(signature=signature, tolerance=tol, kind="frequencies", label=label)


def query_from_case(*, case: Case) -> Query:
    """A query from a case: its failing frequencies, with the fundamentals of its scans that
    explain them (the MAX_QUERY_FREQUENCIES with the least margin, if it has more); a case with
    no failing frequency yet searches with its latest analysed scan's signature (else capture's).

    Requires a case the user may read (``selectors.access_case``). ValidationError when the
    case has nothing to search with yet.
    """
    tol = team_tolerance(case.product.team)
    label = f"case #{case.pk} {case.title}"
    failing = list(
        case.failing_frequencies.order_by(F("limit_level") - F("level"), "id").values_list(
            "frequency_hz", flat=True
        )[:MAX_QUERY_FREQUENCIES]
    )
    if failing:
        signature = failing_signature(failing, _scan_fundamentals(case, None), tol)
        return Query(
            signature=_bounded(signature), tolerance=tol, kind="case", label=label, case_id=case.pk
        )
    for source, words in (
        (SignatureItem.Source.SCAN, "scan"),
        (SignatureItem.Source.CAPTURE, "capture"),
    ):
        latest = (
            SignatureItem.objects.filter(case=case, source=source)
            .order_by("-indexed_at", "-id")
            .first()
        )
        if latest is None:
            continue
        item = _rows_by_item([case.pk])[latest.pk]
        peaks = np.array(item["peaks"], dtype=float)
        signature = Signature(
            frequency_hz=peaks,
            level=np.full(peaks.size, np.nan),
            fundamentals_hz=np.array(item["fundamentals"], dtype=float),
        )
        return Query(
            signature=_bounded(signature),
            tolerance=tol,
            kind="case",
            label=label,
            case_id=case.pk,
            warnings=(
                f"No failing frequency is set yet: searching with the peaks of the case's latest {words}.",
            ),
        )
    raise ValidationError(
        "This case has no failing frequency and no analysed scan or capture yet: nothing to search with."
    )


def _bounded(signature: Signature) -> Signature:
    """At most MAX_QUERY_FREQUENCIES frequencies and MAX_QUERY_FUNDAMENTALS fundamentals (the first ones)."""
    f = signature.frequency_hz[:MAX_QUERY_FREQUENCIES]
    return Signature(
        frequency_hz=f,
        level=signature.level[:MAX_QUERY_FREQUENCIES],
        fundamentals_hz=signature.fundamentals_hz[:MAX_QUERY_FUNDAMENTALS],
    )


def query_from_trace(*, file, tolerance: str = "", user) -> Query:
    """A query from an uploaded trace, analysed here and now by the engine and not stored.

    Files above ``max_trace_bytes()`` (20 MB unless set) are refused.
    ValidationError({'trace': ...}) for anything the engine cannot read.
    """
    from analysis.pipeline import analyse_file
    from emicase.services.uploads import check_trace_file

    tol = _tolerance(tolerance, user)
    cap = max_trace_bytes()
    if file.size > cap:
        raise ValidationError(
            {
                "trace": f"{file.name} is {file.size / 2**20:.1f} MB; a search takes traces up to "
                f"{cap / 2**20:.0f} MB (upload bigger ones to a case)."
            }
        )
    try:
        check_trace_file(file, domain=Domain.AUTO)
    except ValidationError as exc:
        raise ValidationError({"trace": exc.message_dict["file"]}) from None
    try:
        result = analyse_file(file.read(), name=file.name)
    except TraceError as exc:
        raise ValidationError({"trace": str(exc)}) from None
    except MemoryError:
        raise ValidationError(
            {"trace": f"{file.name}: too large to analyse in the memory available"}
        ) from None
    except Exception:
        # The engine promises TraceError for bad input; anything else is ours to fix.
        error_id = uuid.uuid4().hex[:12]
        log.exception(
            "on-the-fly analysis of %s for a search crashed (error id %s)", file.name, error_id
        )
        raise ValidationError(
            {"trace": f"Internal error while analysing {file.name} (error id {error_id})."}
        ) from None
    if result.signature.frequency_hz.size == 0:
        raise ValidationError({"trace": f"{file.name}: the analysis found no peak to search with."})
    return Query(
        signature=_bounded(result.signature),
        tolerance=tol,
        kind="trace",
        label=f"trace {file.name}",
        warnings=tuple(result.warnings),
    )


# ================================================================= ranking


@dataclass(frozen=True)
class Filters:
    """Optional narrowing. ``fixed_only``: cases closed as fixed (by a verified countermeasure)."""

    emission_kind: str = ""
    fixed_only: bool = False
    opened_from: dt.date | None = None
    opened_to: dt.date | None = None
    product_id: int | None = None


@dataclass(frozen=True)
class Ranked:
    """A candidate case's score and the item of it that scored best."""

    case_id: int
    score: float
    item_id: int


def visible_teams(user) -> tuple[list[int], list[int]]:
    """(the user's team ids, the ids of other teams that share their closed cases)."""
    if not user.is_authenticated:
        return [], []
    # One query: the teams the user belongs to or that share, each saying which. Plain SQL:
    # building this as an ORM query cost three times what the database takes to answer it.
    team, membership = _table(Team), _table(Membership)
    sql = (
        f"SELECT t.id, EXISTS(SELECT 1 FROM {membership} m WHERE m.team_id = t.id AND m.user_id = %s) "
        f"FROM {team} t WHERE t.share_closed_cases OR EXISTS("
        f"SELECT 1 FROM {membership} m WHERE m.team_id = t.id AND m.user_id = %s) ORDER BY t.id"
    )
    with connection.cursor() as cursor:
        cursor.execute(sql, [user.pk, user.pk])
        rows = cursor.fetchall()
    mine = [int(pk) for pk, member in rows if member]
    return mine, [int(pk) for pk, member in rows if not member]


def _around(f: np.ndarray, tolerance: Tolerance) -> tuple[np.ndarray, np.ndarray]:
    """Every o with |f − o| ≤ max(rel·max(f, o), abs) lies in [lo, hi] (the score's direct match)."""
    rel, ab = tolerance.rel_tol, tolerance.abs_tol_hz
    lo = f - np.maximum(rel * f, ab)
    hi = np.maximum(f / (1.0 - rel), f + ab)
    return lo, hi


def query_ranges(signature: Signature, tolerance: Tolerance) -> np.ndarray:
    """The candidate query's ranges as an (R, 4) array of (lo, centre, hi, weight); row k is range k.

    One row per query frequency (every stored peak the score could match
    directly lies in it), then one per query fundamental (every stored
    fundamental it could share). A fundamental weighs 0.7 × the number of
    query frequencies within tolerance of its orders (at least 0.7).
    """
    q = signature.frequency_hz
    g = signature.fundamentals_hz
    q_lo, q_hi = _around(q, tolerance)
    g_lo, g_hi = _around(g, tolerance)
    order = np.rint(q[None, :] / g[:, None])
    tol = np.maximum(tolerance.rel_tol * q, tolerance.abs_tol_hz)[None, :]
    on = (order >= 1) & (order <= MAX_ORDER) & (np.abs(q[None, :] - order * g[:, None]) <= tol)
    g_weight = _FAMILY_WEIGHT * np.maximum(on.sum(axis=1), 1)
    return np.column_stack(
        [
            np.concatenate([q_lo, g_lo]),
            np.concatenate([q, g]),
            np.concatenate([q_hi, g_hi]),
            np.concatenate([np.ones(q.size), g_weight]),
        ]
    )


def _table(model) -> str:
    return connection.ops.quote_name(model._meta.db_table)


def _number(value: float) -> str:
    """A finite number as an SQL literal that reads back as the very same double (repr round-trips)."""
    value = float(value)
    if not np.isfinite(value):
        raise ValueError(f"not a finite number: {value!r}")
    return repr(value)


def _ids(values: Iterable[int]) -> str:
    return ", ".join(str(int(v)) for v in values)


def _filter_sql(mine: list[int], sharing: list[int], filters: Filters, exclude_case_id: int | None):
    """The WHERE terms on index rows (alias p) for visibility and filters, and the filters' parameters.

    Ids are written into the text (whole numbers only), so the dozens of
    subqueries that repeat the terms carry no parameters of their own.
    """
    visible = f"p.team_id IN ({_ids(mine)})"
    if sharing:
        visible = (
            f"({visible} OR (p.team_id IN ({_ids(sharing)}) AND p.outcome <> {int(Outcome.OPEN)}))"
        )
    terms = [visible]
    params: list = []
    if exclude_case_id is not None:
        terms.append(f"p.case_id <> {int(exclude_case_id)}")
    if filters.fixed_only:
        terms.append(f"p.outcome = {int(Outcome.FIXED)}")
    if filters.product_id is not None:
        terms.append(f"p.product_id = {int(filters.product_id)}")
    if filters.emission_kind:
        terms.append("p.emission_kind = %s")
        params.append(filters.emission_kind)
    if filters.opened_from is not None:
        terms.append("p.opened_on >= %s")
        params.append(connection.ops.adapt_datefield_value(filters.opened_from))
    if filters.opened_to is not None:
        terms.append("p.opened_on <= %s")
        params.append(connection.ops.adapt_datefield_value(filters.opened_to))
    return " AND ".join(terms), params


_INDEX_ORDER = ("p.frequency_hz", "p.team_id", "p.outcome", "p.case_id")


def _candidate_cases(
    ranges: np.ndarray,
    where: str,
    where_params: list,
    limit: int,
    rows_per_range: int,
    rows_per_query: int = ROWS_PER_QUERY,
) -> list[int]:
    """The best ``limit`` cases by pre-score (module docstring); ties go to the newer case.

    Each range is two subqueries, from its centre up and from its centre
    down, each in the frequency index's own order, so both databases read
    the index in order and stop after ``rows_per_range / 2`` rows. The order
    names every column of the index: ties between equal frequencies fall
    the same way on both databases. The ranges' numbers are written into the
    text as exact literals (see ``_number``): a few hundred bound parameters
    cost more to send than the query takes to run.
    """
    if ranges.shape[0] == 0:
        return []
    side = max(1, min(int(rows_per_range), int(rows_per_query) // ranges.shape[0]) // 2)
    up = ", ".join(_INDEX_ORDER)
    down = ", ".join(f"{c} DESC" for c in _INDEX_ORDER)
    table = _table(SignatureRow)
    parts: list[str] = []
    params: list = []
    for k, (lo, centre, hi, weight) in enumerate(ranges.tolist()):
        # credit = weight at the centre, falling linearly to half of it at the edge
        slope = 0.5 * weight / max(hi - centre, centre - lo)
        credit = f"{_number(weight)} - {_number(slope)} * ABS(p.frequency_hz - {_number(centre)})"
        for name, bounds, order in (
            ("a", f"p.frequency_hz >= {_number(centre)} AND p.frequency_hz <= {_number(hi)}", up),
            ("b", f"p.frequency_hz >= {_number(lo)} AND p.frequency_hz < {_number(centre)}", down),
        ):
            parts.append(
                f"SELECT * FROM (SELECT {k} AS k, p.case_id AS case_id, {credit} AS credit "
                f"FROM {table} p WHERE {bounds} AND {where} ORDER BY {order} LIMIT {side}) AS r{k}{name}"
            )
            params += where_params
    sql = (
        "SELECT case_id, SUM(credit) AS prescore FROM ("
        f"SELECT case_id, k, MAX(credit) AS credit FROM ({' UNION ALL '.join(parts)}) AS m "
        f"GROUP BY case_id, k) AS c GROUP BY case_id ORDER BY prescore DESC, case_id DESC LIMIT {int(limit)}"
    )
    with connection.cursor() as cursor:
        cursor.execute(sql, params or None)
        return [int(row[0]) for row in cursor.fetchall()]


def _candidate_signatures(
    case_ids: list[int], emission_kind: str
) -> tuple[np.ndarray, np.ndarray, SignatureSet]:
    """(item ids, their case ids, their signatures) of the candidates' items, by case then item.

    One row per item: its packed frequencies (``SignatureItem.packed_hz``).
    """
    sql = (
        f"SELECT i.id, i.case_id, i.peak_count, i.packed_hz FROM {_table(SignatureItem)} i "
        f"WHERE i.case_id IN ({_ids(case_ids)})"
    )
    params: list = []
    if emission_kind:
        sql += " AND i.emission_kind = %s"
        params.append(emission_kind)
    sql += " ORDER BY i.case_id, i.id"
    with connection.cursor() as cursor:
        cursor.execute(sql, params or None)
        # An item without frequencies (a scan with no peaks) has no rows and scores nothing.
        rows = [r for r in cursor.fetchall() if len(r[3])]
    if not rows:
        return np.zeros(0, np.int64), np.zeros(0, np.int64), SignatureSet.of([])
    n = len(rows)
    item = np.fromiter((r[0] for r in rows), np.int64, n)
    case = np.fromiter((r[1] for r in rows), np.int64, n)
    peak_count = np.fromiter((r[2] for r in rows), np.int64, n)
    # SQLite gives bytes, PostgreSQL a memoryview: both join as bytes.
    blobs = [r[3] for r in rows]
    count = np.fromiter((len(b) for b in blobs), np.int64, n) // 8
    values = np.frombuffer(b"".join(blobs), dtype="<f8")
    group = np.repeat(np.arange(n), count)
    position = np.arange(values.size) - np.repeat(np.cumsum(count) - count, count)
    signatures = SignatureSet.from_rows(group, values, position >= peak_count[group])
    return item, case, signatures


@dataclass
class _Scored:
    ranked: list[Ranked]
    # The candidates' signatures and, for each ranked item, its row in them.
    signatures: SignatureSet | None = None
    row_of_item: dict[int, int] = field(default_factory=dict)
    candidates: int = 0

    def signature(self, item_id: int) -> Signature:
        return self.signatures.signature(self.row_of_item[item_id])


def _rank(
    *,
    teams: tuple[list[int], list[int]],
    query: Query,
    filters: Filters,
    candidates: int,
    rows_per_range: int,
    rows_per_query: int = ROWS_PER_QUERY,
) -> _Scored:
    mine, sharing = teams
    if not mine:
        return _Scored(ranked=[])
    ranges = query_ranges(query.signature, query.tolerance)
    where, where_params = _filter_sql(mine, sharing, filters, query.case_id)
    case_ids = _candidate_cases(
        ranges, where, where_params, candidates, rows_per_range, rows_per_query
    )
    if not case_ids:
        return _Scored(ranked=[])
    item_ids, item_cases, signatures = _candidate_signatures(case_ids, filters.emission_kind)
    if not len(signatures):
        return _Scored(ranked=[], candidates=len(case_ids))
    scores = similarity_many(
        query.signature,
        signatures,
        rel_tol=query.tolerance.rel_tol,
        abs_tol_hz=query.tolerance.abs_tol_hz,
        max_order=MAX_ORDER,
    )
    # Best item per case, then cases by score; ties to the newer case (higher id).
    order = np.lexsort((item_ids, -item_cases, -scores))
    first = np.unique(item_cases[order], return_index=True)[1]
    best = order[np.sort(first)]
    ranked = [
        Ranked(case_id=int(item_cases[i]), score=float(scores[i]), item_id=int(item_ids[i]))
        for i in best
        if scores[i] > 0
    ]
    return _Scored(
        ranked=ranked,
        signatures=signatures,
        row_of_item=dict(zip(item_ids[best].tolist(), best.tolist(), strict=True)),
        candidates=len(case_ids),
    )


def rank(
    *,
    user,
    query: Query,
    filters: Filters = Filters(),
    candidates: int = CANDIDATES,
    rows_per_range: int = ROWS_PER_RANGE,
    rows_per_query: int = ROWS_PER_QUERY,
) -> list[Ranked]:
    """Every scored candidate case with a score above 0, best first (ties: newer case first).

    Read straight from the index: use ``search`` for what a page shows (it
    checks each hit against the case itself).
    """
    scored = _rank(
        teams=visible_teams(user),
        query=query,
        filters=filters,
        candidates=candidates,
        rows_per_range=rows_per_range,
        rows_per_query=rows_per_query,
    )
    return scored.ranked


# ================================================================= hits


@dataclass(frozen=True)
class Fix:
    """A verified countermeasure of a past case and what it achieved.

    ``improvement_db`` = level before − level after at ``at_frequency_hz``, the
    worst failing frequency measured (least margin before); positive is
    quieter. ``mean_improvement_db`` averages all ``measured`` frequencies.
    Both None when the verification holds no levels.
    """

    countermeasure: Countermeasure
    closed_the_case: bool
    improvement_db: float | None
    at_frequency_hz: float | None
    mean_improvement_db: float | None
    measured: int


@dataclass(frozen=True)
class Hit:
    case: Case
    score: float
    item: SignatureItem
    similarity: Similarity
    shared: bool  # another team's case, shown because that team shares its closed cases
    fixes: tuple[Fix, ...]

    @property
    def revision(self):
        """The revision whose scan or capture matched (None for failing frequencies)."""
        source = self.item.scan or self.item.capture
        return source.revision if source is not None else None

    @property
    def outcome(self) -> str:
        return self.case.get_closure_display() if self.case.is_closed else "Still open"


@dataclass(frozen=True)
class SearchResult:
    query: Query
    filters: Filters
    hits: tuple[Hit, ...]
    # Cases that scored above 0, less those the check against the cases dropped (it looks
    # only as far down the ranking as the page needs).
    matched: int
    candidates: int  # cases scored


_ITEM_FIELDS = (
    "case",
    "source",
    "emission_kind",
    *(
        f"{kind}__{name}"
        for kind, names in (("scan", ("original_name",)), ("capture", ("location", "tip")))
        for name in (
            *names,
            "revision__hardware_label",
            "revision__firmware_label",
            "revision__product__name",
        )
    ),
)


def _passes(case: Case, mine: set[int], sharing: set[int], filters: Filters, query: Query) -> bool:
    """The case itself agrees with its copy in the index: visible to the user and inside the filters."""
    team_id = case.product.team_id
    if case.pk == query.case_id:
        return False
    if team_id not in mine and not (team_id in sharing and case.is_closed):
        return False
    if filters.fixed_only and case.closure != Case.Closure.FIXED:
        return False
    if filters.product_id is not None and case.product_id != filters.product_id:
        return False
    opened = _opened_on(case)
    if filters.opened_from is not None and opened < filters.opened_from:
        return False
    return not (filters.opened_to is not None and opened > filters.opened_to)


def fixes_of(cases: Sequence[Case]) -> dict[int, list[Fix]]:
    """Verified countermeasures of the cases with their improvement (module docstring), in two queries."""
    fixed_by = {case.pk: case.fixed_by_id for case in cases}
    if not cases:
        return {}
    cms = list(
        Countermeasure.objects.filter(
            case_id__in=list(fixed_by), status=Countermeasure.Status.VERIFIED
        )
        .select_related("revision__product")
        .order_by("proposed_at", "id")
    )
    if not cms:
        return {}
    results = (
        VerificationResult.objects.filter(
            verification__countermeasure__in=[cm.pk for cm in cms], level_after__isnull=False
        )
        .order_by("verification__recorded_at", "verification_id", "failing_frequency__frequency_hz")
        .values_list(
            "verification__countermeasure_id",
            "verification_id",
            "failing_frequency__frequency_hz",
            "failing_frequency__level",
            "failing_frequency__limit_level",
            "level_after",
        )
    )
    latest: dict[int, tuple[int, list]] = {}
    for cm_id, verification_id, f, level, limit, after in results:
        # Rows come oldest verification first: the last one seen is the latest.
        if cm_id not in latest or latest[cm_id][0] != verification_id:
            latest[cm_id] = (verification_id, [])
        latest[cm_id][1].append((f, level, limit, after))
    out: dict[int, list[Fix]] = {}
    for cm in cms:
        measured = np.array(latest.get(cm.pk, (0, []))[1], dtype=float).reshape(-1, 4)
        if measured.shape[0]:
            f, level, limit, after = measured.T
            worst = int(np.argmin(limit - level))
            improvement = level - after
            values = (float(improvement[worst]), float(f[worst]), float(improvement.mean()))
        else:
            values = (None, None, None)
        out.setdefault(cm.case_id, []).append(
            Fix(
                countermeasure=cm,
                closed_the_case=fixed_by[cm.case_id] == cm.pk,
                improvement_db=values[0],
                at_frequency_hz=values[1],
                mean_improvement_db=values[2],
                measured=int(measured.shape[0]),
            )
        )
    return out


def search(
    *,
    user,
    query: Query,
    filters: Filters = Filters(),
    limit: int = 10,
    candidates: int = CANDIDATES,
    rows_per_range: int = ROWS_PER_RANGE,
    rows_per_query: int = ROWS_PER_QUERY,
) -> SearchResult:
    """The best ``limit`` (≤ 50) past cases for the query that the user may see, explained.

    Each hit carries its score, the matches behind it (query frequency → its
    frequency, harmonic order, deviation) and a sentence saying why, its
    outcome and its verified countermeasures with their improvement in dB.
    """
    limit = max(1, min(int(limit), MAX_HITS))
    mine, sharing = visible_teams(user)
    scored = _rank(
        teams=(mine, sharing),
        query=query,
        filters=filters,
        candidates=candidates,
        rows_per_range=rows_per_range,
        rows_per_query=rows_per_query,
    )
    # Check the ranked cases against themselves in order, a page and a half at a time
    # (one query, unless the index is out of step for several of them), until a page is full.
    mine_set, sharing_set = set(mine), set(sharing)
    chunk = limit + limit // 2 + 2
    shown: list[Ranked] = []
    cases: dict[int, Case] = {}
    dropped = 0
    for start in range(0, len(scored.ranked), chunk):
        batch = scored.ranked[start : start + chunk]
        loaded = Case.objects.select_related("product__team").in_bulk([r.case_id for r in batch])
        for r in batch:
            case = loaded.get(r.case_id)
            if case is None or not _passes(case, mine_set, sharing_set, filters, query):
                dropped += 1
            elif len(shown) < limit:
                shown.append(r)
                cases[r.case_id] = case
        if len(shown) == limit:
            break
    # The matched scan or capture: its name and revision, none of its stored results.
    items = (
        SignatureItem.objects.select_related(
            "scan__revision__product", "capture__revision__product"
        )
        .only(*_ITEM_FIELDS)
        .in_bulk([r.item_id for r in shown])
    )
    fixes = fixes_of(list(cases.values()))
    # The page's hits only, explained in one comparison.
    explained = similarities(
        query.signature,
        [scored.signature(r.item_id) for r in shown],
        rel_tol=query.tolerance.rel_tol,
        abs_tol_hz=query.tolerance.abs_tol_hz,
        max_order=MAX_ORDER,
    )
    hits = []
    for r, why in zip(shown, explained, strict=True):
        case = cases[r.case_id]
        hits.append(
            Hit(
                case=case,
                score=r.score,
                item=items[r.item_id],
                similarity=why,
                shared=case.product.team_id not in mine_set,
                fixes=tuple(fixes.get(case.pk, [])),
            )
        )
    return SearchResult(
        query=query,
        filters=filters,
        hits=tuple(hits),
        matched=len(scored.ranked) - dropped,
        candidates=scored.candidates,
    )
