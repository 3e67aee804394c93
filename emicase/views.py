"""Pages. Thin: validate input, call a service or a selector, render.

Objects reach a view only through ``selectors.access_*`` (another team's
object is a 404). Writes go through services, which refuse a viewer
(PermissionDenied → the 403 page); POST views also check the role before
validating, so a viewer never sees form errors for a change they may not make.
"""

from __future__ import annotations

import csv
import math
import re
from dataclasses import dataclass

from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.core.exceptions import PermissionDenied, ValidationError
from django.db import connection
from django.http import HttpResponse, JsonResponse
from django.shortcuts import redirect, render
from django.urls import reverse
from django.utils import timezone
from django.views.decorators.http import require_POST

from emicase import charts, forms, selectors
from emicase.models import (
    AnalysisStatus,
    Capture,
    Case,
    CaseEvent,
    Countermeasure,
    Membership,
    Scan,
)
from emicase.services import cases as case_svc
from emicase.services import countermeasures as cm_svc
from emicase.services import frequencies as ff_svc
from emicase.services import pages_support, uploads
from emicase.services import products as product_svc
from emicase.services.access import LEAD_ROLES, require_role

STAGE_ORDER = [s for s, _ in Case.Stage.choices]


def health(request):
    """For load balancers: the process answers and reaches its database."""
    with connection.cursor() as cursor:
        cursor.execute("SELECT 1")
    return JsonResponse({"ok": True})


# ----------------------------------------------------------------- helpers


def _role(request, team_id: int) -> str | None:
    return selectors.role_in(request.user, team_id)


def _perms(role: str | None) -> dict:
    return {
        "role": role,
        "can_write": selectors.can_write(role),
        "is_lead": selectors.is_lead(role),
    }


def _case_url(case: Case, anchor: str = "") -> str:
    return reverse("case", args=[case.pk]) + (f"#{anchor}" if anchor else "")


def _service_error(request, exc: ValidationError) -> None:
    for text in exc.messages:
        messages.error(request, text)


def margin_state(margin_db: float | None, guard_db: float) -> str:
    """'over' (above the limit), 'guard' (inside the guard band), 'clear'; '' when unknown."""
    if margin_db is None:
        return ""
    if margin_db < 0:
        return "over"
    if margin_db < guard_db:
        return "guard"
    return "clear"


# ----------------------------------------------------------------- team home


@login_required
def home(request):
    memberships = list(selectors.memberships_of(request.user))
    cases = list(
        selectors.cases_visible_to(request.user)
        .exclude(stage=Case.Stage.CLOSED)
        .order_by("product__name", "-updated_at")
    )
    product_filter = request.GET.get("product", "")
    products = sorted({c.product for c in cases}, key=lambda p: p.name)
    if product_filter:
        cases = [c for c in cases if str(c.product_id) == product_filter]
    people = selectors.people_on_cases(c.pk for c in cases)
    guard = {m.team_id: m.team.guard_band_db for m in memberships}
    columns = []
    for stage, label in Case.Stage.choices:
        if stage == Case.Stage.CLOSED:
            continue
        in_stage = [c for c in cases if c.stage == stage]
        for c in in_stage:
            c.people = [p for p in people.get(c.pk, []) if c.owner is None or p != _name(c.owner)]
            c.margin_state = margin_state(c.worst_margin_db, guard.get(c.product.team_id, 3.0))
        columns.append({"stage": stage, "label": label, "cases": in_stage})
    can_log = any(selectors.can_write(m.role) for m in memberships)
    return render(
        request,
        "emicase/home.html",
        {
            "memberships": memberships,
            "columns": columns,
            "open_count": len(cases),
            "products": products,
            "product_filter": product_filter,
            "recent": selectors.recent_events(request.user),
            "closed": selectors.recently_closed(request.user),
            "can_log": can_log,
            "all_products": selectors.products_with_revisions(request.user),
        },
    )


def _name(user) -> str:
    if user is None:
        return "the analysis"
    return user.get_full_name() or user.username


# ----------------------------------------------------------------- logging a failing result


@login_required
def log_fail(request):
    revisions = selectors.writable_revisions(request.user)
    if not revisions.exists():
        if not selectors.products_visible_to(request.user).exists() and any(
            selectors.can_write(m.role) for m in selectors.memberships_of(request.user)
        ):
            messages.info(
                request, "Add a product and its revision first: a scan belongs to a revision."
            )
            return redirect("products")
        raise PermissionDenied("Your role in your teams is read only.")
    form = forms.LogFailForm(
        request.POST or None,
        request.FILES or None,
        revisions=revisions,
        session=request.session,
        initial={"revision": request.GET.get("revision")},
    )
    if request.method == "POST":
        if form.is_valid():
            try:
                scan = uploads.scan_upload(
                    revision=form.cleaned_data["revision"],
                    file=form.cleaned_data["file"],
                    by=request.user,
                    opens_case_titled=form.cleaned_data["title"],
                    **form.scan_fields(),
                )
            except ValidationError as exc:
                forms.apply_service_error(form, exc)
            else:
                form.forget_upload()
                return redirect(reverse("scan", args=[scan.pk]) + "?opening=1")
        form.keep_upload()
    return render(request, "emicase/log_fail.html", {"form": form})


@login_required
def scan_detail(request, scan_id):
    scan = selectors.access_scan(request.user, scan_id)
    if scan.status == AnalysisStatus.DONE and scan.case_id and request.GET.get("opening"):
        return redirect(_case_url(scan.case))
    chart = None
    if scan.status == AnalysisStatus.DONE:
        failing = selectors.case_failing(scan.case) if scan.case_id else []
        chart = charts.figure_json(
            charts.scan_figure(
                envelope=scan.envelope,
                unit=scan.unit,
                limit=charts.scan_limit(scan),
                guard_db=scan.revision.product.team.guard_band_db,
                failing=failing,
                results=scan.results,
            )
        )
    queue = selectors.queue_positions([scan])
    return render(
        request,
        "emicase/scan.html",
        {
            "scan": scan,
            "chart": chart,
            "queue_position": queue.get(("scan", scan.pk)),
            "opening": bool(request.GET.get("opening")),
            "warnings": (scan.results or {}).get("warnings", []),
            "exceedances": (scan.results or {}).get("exceedances", []),
        },
    )


def _status_item(kind: str, item, queue: dict) -> dict:
    return {
        "key": f"{kind}-{item.pk}",
        "status": item.status,
        "label": item.get_status_display(),
        "progress": round(item.progress or 0.0, 2),
        "queue": queue.get((kind, item.pk)),
        "error": item.error_text if item.status == AnalysisStatus.FAILED else "",
        "error_kind": item.error_kind,
        "error_id": item.error_id,
    }


@login_required
def scan_status(request, scan_id):
    scan = selectors.access_scan(request.user, scan_id)
    queue = selectors.queue_positions([scan])
    data = _status_item("scan", scan, queue)
    data["case_url"] = _case_url(scan.case) if scan.case_id else None
    data["busy"] = scan.status in selectors.BUSY
    return JsonResponse(data)


# ----------------------------------------------------------------- the case page


@dataclass
class TimelineEntry:
    at: object
    kind: str
    title: str
    text: str
    who: str
    count: int = 1


def _timeline(events: list[CaseEvent]) -> list[TimelineEntry]:
    """Timeline entries; a run of capture uploads and their analyses reads as one line."""
    out: list[TimelineEntry] = []
    for e in events:
        who = _name(e.actor) if e.actor_id else "the analysis"
        hunt = e.kind == CaseEvent.Kind.CAPTURE or (
            e.kind == CaseEvent.Kind.ANALYSED and "capture" in e.data
        )
        if hunt:
            last = out[-1] if out else None
            if last is not None and last.kind == "hunt":
                if e.kind == CaseEvent.Kind.CAPTURE:
                    last.count += 1
                    if who not in last.who.split(", "):
                        last.who = f"{last.who}, {who}"
                    last.title = f"{last.count} captures uploaded"
                continue
            if e.kind == CaseEvent.Kind.CAPTURE:
                out.append(
                    TimelineEntry(
                        at=e.at, kind="hunt", title="Capture uploaded", text=e.text, who=who
                    )
                )
            continue
        if e.kind == CaseEvent.Kind.STAGE:
            old, new = e.data.get("from", ""), e.data.get("to", "")
            title = f"{_stage_label(old)} → {_stage_label(new)}"
        elif e.kind == CaseEvent.Kind.CLOSED:
            title = f"Closed: {Case.Closure(e.data.get('closure', 'fixed')).label}"
        else:
            title = e.get_kind_display()
        out.append(TimelineEntry(at=e.at, kind=e.kind, title=title, text=e.text, who=who))
    return out


def _stage_label(stage: str) -> str:
    return Case.Stage(stage).label if stage in Case.Stage.values else stage


def _stage_path(case: Case, events: list[CaseEvent]) -> list[dict]:
    """Each stage with when the case first reached it, for the bar at the top."""
    reached: dict[str, object] = {Case.Stage.LOGGED: case.opened_at}
    for e in events:
        to = (
            e.data.get("to")
            if e.kind == CaseEvent.Kind.STAGE
            else (Case.Stage.CLOSED if e.kind == CaseEvent.Kind.CLOSED else None)
        )
        if to:
            reached.setdefault(to, e.at)
    current = STAGE_ORDER.index(case.stage)
    return [
        {
            "stage": s,
            "label": label,
            "at": reached.get(s),
            "current": s == case.stage,
            "past": i < current,
        }
        for i, (s, label) in enumerate(Case.Stage.choices)
    ]


def _attach_attributions(failing, scans, tolerance_pct: float) -> None:
    """Give each failing frequency the label of the known source the analysis attributed it to."""
    by_scan = {s.pk: charts.attributions_by_frequency(s.results or {}) for s in scans}
    every = [a for table in by_scan.values() for a in table.values()]
    for ff in failing:
        found = by_scan.get(ff.scan_id, {}).get(round(ff.frequency_hz, 0))
        if found is None:
            tol = ff.frequency_hz * tolerance_pct / 100.0
            near = [a for a in every if abs(a["frequency_hz"] - ff.frequency_hz) <= tol]
            found = (
                min(near, key=lambda a: abs(a["frequency_hz"] - ff.frequency_hz)) if near else None
            )
        ff.attribution = charts.attribution_label(found)


def _result_rows(verification, guard_db: float) -> tuple[list[dict], int]:
    """Rows of a verification (change in dB, new margin) and how many open frequencies fall short.

    The rule is ``services.countermeasures.verification_shortfalls``'s, applied
    to prefetched rows so a page with many verifications stays at its query count.
    """
    rows, short = [], 0
    for r in verification.results.all():
        ff = r.failing_frequency
        state = margin_state(r.new_margin_db, guard_db)
        meets = r.new_margin_db is not None and r.new_margin_db >= guard_db
        if ff.is_open and not meets:
            short += 1
        rows.append(
            {
                "ff": ff,
                "before": ff.level,
                "after": r.level_after,
                "change": r.change_db,
                "margin": r.new_margin_db,
                "state": state,
                "meets": meets,
            }
        )
    return rows, short


def _case_context(request, case: Case, **forms_in) -> dict:
    role = _role(request, case.product.team_id)
    team = case.product.team
    page = selectors.case_page(case)
    failing = page.failing
    _attach_attributions(failing, page.scans, team.frequency_tolerance_pct)
    for ff in failing:
        ff.state = margin_state(ff.margin_db, team.guard_band_db)
    done_scans = [s for s in page.scans if s.status == AnalysisStatus.DONE]
    chosen = None
    wanted = request.GET.get("scan")
    if wanted:
        chosen = next((s for s in done_scans if str(s.pk) == wanted), None)
    if chosen is None:
        before = [s for s in done_scans if s.pk not in page.after_scan_ids]
        chosen = before[0] if before else (done_scans[0] if done_scans else None)
    chart = None
    if chosen is not None:
        chart = charts.figure_json(
            charts.scan_figure(
                envelope=selectors.scan_envelope(chosen.pk),
                unit=chosen.unit,
                limit=charts.scan_limit(chosen),
                guard_db=team.guard_band_db,
                failing=failing,
                results=chosen.results,
            )
        )
    for item in [*page.scans, *page.captures]:
        item.queue_position = page.queue.get((type(item).__name__.lower(), item.pk))
    for s in page.scans:
        s.is_after = s.pk in page.after_scan_ids
    for cm in page.countermeasures:
        cm.checks = []
        for v in cm.verifications.all():
            rows, short = _result_rows(v, team.guard_band_db)
            cm.checks.append({"v": v, "rows": rows, "short": short})
    proposals = [ff for ff in failing if not ff.confirmed]
    events = page.events
    ctx = {
        "case": case,
        "team": team,
        "page": page,
        "failing": failing,
        "proposals": proposals,
        "worst": min(failing, key=lambda ff: ff.margin_db) if failing else None,
        "open_failing": [ff for ff in failing if ff.is_open],
        "chart": chart,
        "chart_scan": chosen,
        "done_scans": done_scans,
        "captures": page.captures,
        "scans": page.scans,
        "countermeasures": page.countermeasures,
        "timeline": _timeline(events),
        "stage_path": _stage_path(case, events),
        "moves": [
            (s, _stage_label(s))
            for s in sorted(case_svc.MANUAL_MOVES.get(case.stage, ()), key=STAGE_ORDER.index)
        ],
        "busy": page.busy,
        "comment_form": forms_in.get("comment_form") or forms.CommentForm(),
        "verified": [
            cm for cm in page.countermeasures if cm.status == Countermeasure.Status.VERIFIED
        ],
        **_perms(role),
    }
    return ctx


@login_required
def case_detail(request, case_id):
    case = selectors.access_case(request.user, case_id)
    return render(request, "emicase/case.html", _case_context(request, case))


@login_required
def case_live(request, case_id):
    """The uploads' statuses for the case page's poll: small, and a stamp that changes when the case does."""
    case = selectors.access_case(request.user, case_id)
    scans, captures = selectors.upload_statuses(case)
    queue = selectors.queue_positions([*scans, *captures])
    items = [_status_item("scan", s, queue) for s in scans] + [
        _status_item("capture", c, queue) for c in captures
    ]
    return JsonResponse(
        {
            "stamp": case.updated_at.isoformat(),
            "busy": any(i["status"] in selectors.BUSY for i in items),
            "uploads": items,
        }
    )


@login_required
@require_POST
def case_comment(request, case_id):
    case = selectors.access_case(request.user, case_id)
    require_role(request.user, case.product.team_id)
    form = forms.CommentForm(request.POST)
    if form.is_valid():
        try:
            case_svc.comment_add(case=case, by=request.user, text=form.cleaned_data["text"])
        except ValidationError as exc:
            forms.apply_service_error(form, exc)
        else:
            return redirect(_case_url(case, "timeline"))
    return render(
        request, "emicase/case.html", _case_context(request, case, comment_form=form), status=400
    )


@login_required
@require_POST
def case_move(request, case_id):
    case = selectors.access_case(request.user, case_id)
    require_role(request.user, case.product.team_id)
    form = forms.MoveForm(request.POST)
    if form.is_valid():
        try:
            case_svc.case_move(
                case=case,
                to=form.cleaned_data["to"],
                by=request.user,
                note=form.cleaned_data["note"],
            )
            messages.success(request, f"Moved to '{_stage_label(form.cleaned_data['to'])}'.")
        except ValidationError as exc:
            _service_error(request, exc)
    else:
        messages.error(request, "Choose a stage to move to.")
    return redirect(_case_url(case))


@login_required
def case_close(request, case_id):
    case = selectors.access_case(request.user, case_id)
    require_role(request.user, case.product.team_id, LEAD_ROLES)
    if case.is_closed:
        messages.info(request, "This case is already closed.")
        return redirect(_case_url(case))
    verified = case.countermeasures.filter(status=Countermeasure.Status.VERIFIED)
    form = forms.CloseForm(request.POST or None, verified=verified)
    if request.method == "POST" and form.is_valid():
        try:
            case_svc.case_close(
                case=case,
                by=request.user,
                closure=form.cleaned_data["closure"],
                countermeasure=form.cleaned_data.get("countermeasure"),
                reason=form.cleaned_data.get("reason", ""),
            )
        except ValidationError as exc:
            forms.apply_service_error(form, exc)
        else:
            messages.success(request, "Case closed.")
            return redirect(_case_url(case))
    failing = selectors.case_failing(case)
    return render(
        request,
        "emicase/case_close.html",
        {
            "case": case,
            "form": form,
            "verified": list(verified),
            "open_failing": [ff for ff in failing if ff.is_open],
        },
    )


@login_required
@require_POST
def case_reopen(request, case_id):
    case = selectors.access_case(request.user, case_id)
    require_role(request.user, case.product.team_id, LEAD_ROLES)
    form = forms.ReopenForm(request.POST)
    if not form.is_valid():
        messages.error(request, "Say why the case is reopened.")
        return redirect(_case_url(case))
    try:
        case_svc.case_reopen(case=case, by=request.user, reason=form.cleaned_data["reason"])
        messages.success(request, "Case reopened: back to hunting the source.")
    except ValidationError as exc:
        _service_error(request, exc)
    return redirect(_case_url(case))


# ----------------------------------------------------------------- failing frequencies


def _scan_ranges(case: Case) -> list[tuple[float, float]]:
    ranges = []
    for scan in selectors.case_scans(case, heavy=True):
        span = (scan.results or {}).get("frequency_range_hz")
        if scan.status == AnalysisStatus.DONE and span:
            ranges.append((float(span[0]), float(span[1])))
    return ranges


@login_required
@require_POST
def frequencies_confirm(request, case_id):
    case = selectors.access_case(request.user, case_id)
    require_role(request.user, case.product.team_id)
    proposals = case.failing_frequencies.filter(confirmed=False)
    form = forms.ConfirmFrequenciesForm(request.POST, proposals=proposals)
    if form.is_valid():
        try:
            n = ff_svc.failing_frequencies_confirm(
                case=case, by=request.user, keep_ids=form.cleaned_data["keep"]
            )
            messages.success(
                request, f"{n} failing frequencies confirmed; captures are read again at them."
            )
        except ValidationError as exc:
            _service_error(request, exc)
    else:
        messages.error(request, "Those are not proposals of this case.")
    return redirect(_case_url(case, "failing"))


@login_required
def frequency_add(request, case_id):
    case = selectors.access_case(request.user, case_id)
    require_role(request.user, case.product.team_id)
    form = forms.FailingFrequencyForm(request.POST or None, ranges_hz=_scan_ranges(case))
    if request.method == "POST" and form.is_valid():
        cd = form.cleaned_data
        try:
            ff_svc.failing_frequency_add(
                case=case,
                by=request.user,
                frequency_hz=cd["frequency_mhz"] * 1e6,
                level=cd["level"],
                limit_level=cd["limit_level"],
                unit=_case_unit(case),
            )
        except ValidationError as exc:
            forms.apply_service_error(form, exc)
        else:
            return redirect(_case_url(case, "failing"))
    return render(
        request,
        "emicase/frequency_form.html",
        {"case": case, "form": form, "adding": True, "ranges": form.ranges_hz},
    )


def _case_unit(case: Case) -> str:
    first = case.failing_frequencies.values_list("unit", flat=True).first()
    if first:
        return first
    scan = (
        Scan.objects.filter(case=case, status=AnalysisStatus.DONE)
        .values_list("unit", flat=True)
        .first()
    )
    return scan or "dBuV/m"


@login_required
def frequency_edit(request, failing_id):
    ff = selectors.access_failing_frequency(request.user, failing_id)
    case = ff.case
    require_role(request.user, case.product.team_id)
    initial = {
        "frequency_mhz": ff.frequency_hz / 1e6,
        "level": ff.level,
        "limit_level": ff.limit_level,
        "is_open": ff.is_open,
    }
    form = forms.FailingFrequencyForm(
        request.POST or None, initial=initial, ranges_hz=_scan_ranges(case)
    )
    if request.method == "POST" and form.is_valid():
        cd = form.cleaned_data
        try:
            ff_svc.failing_frequency_update(
                failing_frequency=ff,
                by=request.user,
                frequency_hz=cd["frequency_mhz"] * 1e6,
                level=cd["level"],
                limit_level=cd["limit_level"],
                is_open=cd["is_open"],
                confirmed=True,
            )
        except ValidationError as exc:
            forms.apply_service_error(form, exc)
        else:
            return redirect(_case_url(case, "failing"))
    return render(
        request,
        "emicase/frequency_form.html",
        {"case": case, "form": form, "ff": ff, "ranges": form.ranges_hz},
    )


# ----------------------------------------------------------------- scans and captures on a case


def _case_revisions(case: Case):
    return case.product.revisions.select_related("product").order_by("created_at", "id")


@login_required
def case_scan_new(request, case_id):
    case = selectors.access_case(request.user, case_id)
    require_role(request.user, case.product.team_id)
    earlier = (
        Scan.objects.filter(case=case).defer("envelope", "results").order_by("-uploaded_at").first()
    )
    initial = forms.ScanForm.initial_from(earlier)
    if earlier is not None:
        initial["revision"] = earlier.revision_id
    form = forms.CaseScanForm(
        request.POST or None,
        request.FILES or None,
        revisions=_case_revisions(case),
        session=request.session,
        initial=initial,
    )
    if request.method == "POST":
        if form.is_valid():
            try:
                uploads.scan_upload(
                    revision=form.cleaned_data["revision"],
                    file=form.cleaned_data["file"],
                    by=request.user,
                    case=case,
                    **form.scan_fields(),
                )
            except ValidationError as exc:
                forms.apply_service_error(form, exc)
            else:
                form.forget_upload()
                messages.success(request, "Scan stored; its analysis is queued.")
                return redirect(_case_url(case, "uploads"))
        form.keep_upload()
    return render(request, "emicase/scan_form.html", {"case": case, "form": form})


@login_required
def capture_new(request, case_id):
    case = selectors.access_case(request.user, case_id)
    require_role(request.user, case.product.team_id)
    return _capture_form(request, case, countermeasure=None)


def _capture_form(request, case: Case, countermeasure: Countermeasure | None):
    spot = None
    if request.GET.get("spot"):
        spot = (
            Capture.objects.filter(case=case, pk=request.GET["spot"])
            .defer("envelope", "results")
            .first()
        )
    form = forms.CaptureForm(
        request.POST or None,
        request.FILES or None,
        revisions=_case_revisions(case),
        session=request.session,
        initial=forms.CaptureForm.initial_from(spot),
    )
    if countermeasure is not None and not form.is_bound:
        form.initial["revision"] = countermeasure.revision_id
    if request.method == "POST":
        if form.is_valid():
            extra = {"countermeasure": countermeasure} if countermeasure is not None else {}
            try:
                uploads.capture_upload(
                    case=case,
                    file=form.cleaned_data["file"],
                    by=request.user,
                    **form.capture_fields(),
                    **extra,
                )
            except ValidationError as exc:
                forms.apply_service_error(form, exc)
            else:
                form.forget_upload()
                messages.success(request, "Capture stored; its analysis is queued.")
                if countermeasure is not None:
                    return redirect("fix", countermeasure.pk)
                if "another" in request.POST:
                    return redirect("capture_new", case.pk)
                return redirect(_case_url(case, "uploads"))
        form.keep_upload()
    return render(
        request,
        "emicase/capture_form.html",
        {
            "case": case,
            "form": form,
            "countermeasure": countermeasure,
            "spot": spot,
        },
    )


@login_required
def capture_detail(request, capture_id):
    cap = selectors.access_capture(request.user, capture_id)
    case = cap.case
    chart = None
    readings = list(
        cap.readings.select_related("failing_frequency").order_by("failing_frequency__frequency_hz")
    )
    if cap.status == AnalysisStatus.DONE:
        chart = charts.figure_json(
            charts.scan_figure(
                envelope=cap.envelope,
                unit=cap.unit,
                limit=None,
                guard_db=0,
                results=cap.results,
            )
        )
    return render(
        request,
        "emicase/capture.html",
        {
            "capture": cap,
            "case": case,
            "chart": chart,
            "readings": readings,
            "queue_position": selectors.queue_positions([cap]).get(("capture", cap.pk)),
            "warnings": (cap.results or {}).get("warnings", []),
        },
    )


# ----------------------------------------------------------------- localisation


@login_required
def locate(request, case_id):
    case = selectors.access_case(request.user, case_id)
    failing = selectors.case_failing(case)
    if not failing:
        messages.info(
            request,
            "The case has no failing frequencies yet: localisation ranks locations at one of them.",
        )
        return redirect(_case_url(case))
    chosen = next((ff for ff in failing if str(ff.pk) == request.GET.get("f")), None)
    if chosen is None:
        open_ones = [ff for ff in failing if ff.is_open] or failing
        chosen = min(open_ones, key=lambda ff: ff.margin_db)
    groups = selectors.localisation(case, chosen)
    maps = []
    for i, g in enumerate(groups):
        if g.locations:
            hi, lo = g.locations[0].level, g.locations[-1].level - 6.0
            for loc in g.locations:
                loc.bar_pct = round(100 * (loc.level - lo) / (hi - lo)) if hi > lo else 100
        entry = {"group": g, "map": None, "zones": None, "id": i}
        if g.has_xy:
            entry["map"] = charts.figure_json(
                charts.board_map_figure(g, frequency_hz=chosen.frequency_hz)
            )
        if any(loc.x_mm is None for loc in g.locations):
            unplaced = selectors.ProbeGroup(
                probe_kind=g.probe_kind,
                probe_label=g.probe_label,
                tip=g.tip,
                unit=g.unit,
                missing=[],
                locations=[loc for loc in g.locations if loc.x_mm is None],
            )
            entry["zones"] = charts.figure_json(
                charts.zones_figure(unplaced, frequency_hz=chosen.frequency_hz)
            )
        maps.append(entry)
    wanted = [int(x) for x in request.GET.getlist("c") if x.isdigit()]
    if not wanted and groups:
        wanted = [loc.capture.pk for loc in groups[0].locations[:4]]
    overlay_caps = selectors.capture_envelopes(case, wanted)
    overlay = None
    mixed = len({(c.probe_kind, c.tip.strip()) for c in overlay_caps}) > 1
    if overlay_caps:
        fig = charts.overlay_figure(
            series=[
                (f"{c.location} · {c.tip} · {_name(c.uploaded_by)}", c.envelope)
                for c in overlay_caps
            ],
            unit=overlay_caps[0].unit,
            marker_hz=chosen.frequency_hz,
        )
        fig.update_xaxes(
            range=[
                math.log10(chosen.frequency_hz / 1e6 / 2.5),
                math.log10(chosen.frequency_hz / 1e6 * 2.5),
            ]
        )
        overlay = charts.figure_json(fig)
    headline = None
    if groups and groups[0].loudest_peak is not None:
        g = groups[0]
        top = g.loudest_peak
        rest = [loc for loc in g.locations if loc is not top]
        headline = {"group": g, "top": top, "next": rest[0] if rest else None}
    return render(
        request,
        "emicase/locate.html",
        {
            "case": case,
            "failing": failing,
            "chosen": chosen,
            "groups": maps,
            "overlay": overlay,
            "overlay_ids": {c.pk for c in overlay_caps},
            "mixed": mixed,
            "headline": headline,
            **_perms(_role(request, case.product.team_id)),
        },
    )


# ----------------------------------------------------------------- countermeasures


@login_required
def fix_new(request, case_id):
    case = selectors.access_case(request.user, case_id)
    require_role(request.user, case.product.team_id)
    form = forms.CountermeasureForm(request.POST or None, revisions=_case_revisions(case))
    if request.method == "POST" and form.is_valid():
        cd = form.cleaned_data
        try:
            cm = cm_svc.countermeasure_propose(
                case=case,
                by=request.user,
                kind=cd["kind"],
                description=cd["description"],
                revision=cd["revision"],
            )
        except ValidationError as exc:
            forms.apply_service_error(form, exc)
        else:
            return redirect("fix", cm.pk)
    return render(request, "emicase/fix_form.html", {"case": case, "form": form})


def _before_scan(case: Case, after_ids: set[int]) -> Scan | None:
    """The scan the failing frequencies came from: the first analysed scan that is not an after-scan."""
    return (
        Scan.objects.filter(case=case, status=AnalysisStatus.DONE)
        .exclude(pk__in=after_ids)
        .order_by("measured_on", "uploaded_at", "id")
        .first()
    )


@login_required
def fix_detail(request, countermeasure_id):
    cm = selectors.access_countermeasure(request.user, countermeasure_id)
    case = cm.case
    team = case.product.team
    role = _role(request, team.pk)
    all_cms = selectors.case_countermeasures(case)
    cm_full = next(c for c in all_cms if c.pk == cm.pk)
    failing = selectors.case_failing(case)
    after_ids = {v.after_scan_id for c in all_cms for v in c.verifications.all() if v.after_scan_id}
    before_scan = _before_scan(case, after_ids)
    checks = []
    for v in cm_full.verifications.all():
        rows, short = _result_rows(v, team.guard_band_db)
        chart = None
        if (
            v.after_scan_id
            and v.after_scan.status == AnalysisStatus.DONE
            and before_scan is not None
        ):
            after_env = selectors.scan_envelope(v.after_scan_id)
            chart = charts.figure_json(
                charts.before_after_figure(
                    before=selectors.scan_envelope(before_scan.pk),
                    after=after_env,
                    unit=v.after_scan.unit,
                    limit=charts.scan_limit(v.after_scan),
                    guard_db=team.guard_band_db,
                    failing=failing,
                    after_levels={r["ff"].pk: r["after"] for r in rows},
                    before_label="Before",
                    after_label="After",
                )
            )
        checks.append(
            {"v": v, "rows": rows, "short": short, "chart": chart, "before_scan": before_scan}
        )
    pairs = selectors.capture_pairs(cm)
    pair_chart = None
    if pairs:
        hottest = max(
            pairs,
            key=lambda p: max([x for x in p.before_level.values() if x is not None] or [-1e9]),
        )
        envs = {
            c.pk: c
            for c in selectors.capture_envelopes(case, [hottest.before.pk, hottest.after.pk])
        }
        if len(envs) == 2:
            fig = charts.before_after_figure(
                before=envs[hottest.before.pk].envelope,
                after=envs[hottest.after.pk].envelope,
                unit=hottest.after.unit,
                limit=None,
                guard_db=0,
                before_label=f"Before at {hottest.before.location}",
                after_label=f"After at {hottest.after.location}",
            )
            pair_chart = charts.figure_json(fig)
    after_captures = list(
        cm.after_captures.select_related("uploaded_by")
        .defer("envelope", "results")
        .order_by("-captured_at")
    )
    spots = []
    for g in (
        selectors.localisation(case, min(failing, key=lambda ff: ff.margin_db)) if failing else []
    ):
        spots.extend(loc.capture for loc in g.locations[:3])
    judged = [c for c in checks if c["rows"]]
    verify_form = forms.VerifyForm(
        verifications=cm.verifications.filter(results__isnull=False)
        .distinct()
        .select_related("after_scan")
    )
    if judged:
        verify_form.initial["verification"] = judged[-1]["v"].pk
    return render(
        request,
        "emicase/fix.html",
        {
            "cm": cm,
            "case": case,
            "team": team,
            "checks": checks,
            "failing": failing,
            "pairs": pairs,
            "pair_chart": pair_chart,
            "after_captures": after_captures,
            "spots": spots[:6],
            "verify_form": verify_form,
            "judged": judged,
            "reject_form": forms.RejectForm(),
            "busy": any(c.status in selectors.BUSY for c in after_captures)
            or any(
                v.after_scan_id and v.after_scan.status in selectors.BUSY
                for v in cm_full.verifications.all()
            ),
            **_perms(role),
        },
    )


def _fix_for_write(request, countermeasure_id) -> Countermeasure:
    cm = selectors.access_countermeasure(request.user, countermeasure_id)
    require_role(request.user, cm.case.product.team_id)
    return cm


@login_required
def fix_after_scan(request, countermeasure_id):
    cm = _fix_for_write(request, countermeasure_id)
    case = cm.case
    earlier = _before_scan(case, set())
    form = forms.AfterScanForm(
        request.POST or None,
        request.FILES or None,
        session=request.session,
        initial=forms.ScanForm.initial_from(earlier),
    )
    if request.method == "POST":
        if form.is_valid():
            try:
                cm_svc.verification_by_scan(
                    countermeasure=cm,
                    by=request.user,
                    file=form.cleaned_data["file"],
                    **form.scan_fields(),
                )
            except ValidationError as exc:
                forms.apply_service_error(form, exc)
            else:
                form.forget_upload()
                messages.success(
                    request, "After-scan stored; its analysis fills in the levels after."
                )
                return redirect("fix", cm.pk)
        form.keep_upload()
    return render(
        request, "emicase/scan_form.html", {"case": case, "form": form, "countermeasure": cm}
    )


@login_required
def fix_after_capture(request, countermeasure_id):
    cm = _fix_for_write(request, countermeasure_id)
    return _capture_form(request, cm.case, countermeasure=cm)


@login_required
@require_POST
def fix_estimate(request, countermeasure_id):
    cm = _fix_for_write(request, countermeasure_id)
    form = forms.CaptureVerificationForm(request.POST)
    form.is_valid()
    try:
        pages_support.verification_from_captures(
            countermeasure=cm, by=request.user, note=form.cleaned_data.get("note", "")
        )
        messages.success(request, "Levels after estimated from the near-field captures.")
    except ValidationError as exc:
        _service_error(request, exc)
    return redirect("fix", cm.pk)


@login_required
@require_POST
def fix_trial(request, countermeasure_id):
    cm = _fix_for_write(request, countermeasure_id)
    try:
        cm_svc.countermeasure_start_trial(countermeasure=cm, by=request.user)
        messages.success(request, "On trial.")
    except ValidationError as exc:
        _service_error(request, exc)
    return redirect("fix", cm.pk)


@login_required
@require_POST
def fix_verify(request, countermeasure_id):
    cm = _fix_for_write(request, countermeasure_id)
    form = forms.VerifyForm(request.POST, verifications=cm.verifications.all())
    if form.is_valid():
        try:
            cm_svc.countermeasure_verify(
                countermeasure=cm,
                verification=form.cleaned_data["verification"],
                by=request.user,
                reason=form.cleaned_data["reason"],
            )
        except ValidationError as exc:
            _service_error(request, exc)
        else:
            messages.success(request, "Verified: the fix is proven.")
            return redirect(_case_url(cm.case))
    else:
        for errors in form.errors.values():
            for e in errors:
                messages.error(request, e)
    return redirect(reverse("fix", args=[cm.pk]) + "#verify")


@login_required
@require_POST
def fix_reject(request, countermeasure_id):
    cm = _fix_for_write(request, countermeasure_id)
    form = forms.RejectForm(request.POST)
    if form.is_valid():
        try:
            cm_svc.countermeasure_reject(
                countermeasure=cm, by=request.user, reason=form.cleaned_data["reason"]
            )
            messages.success(request, "Marked as not working.")
        except ValidationError as exc:
            _service_error(request, exc)
    else:
        messages.error(request, "Say why it did not work, so the next hunt knows.")
    return redirect("fix", cm.pk)


# ----------------------------------------------------------------- report


@login_required
def case_report(request, case_id):
    case = selectors.access_case(request.user, case_id)
    ctx = _case_context(request, case)
    ctx["locations"] = [
        {"ff": ff, "groups": selectors.localisation(case, ff)[:3]} for ff in ctx["failing"]
    ]
    ctx["printed_at"] = timezone.now()
    return render(request, "emicase/report.html", ctx)


# The characters a spreadsheet reads as the start of a formula (OWASP, "CSV
# Injection"), and their full-width forms, which some East Asian spreadsheet
# locales treat the same way (from memory).
FORMULA_LEAD = ("=", "+", "-", "@", "\t", "\r", "\uff1d", "\uff0b", "\uff0d", "\uff20")
_PLAIN_NUMBER = re.compile(r"-?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?", re.ASCII)


def csv_safe(value):
    """A text cell that a spreadsheet would run as a formula gets a leading apostrophe.

    Numbers pass, and so does text that is only a plain number (``-3.2``): a
    spreadsheet reads it as that number, never as a formula.
    """
    if isinstance(value, str) and value.startswith(FORMULA_LEAD) and not _PLAIN_NUMBER.fullmatch(value):
        return "'" + value
    return value


def _num(value, digits: int = 2):
    return "" if value is None else round(float(value), digits)


@login_required
def case_report_csv(request, case_id):
    case = selectors.access_case(request.user, case_id)
    team = case.product.team
    failing = selectors.case_failing(case)
    response = HttpResponse(content_type="text/csv; charset=utf-8")
    response["Content-Disposition"] = f'attachment; filename="case-{case.pk}.csv"'
    response.write("\ufeff")  # so spreadsheet programs read µ and Ω as UTF-8
    writer = csv.writer(response)
    writer.writerow(
        [
            "section",
            "case",
            "frequency_mhz",
            "level",
            "limit",
            "margin_db",
            "unit",
            "detector",
            "polarisation_or_line",
            "confirmed",
            "open",
            "countermeasure",
            "countermeasure_status",
            "verification",
            "level_after",
            "change_db",
            "new_margin_db",
            "meets_guard_band",
            "guard_band_db",
            "note",
        ]
    )
    for ff in failing:
        writer.writerow(
            [
                csv_safe(v)
                for v in (
                    "failing",
                    case.title,
                    _num(ff.frequency_hz / 1e6, 4),
                    _num(ff.level),
                    _num(ff.limit_level),
                    _num(ff.margin_db),
                    ff.unit,
                    ff.detector,
                    ff.polarisation or ff.mains_line,
                    ff.confirmed,
                    ff.is_open,
                    "",
                    "",
                    "",
                    "",
                    "",
                    "",
                    "",
                    team.guard_band_db,
                    "",
                )
            ]
        )
    for cm in selectors.case_countermeasures(case):
        for v in cm.verifications.all():
            how = (
                f"after-scan {v.after_scan.original_name}"
                if v.after_scan_id
                else "near-field / by hand"
            )
            for row in _result_rows(v, team.guard_band_db)[0]:
                ff = row["ff"]
                writer.writerow(
                    [
                        csv_safe(x)
                        for x in (
                            "verification",
                            case.title,
                            _num(ff.frequency_hz / 1e6, 4),
                            _num(ff.level),
                            _num(ff.limit_level),
                            _num(ff.margin_db),
                            ff.unit,
                            ff.detector,
                            ff.polarisation or ff.mains_line,
                            ff.confirmed,
                            ff.is_open,
                            cm.description,
                            cm.status,
                            f"{v.recorded_at:%Y-%m-%d %H:%M} {how}",
                            _num(row["after"]),
                            _num(row["change"]),
                            _num(row["margin"]),
                            row["meets"],
                            team.guard_band_db,
                            v.note,
                        )
                    ]
                )
    return response


# ----------------------------------------------------------------- products and known sources


@login_required
def products(request):
    memberships = list(selectors.memberships_of(request.user))
    writable = [m.team for m in memberships if selectors.can_write(m.role)]
    form = forms.ProductForm(request.POST or None)
    if request.method == "POST":
        team = next((t for t in writable if str(t.pk) == request.POST.get("team")), None)
        if team is None:
            raise PermissionDenied("Your role in this team does not allow this.")
        if form.is_valid():
            try:
                product = product_svc.product_create(
                    team=team, by=request.user, **form.cleaned_data
                )
            except ValidationError as exc:
                forms.apply_service_error(form, exc)
            else:
                return redirect("product", product.pk)
    return render(
        request,
        "emicase/products.html",
        {
            "products": selectors.products_with_revisions(request.user),
            "form": form,
            "writable_teams": writable,
        },
    )


@login_required
def product_detail(request, product_id):
    product = selectors.access_product(request.user, product_id)
    role = _role(request, product.team_id)
    revisions = product.revisions.order_by("created_at", "id")
    form = forms.RevisionForm(request.POST or None, revisions=revisions)
    if request.method == "POST":
        require_role(request.user, product.team_id)
        if form.is_valid():
            try:
                rev = product_svc.revision_create(
                    product=product, by=request.user, **form.cleaned_data
                )
            except ValidationError as exc:
                forms.apply_service_error(form, exc)
            else:
                return redirect("revision", rev.pk)
    elif revisions:
        form.initial["copy_sources_from"] = revisions.last().pk
    full = next(p for p in selectors.products_with_revisions(request.user) if p.pk == product.pk)
    cases = selectors.cases_visible_to(request.user).filter(product=product).order_by("-updated_at")
    return render(
        request,
        "emicase/product.html",
        {
            "product": full,
            "form": form,
            "cases": cases,
            **_perms(role),
        },
    )


@login_required
def revision_detail(request, revision_id):
    revision = selectors.access_revision(request.user, revision_id)
    role = _role(request, revision.product.team_id)
    form = forms.SourceForm(request.POST or None)
    if request.method == "POST":
        require_role(request.user, revision.product.team_id)
        if form.is_valid():
            cd = form.cleaned_data
            try:
                product_svc.source_save(
                    revision=revision,
                    by=request.user,
                    name=cd["name"],
                    kind=cd["kind"],
                    nominal_frequency_hz=cd["nominal_mhz"] * 1e6,
                    tolerance_hz=cd["tolerance_hz"],
                )
            except ValidationError as exc:
                forms.apply_service_error(form, exc)
            else:
                messages.success(
                    request, "Source saved; the cases using this revision are read again."
                )
                return redirect("revision", revision.pk)
    return render(
        request,
        "emicase/revision.html",
        {
            "revision": revision,
            "sources": selectors.revision_sources(revision),
            "form": form,
            **_perms(role),
        },
    )


@login_required
def source_edit(request, source_id):
    source = selectors.access_source(request.user, source_id)
    revision = source.revision
    require_role(request.user, revision.product.team_id)
    form = forms.SourceForm(request.POST or None, initial=forms.SourceForm.initial_from(source))
    if request.method == "POST" and form.is_valid():
        cd = form.cleaned_data
        try:
            product_svc.source_save(
                revision=revision,
                by=request.user,
                name=cd["name"],
                kind=cd["kind"],
                nominal_frequency_hz=cd["nominal_mhz"] * 1e6,
                tolerance_hz=cd["tolerance_hz"],
                source=source,
            )
        except ValidationError as exc:
            forms.apply_service_error(form, exc)
        else:
            messages.success(request, "Source saved; the cases using this revision are read again.")
            return redirect("revision", revision.pk)
    return render(
        request, "emicase/source_form.html", {"revision": revision, "source": source, "form": form}
    )


@login_required
@require_POST
def source_delete(request, source_id):
    source = selectors.access_source(request.user, source_id)
    revision = source.revision
    product_svc.source_delete(source=source, by=request.user)
    messages.success(request, f"Removed {source.name}.")
    return redirect("revision", revision.pk)


# ----------------------------------------------------------------- team settings


@login_required
def team_settings(request, slug):
    team = selectors.access_team(request.user, slug)
    role = _role(request, team.pk)
    form = forms.TeamSettingsForm(
        request.POST or None,
        initial={
            "guard_band_db": team.guard_band_db,
            "frequency_tolerance_pct": team.frequency_tolerance_pct,
            "share_closed_cases": team.share_closed_cases,
        },
    )
    if request.method == "POST":
        require_role(request.user, team.pk, LEAD_ROLES)
        if form.is_valid():
            try:
                product_svc.team_settings_update(team=team, by=request.user, request=request, **form.cleaned_data)
            except ValidationError as exc:
                forms.apply_service_error(form, exc)
            else:
                messages.success(request, "Team settings saved.")
                return redirect("team_settings", team.slug)
    members = team.memberships.select_related("user").order_by("role", "user__username")
    return render(
        request,
        "emicase/team_settings.html",
        {
            "team": team,
            "form": form,
            "members": members,
            **_perms(role),
            "roles": Membership.Role,
        },
    )
