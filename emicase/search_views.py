"""The "similar past problems" pages: search past cases by frequency signature.

Thin: a form validates the input, ``services.search`` builds the query and
ranks, the template shows the hits with their explanation. A case reaches
the page only through ``selectors.access_case`` (another team's case is a 404).
"""

from __future__ import annotations

from django import forms
from django.contrib.auth.decorators import login_required
from django.core.exceptions import ValidationError
from django.shortcuts import render
from django.urls import reverse

from analysis.frequencies import format_hz
from emicase import selectors
from emicase.models import Scan
from emicase.services import search as search_svc

IMPROVEMENT_RULE = (
    "Improvement = level before − level after, from the fix's latest verification with levels, "
    "at the case's worst failing frequency among those measured (least margin before the fix); "
    "the mean over all measured failing frequencies is given beside it."
)


FILTER_NAMES = ("emission_kind", "fixed_only", "opened_from", "opened_to", "product")


def _percent(fraction: float) -> str:
    return "exact" if fraction == 0 else f"{fraction * 100:+.2g} %"


def _fix_text(fix: search_svc.Fix) -> str:
    cm = fix.countermeasure
    text = (
        f"{cm.description} ({cm.get_kind_display().lower()}, on rev {cm.revision.hardware_label})"
    )
    if fix.improvement_db is None:
        return text + " — no levels recorded"
    return (
        f"{text} — {fix.improvement_db:.1f} dB quieter at {format_hz(fix.at_frequency_hz)} "
        f"(mean {fix.mean_improvement_db:.1f} dB over {fix.measured} "
        f"frequenc{'y' if fix.measured == 1 else 'ies'})"
    )


def _facts(hit: search_svc.Hit) -> list[str]:
    case, item = hit.case, hit.item
    facts = [case.product.name + (f", rev {hit.revision.hardware_label}" if hit.revision else "")]
    facts.append(hit.outcome + (f" on {case.closed_at:%Y-%m-%d}" if case.closed_at else ""))
    facts.append(f"opened {case.opened_at:%Y-%m-%d}")
    if item.emission_kind:
        facts.append(item.get_emission_kind_display().lower())
    if item.scan is not None:
        facts.append(f"matched its scan {item.scan.original_name}")
    elif item.capture is not None:
        facts.append(f"matched its probe capture at {item.capture.location}")
    else:
        facts.append("matched its failing frequencies")
    if hit.shared:
        facts.append(f"shared by {case.product.team.name}")
    return facts


def present(result: search_svc.SearchResult) -> dict:
    """The search result as the template shows it (frequencies and dB already in words)."""
    q = result.query
    summary = f"{q.signature.frequency_hz.size} frequencies"
    if q.signature.fundamentals_hz.size:
        summary += ", harmonic families at " + ", ".join(
            format_hz(g) for g in q.signature.fundamentals_hz
        )
    hits = []
    for hit in result.hits:
        explanation = hit.similarity.explanation
        hits.append(
            {
                "case": hit.case,
                "url": None if hit.shared else reverse("case", args=[hit.case.pk]),
                "score": hit.score,
                "facts": _facts(hit),
                "explanation": explanation[:1].upper() + explanation[1:] + ".",
                "matches": [
                    {
                        "query": format_hz(m.query_hz),
                        "theirs": format_hz(m.other_hz),
                        "order": f"{m.order} × {format_hz(m.fundamental_hz)}" if m.order else "—",
                        "off_by": _percent(m.deviation),
                    }
                    for m in hit.similarity.matches
                ],
                "fixes": [
                    {"closed_the_case": f.closed_the_case, "text": _fix_text(f)} for f in hit.fixes
                ],
            }
        )
    return {
        "query_label": q.label,
        "query_summary": summary,
        "tolerance": q.tolerance.text,
        "warnings": q.warnings,
        "matched": result.matched,
        "hits": hits,
    }


class FiltersForm(forms.Form):
    emission_kind = forms.ChoiceField(
        required=False,
        choices=[("", "Radiated or conducted"), *Scan.EmissionKind.choices],
        label="Emission kind",
    )
    fixed_only = forms.BooleanField(
        required=False, label="Only cases fixed by a verified countermeasure"
    )
    opened_from = forms.DateField(
        required=False, label="Opened on or after", widget=forms.DateInput(attrs={"type": "date"})
    )
    opened_to = forms.DateField(
        required=False, label="Opened on or before", widget=forms.DateInput(attrs={"type": "date"})
    )
    product = forms.TypedChoiceField(required=False, coerce=int, empty_value=None, label="Product")

    def __init__(self, *args, user, **kwargs):
        super().__init__(*args, **kwargs)
        products = selectors.products_visible_to(user).order_by("name").values_list("pk", "name")
        self.fields["product"].choices = [("", "Any product"), *products]

    def clean(self):
        data = super().clean()
        start, end = data.get("opened_from"), data.get("opened_to")
        if start and end and start > end:
            self.add_error("opened_to", "The end date is before the start date.")
        return data

    def filters(self) -> search_svc.Filters:
        d = self.cleaned_data
        return search_svc.Filters(
            emission_kind=d.get("emission_kind") or "",
            fixed_only=bool(d.get("fixed_only")),
            opened_from=d.get("opened_from"),
            opened_to=d.get("opened_to"),
            product_id=d.get("product"),
        )


class SearchForm(FiltersForm):
    frequencies = forms.CharField(
        required=False,
        max_length=2000,
        label="Frequencies",
        help_text="Commas, semicolons or spaces between them, e.g. 48 MHz, 96 MHz, 144.2 MHz or 48e6 96e6.",
        widget=forms.TextInput(attrs={"placeholder": "48 MHz, 96 MHz, 144.2 MHz", "size": 48}),
    )
    tolerance = forms.CharField(
        required=False,
        max_length=40,
        label="Tolerance",
        help_text="In %, ppm or Hz (0.5 %, 50 ppm, 200 kHz); empty: your team's frequency tolerance.",
        widget=forms.TextInput(attrs={"size": 10}),
    )
    trace = forms.FileField(
        required=False,
        allow_empty_file=True,  # refused by check_trace_file, in words that name the file
        label="…or a trace file",
        help_text="Analysed now and not stored; up to 20 MB. Spectrum or time record, as for uploads.",
    )

    field_order = ["frequencies", "tolerance", "trace"]


def _run(request, form: FiltersForm, build_query) -> dict | None:
    """Build the query and search; the query's own errors land on the form. Returns the page's values or None."""
    try:
        query = build_query()
        return present(search_svc.search(user=request.user, query=query, filters=form.filters()))
    except ValidationError as exc:
        if hasattr(exc, "error_dict"):
            for name, errors in exc.error_dict.items():
                form.add_error(name if name in form.fields else None, errors)
        else:
            form.add_error(None, exc)
        return None


@login_required
def similar(request):
    """Search by typed frequencies or by a trace file (POST), or by ``?frequencies=`` (GET, so a search can be a link)."""
    page = None
    bound = request.method == "POST" or bool(request.GET.get("frequencies", "").strip())
    if request.method == "POST":
        form = SearchForm(request.POST, request.FILES, user=request.user)
    else:
        form = SearchForm(request.GET if bound else None, user=request.user)
    if bound and form.is_valid():
        data = form.cleaned_data
        if data.get("trace") is not None:
            if data.get("frequencies", "").strip():
                form.add_error(
                    None, "Search with typed frequencies or with a trace file, not both at once."
                )
            else:
                page = _run(
                    request,
                    form,
                    lambda: search_svc.query_from_trace(
                        file=data["trace"], tolerance=data["tolerance"], user=request.user
                    ),
                )
        elif data.get("frequencies", "").strip():
            page = _run(
                request,
                form,
                lambda: search_svc.query_from_frequencies(
                    text=data["frequencies"], tolerance=data["tolerance"], user=request.user
                ),
            )
        else:
            form.add_error("frequencies", "Type the failing frequencies, or choose a trace file.")
    return render(
        request,
        "emicase/search/similar.html",
        {
            "form": form,
            "page": page,
            "improvement_rule": IMPROVEMENT_RULE,
            "filter_names": FILTER_NAMES,
            "default_tolerance": search_svc.default_tolerance(request.user),
        },
    )


@login_required
def case_similar(request, case_id: int):
    """Past problems like this case's: its failing frequencies and its scans' families."""
    case = selectors.access_case(request.user, case_id)
    # Every filter is optional, so the bare page (no parameters) is a valid search too.
    form = FiltersForm(request.GET, user=request.user)
    page = (
        _run(request, form, lambda: search_svc.query_from_case(case=case))
        if form.is_valid()
        else None
    )
    return render(
        request,
        "emicase/search/case_similar.html",
        {
            "case": case,
            "form": form,
            "page": page,
            "improvement_rule": IMPROVEMENT_RULE,
            "filter_names": FILTER_NAMES,
        },
    )
