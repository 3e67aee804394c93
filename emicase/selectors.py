"""Reads, with the query count in mind, and the permission-checked fetch helpers.

Views and tasks get objects only through ``access_*`` helpers, so team
isolation is one small set of functions to test. An object of another team is
reported as missing (Http404), never as forbidden: its existence is not ours
to reveal.
"""

from __future__ import annotations

import bisect
from dataclasses import dataclass, field

from django.db.models import Count, F, Max, Min, Prefetch, Q, QuerySet
from django.http import Http404

from emicase.models import (
    AnalysisStatus,
    Capture,
    CaptureReading,
    Case,
    CaseEvent,
    Countermeasure,
    EmissionSource,
    FailingFrequency,
    Membership,
    Product,
    Revision,
    Scan,
    Team,
    Verification,
    VerificationResult,
)


def memberships_of(user) -> QuerySet[Membership]:
    if not user.is_authenticated:
        return Membership.objects.none()
    return Membership.objects.filter(user=user).select_related("team")


def teams_of(user) -> QuerySet[Team]:
    if not user.is_authenticated:
        return Team.objects.none()
    return Team.objects.filter(memberships__user=user)


def role_in(user, team_id: int) -> str | None:
    """The user's role in the team, or None when not a member."""
    if not user.is_authenticated:
        return None
    return Membership.objects.filter(user=user, team_id=team_id).values_list("role", flat=True).first()


def products_visible_to(user) -> QuerySet[Product]:
    return Product.objects.filter(team__in=teams_of(user))


def cases_visible_to(user) -> QuerySet[Case]:
    return (
        Case.objects.filter(product__team__in=teams_of(user))
        .select_related("product", "owner")
        .annotate(worst_margin_db=Min(F("failing_frequencies__limit_level") - F("failing_frequencies__level")))
    )


def _get_or_404(queryset: QuerySet, pk):
    try:
        return queryset.get(pk=pk)
    except (queryset.model.DoesNotExist, ValueError, TypeError):
        raise Http404(f"No {queryset.model._meta.verbose_name} {pk!r} here.") from None


def access_product(user, product_id) -> Product:
    return _get_or_404(products_visible_to(user).select_related("team"), product_id)


def access_revision(user, revision_id) -> Revision:
    return _get_or_404(
        Revision.objects.filter(product__team__in=teams_of(user)).select_related("product__team"), revision_id
    )


def access_case(user, case_id) -> Case:
    return _get_or_404(
        Case.objects.filter(product__team__in=teams_of(user)).select_related("product__team", "owner"), case_id
    )


def access_scan(user, scan_id) -> Scan:
    return _get_or_404(
        Scan.objects.filter(revision__product__team__in=teams_of(user)).select_related("revision__product__team"),
        scan_id,
    )


def access_capture(user, capture_id) -> Capture:
    return _get_or_404(
        Capture.objects.filter(case__product__team__in=teams_of(user)).select_related("case__product__team"),
        capture_id,
    )


# ----------------------------------------------------------------- page reads
#
# Each page gets what it shows in a fixed number of queries, whatever the
# number of captures or events: lists select_related their people and defer
# the stored envelope and results (only charted rows load them).

HEAVY_FIELDS = ("envelope", "results")
BUSY = (AnalysisStatus.QUEUED, AnalysisStatus.RUNNING)


def can_write(role: str | None) -> bool:
    return role in (Membership.Role.LEAD, Membership.Role.ENGINEER)


def is_lead(role: str | None) -> bool:
    return role == Membership.Role.LEAD


def writable_revisions(user) -> QuerySet[Revision]:
    """Revisions of the teams where the user may write, product first, for upload forms."""
    teams = Membership.objects.filter(user=user, role__in=[Membership.Role.LEAD, Membership.Role.ENGINEER])
    return (
        Revision.objects.filter(product__team__in=teams.values("team"))
        .select_related("product")
        .order_by("product__name", "created_at", "id")
    )


def people_on_cases(case_ids) -> dict[int, list[str]]:
    """Everyone who did something on each case (owner aside), by first appearance: who is on it."""
    rows = (
        CaseEvent.objects.filter(case_id__in=list(case_ids), actor__isnull=False)
        .values("case_id", "actor__username", "actor__first_name", "actor__last_name")
        .annotate(first=Min("at"))
        .order_by("case_id", "first")
    )
    out: dict[int, list[str]] = {}
    for r in rows:
        name = f"{r['actor__first_name']} {r['actor__last_name']}".strip() or r["actor__username"]
        out.setdefault(r["case_id"], []).append(name)
    return out


def recent_events(user, limit: int = 12) -> list[CaseEvent]:
    """The latest timeline lines across the user's teams: what changed lately."""
    return list(
        CaseEvent.objects.filter(case__product__team__in=teams_of(user))
        .select_related("actor", "case")
        .only("id", "kind", "at", "text", "data", "actor__username", "actor__first_name",
              "actor__last_name", "case__id", "case__title")
        .order_by("-at", "-id")[:limit]
    )


def products_with_revisions(user) -> list[Product]:
    """The user's products, each with its revisions and their known sources (three queries)."""
    return list(
        products_visible_to(user)
        .select_related("team")
        .annotate(open_cases=Count("cases", filter=~Q(cases__stage="closed"), distinct=True))
        .prefetch_related(
            Prefetch("revisions", queryset=Revision.objects.order_by("created_at", "id")
                     .prefetch_related(Prefetch("sources", queryset=EmissionSource.objects.order_by("nominal_frequency_hz"))))
        )
        .order_by("team__name", "name")
    )


def revision_sources(revision: Revision) -> list[EmissionSource]:
    return list(revision.sources.order_by("nominal_frequency_hz", "name"))


def queue_positions(items) -> dict[tuple[str, int], int]:
    """Place in the analysis queue of each queued scan or capture, in two queries at most.

    Scans and captures wait on one queue, so the place counts both kinds:
    1 + the number of uploads of either kind queued before this one (the
    rule of ``services.sweeper.queue_position``, across both kinds).
    """
    queued = [it for it in items if it.status == AnalysisStatus.QUEUED]
    if not queued:
        return {}
    latest = max(it.uploaded_at for it in queued)
    times = sorted(
        list(Scan.objects.filter(status=AnalysisStatus.QUEUED, uploaded_at__lt=latest).values_list("uploaded_at", flat=True))
        + list(Capture.objects.filter(status=AnalysisStatus.QUEUED, uploaded_at__lt=latest).values_list("uploaded_at", flat=True))
    )
    return {(type(it).__name__.lower(), it.pk): bisect.bisect_left(times, it.uploaded_at) + 1 for it in queued}


def _after_scan_ids(case: Case) -> set[int]:
    return set(
        Verification.objects.filter(countermeasure__case=case, after_scan__isnull=False).values_list("after_scan_id", flat=True)
    )


@dataclass
class CasePage:
    """Everything the case page shows, read in a constant number of queries."""

    case: Case
    failing: list[FailingFrequency]
    scans: list[Scan]
    after_scan_ids: set[int]
    captures: list[Capture]
    countermeasures: list[Countermeasure]
    events: list[CaseEvent]
    queue: dict[tuple[str, int], int] = field(default_factory=dict)

    @property
    def before_scans(self) -> list[Scan]:
        return [s for s in self.scans if s.pk not in self.after_scan_ids]

    @property
    def busy(self) -> bool:
        return any(s.status in BUSY for s in self.scans) or any(c.status in BUSY for c in self.captures)


def case_failing(case: Case) -> list[FailingFrequency]:
    return list(case.failing_frequencies.order_by("frequency_hz", "id"))


def case_scans(case: Case, *, heavy: bool = False) -> list[Scan]:
    """The case's scans, newest measurement first; results (not the envelope) when ``heavy``."""
    qs = Scan.objects.filter(case=case).select_related("uploaded_by", "revision")
    qs = qs.defer("envelope") if heavy else qs.defer(*HEAVY_FIELDS)
    return list(qs.order_by("measured_on", "uploaded_at", "id"))


def case_captures(case: Case) -> list[Capture]:
    return list(
        Capture.objects.filter(case=case)
        .select_related("uploaded_by")
        .defer(*HEAVY_FIELDS)
        .order_by("-captured_at", "-id")
    )


def case_countermeasures(case: Case) -> list[Countermeasure]:
    """Countermeasures with their verifications and per-frequency results (four queries)."""
    results = VerificationResult.objects.select_related("failing_frequency").order_by("failing_frequency__frequency_hz")
    verifications = (
        Verification.objects.select_related("recorded_by", "after_scan")
        .defer("after_scan__envelope", "after_scan__results")
        .prefetch_related(Prefetch("results", queryset=results))
        .order_by("recorded_at", "id")
    )
    return list(
        Countermeasure.objects.filter(case=case)
        .select_related("proposed_by", "revision")
        .prefetch_related(Prefetch("verifications", queryset=verifications))
        .order_by("proposed_at", "id")
    )


def case_events(case: Case) -> list[CaseEvent]:
    return list(case.events.select_related("actor").order_by("at", "id"))


def case_page(case: Case) -> CasePage:
    """Read the case page's rows: failing frequencies, scans (results, no envelopes), captures
    (no results, no envelopes), countermeasures with verifications, the timeline, queue places."""
    scans = case_scans(case, heavy=True)
    captures = case_captures(case)
    page = CasePage(
        case=case,
        failing=case_failing(case),
        scans=scans,
        after_scan_ids=_after_scan_ids(case),
        captures=captures,
        countermeasures=case_countermeasures(case),
        events=case_events(case),
    )
    page.queue = queue_positions([*scans, *captures])
    return page


def scan_envelope(scan_id: int) -> dict:
    """A scan's stored plotting envelope (``{}`` until analysed)."""
    return Scan.objects.filter(pk=scan_id).values_list("envelope", flat=True).first() or {}


def capture_envelopes(case: Case, capture_ids) -> list[Capture]:
    """The chosen captures of a case with their envelopes, for an overlay chart."""
    return list(
        Capture.objects.filter(case=case, pk__in=list(capture_ids), status=AnalysisStatus.DONE)
        .select_related("uploaded_by")
        .defer("results")
        .order_by("id")
    )


def upload_statuses(case: Case) -> tuple[list[Scan], list[Capture]]:
    """Just the status columns of a case's uploads: what the live status endpoint sends."""
    cols = ("id", "status", "progress", "error_kind", "error_text", "error_id", "uploaded_at", "original_name")
    return (
        list(Scan.objects.filter(case=case).only(*cols).order_by("id")),
        list(Capture.objects.filter(case=case).only(*cols).order_by("id")),
    )


# ----------------------------------------------------------------- localisation


@dataclass
class RankedLocation:
    """One board location within a probe group: its loudest reading at the chosen frequency."""

    location: str
    board_side: str
    x_mm: float | None
    y_mm: float | None
    level: float
    below_top_db: float
    capture: Capture  # the capture that read the loudest level here
    count: int  # captures read at this location in this group
    peak: bool = True  # the analysis found a peak there within tolerance; False: only the floor


@dataclass
class ProbeGroup:
    """Captures made with one probe kind and tip: only their levels compare."""

    probe_kind: str
    probe_label: str
    tip: str
    unit: str
    locations: list[RankedLocation]
    missing: list[Capture]  # analysed, but no point within tolerance of the frequency

    @property
    def has_xy(self) -> bool:
        return any(loc.x_mm is not None for loc in self.locations)

    @property
    def loudest_peak(self) -> RankedLocation | None:
        """The loudest location where the emission shows as a peak (not just the floor)."""
        return next((loc for loc in self.locations if loc.peak), None)


def localisation(case: Case, failing: FailingFrequency) -> list[ProbeGroup]:
    """Rank board locations by the level captures read at ``failing``, per probe kind and tip.

    Only captures of the hunt count (not re-measurements after a
    countermeasure). Groups come loudest first; within a group locations are
    ranked by their highest reading. A location whose capture has no peak
    within the team's tolerance of the frequency is marked ``peak=False``: its
    level is the floor, not the emission. One query (it reads the captures'
    stored peaks, never their envelopes).
    """
    readings = list(
        CaptureReading.objects.filter(
            failing_frequency=failing, capture__case=case, capture__countermeasure__isnull=True,
            capture__status=AnalysisStatus.DONE,
        )
        .select_related("capture__uploaded_by")
        .defer("capture__envelope")
    )
    tol_hz = failing.frequency_hz * case.product.team.frequency_tolerance_pct / 100.0

    def has_peak(cap: Capture) -> bool:
        return any(abs(p["frequency_hz"] - failing.frequency_hz) <= tol_hz for p in (cap.results or {}).get("peaks", []))

    groups: dict[tuple[str, str], dict] = {}
    for r in readings:
        cap = r.capture
        key = (cap.probe_kind, cap.tip.strip())
        g = groups.setdefault(key, {"best": {}, "missing": [], "unit": cap.unit, "label": cap.get_probe_kind_display()})
        if r.level is None:
            g["missing"].append(cap)
            continue
        spot = (cap.location.strip(), cap.board_side)
        best = g["best"].get(spot)
        if best is None:
            g["best"][spot] = [r.level, cap, 1]
        else:
            best[2] += 1
            if r.level > best[0]:
                best[0], best[1] = r.level, cap
    out = []
    for (kind, tip), g in groups.items():
        ranked = sorted(g["best"].items(), key=lambda kv: -kv[1][0])
        top = ranked[0][1][0] if ranked else 0.0
        out.append(
            ProbeGroup(
                probe_kind=kind, probe_label=g["label"], tip=tip, unit=g["unit"], missing=g["missing"],
                locations=[
                    RankedLocation(location=loc, board_side=side, x_mm=cap.x_mm, y_mm=cap.y_mm, level=level,
                                   below_top_db=top - level, capture=cap, count=n, peak=has_peak(cap))
                    for (loc, side), (level, cap, n) in ranked
                ],
            )
        )
    # Groups whose captures show the emission as a peak first, loudest first.
    out.sort(key=lambda g: (g.loudest_peak is None, -(g.locations[0].level if g.locations else -1e9)))
    return out


# ----------------------------------------------------------------- countermeasures


def access_countermeasure(user, countermeasure_id) -> Countermeasure:
    return _get_or_404(
        Countermeasure.objects.filter(case__product__team__in=teams_of(user)).select_related(
            "case__product__team", "case__owner", "revision", "proposed_by"
        ),
        countermeasure_id,
    )


@dataclass
class SpotPair:
    """A spot measured before and after a countermeasure with the same probe and tip."""

    before: Capture
    after: Capture
    before_level: dict[int, float | None]  # failing frequency id → level read before
    after_level: dict[int, float | None]
    change_db: dict[int, float | None]  # failing frequency id → after − before at this spot


def capture_pairs(countermeasure: Countermeasure) -> list[SpotPair]:
    """Pair each analysed after-capture with the loudest hunt capture at the same spot.

    Same spot = same location, board side, probe kind and tip (levels from
    different probes do not compare). Two queries.
    """
    case = countermeasure.case
    captures = list(
        Capture.objects.filter(case=case, status=AnalysisStatus.DONE)
        .filter(Q(countermeasure__isnull=True) | Q(countermeasure=countermeasure))
        .defer(*HEAVY_FIELDS)
        .select_related("uploaded_by")
    )
    readings: dict[int, dict[int, float | None]] = {}
    for r in CaptureReading.objects.filter(capture__in=[c.pk for c in captures]).values(
        "capture_id", "failing_frequency_id", "level"
    ):
        readings.setdefault(r["capture_id"], {})[r["failing_frequency_id"]] = r["level"]

    def spot(c: Capture) -> tuple:
        return (c.location.strip().lower(), c.board_side, c.probe_kind, c.tip.strip().lower())

    def loudness(c: Capture) -> float:
        levels = [v for v in readings.get(c.pk, {}).values() if v is not None]
        return max(levels) if levels else -1e9

    before: dict[tuple, Capture] = {}
    for c in captures:
        if c.countermeasure_id is None and (spot(c) not in before or loudness(c) > loudness(before[spot(c)])):
            before[spot(c)] = c
    pairs = []
    for c in sorted(captures, key=lambda c: c.pk):
        if c.countermeasure_id != countermeasure.pk or spot(c) not in before:
            continue
        b = before[spot(c)]
        ra, rb = readings.get(c.pk, {}), readings.get(b.pk, {})
        change = {
            ff_id: (ra[ff_id] - rb[ff_id]) if ra.get(ff_id) is not None and rb.get(ff_id) is not None else None
            for ff_id in rb
        }
        pairs.append(SpotPair(before=b, after=c, before_level=rb, after_level=ra, change_db=change))
    return pairs


def verified_countermeasures(case: Case) -> list[Countermeasure]:
    return list(case.countermeasures.filter(status=Countermeasure.Status.VERIFIED).order_by("proposed_at"))


def latest_activity(case_ids) -> dict[int, object]:
    return dict(
        CaseEvent.objects.filter(case_id__in=list(case_ids)).values("case_id").annotate(last=Max("at"))
        .values_list("case_id", "last")
    )


def access_source(user, source_id) -> EmissionSource:
    return _get_or_404(
        EmissionSource.objects.filter(revision__product__team__in=teams_of(user)).select_related(
            "revision__product__team"
        ),
        source_id,
    )


def access_team(user, slug) -> Team:
    try:
        return teams_of(user).get(slug=slug)
    except Team.DoesNotExist:
        raise Http404(f"No team {slug!r} here.") from None


def access_failing_frequency(user, failing_id) -> FailingFrequency:
    return _get_or_404(
        FailingFrequency.objects.filter(case__product__team__in=teams_of(user)).select_related(
            "case__product__team", "case__owner"
        ),
        failing_id,
    )


def recently_closed(user, limit: int = 6) -> list[Case]:
    return list(
        Case.objects.filter(product__team__in=teams_of(user), stage=Case.Stage.CLOSED)
        .select_related("product").order_by("-closed_at")[:limit]
    )
