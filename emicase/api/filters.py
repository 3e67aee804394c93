"""Query filters for the API's lists (django-filter).

Frequencies are in Hz and compared as floats (``frequency_hz_min`` /
``frequency_hz_max``); dates take ``YYYY-MM-DD`` with ``_after`` / ``_before``
bounds, both inclusive. An id filter only matches the user's own objects, as
every list is already scoped to the user's teams.
"""

from __future__ import annotations

import django_filters as df
from django import forms
from django.db.models import Exists, OuterRef

from emicase import models as m


class FloatFilter(df.NumberFilter):
    # Floats, not decimals: the columns are floats, and a decimal such as
    # 1e999999 would overflow the database's numeric type.
    field_class = forms.FloatField


class IdFilter(df.NumberFilter):
    field_class = forms.IntegerField


def id_filter(field_name: str, what: str) -> IdFilter:
    return IdFilter(
        field_name=field_name,
        min_value=1,
        max_value=2**63 - 1,
        label=f"Only those of this {what} (id).",
    )


def date_range(
    field_name: str, what: str, *, timestamp: bool = True
) -> tuple[df.DateFilter, df.DateFilter]:
    # A timestamp is compared by its day, so "before 2026-11-03" includes that whole day.
    lookup = "date__" if timestamp else ""
    return (
        df.DateFilter(
            field_name=field_name, lookup_expr=f"{lookup}gte", label=f"{what} on or after this day."
        ),
        df.DateFilter(
            field_name=field_name,
            lookup_expr=f"{lookup}lte",
            label=f"{what} on or before this day.",
        ),
    )


class ProductFilter(df.FilterSet):
    team = id_filter("team", "team")
    name = df.CharFilter(lookup_expr="icontains", label="Name contains.")

    class Meta:
        model = m.Product
        fields = ["team", "name"]


class RevisionFilter(df.FilterSet):
    product = id_filter("product", "product")

    class Meta:
        model = m.Revision
        fields = ["product"]


class SourceFilter(df.FilterSet):
    revision = id_filter("revision", "revision")
    product = id_filter("revision__product", "product")
    kind = df.ChoiceFilter(choices=m.EmissionSource.Kind.choices)

    class Meta:
        model = m.EmissionSource
        fields = ["revision", "product", "kind"]


class CaseFilter(df.FilterSet):
    product = id_filter("product", "product")
    stage = df.MultipleChoiceFilter(choices=m.Case.Stage.choices, label="One or more stages.")
    closure = df.ChoiceFilter(choices=[c for c in m.Case.Closure.choices if c[0]])
    owner = df.CharFilter(field_name="owner__username", label="Owner's username.")
    opened_after, opened_before = date_range("opened_at", "Opened")
    updated_after, updated_before = date_range("updated_at", "Changed")
    frequency_hz_min = FloatFilter(
        method="filter_frequency", label="Has a failing frequency at or above this (Hz)."
    )
    frequency_hz_max = FloatFilter(
        method="filter_frequency", label="Has a failing frequency at or below this (Hz)."
    )

    class Meta:
        model = m.Case
        fields = ["product", "stage", "closure", "owner"]

    def filter_frequency(self, queryset, name, value):
        # Both bounds apply to the same failing frequency, so they are applied
        # together once (an EXISTS keeps one row per case).
        lo = self.form.cleaned_data.get("frequency_hz_min")
        hi = self.form.cleaned_data.get("frequency_hz_max")
        if name == "frequency_hz_max" and lo is not None:
            return queryset  # done with the minimum
        within = m.FailingFrequency.objects.filter(case=OuterRef("pk"))
        if lo is not None:
            within = within.filter(frequency_hz__gte=lo)
        if hi is not None:
            within = within.filter(frequency_hz__lte=hi)
        return queryset.filter(Exists(within))


class FailingFrequencyFilter(df.FilterSet):
    case = id_filter("case", "case")
    product = id_filter("case__product", "product")
    frequency_hz_min = FloatFilter(
        field_name="frequency_hz", lookup_expr="gte", label="At or above this (Hz)."
    )
    frequency_hz_max = FloatFilter(
        field_name="frequency_hz", lookup_expr="lte", label="At or below this (Hz)."
    )

    class Meta:
        model = m.FailingFrequency
        fields = ["case", "product", "confirmed", "is_open"]


class ScanFilter(df.FilterSet):
    product = id_filter("revision__product", "product")
    revision = id_filter("revision", "revision")
    case = id_filter("case", "case")
    status = df.ChoiceFilter(choices=m.AnalysisStatus.choices)
    emission_kind = df.ChoiceFilter(choices=m.Scan.EmissionKind.choices)
    setting = df.ChoiceFilter(choices=m.Scan.Setting.choices)
    measured_after, measured_before = date_range("measured_on", "Measured", timestamp=False)
    uploaded_after, uploaded_before = date_range("uploaded_at", "Uploaded")

    class Meta:
        model = m.Scan
        fields = ["product", "revision", "case", "status", "emission_kind", "setting"]


class CaptureFilter(df.FilterSet):
    product = id_filter("case__product", "product")
    case = id_filter("case", "case")
    revision = id_filter("revision", "revision")
    countermeasure = id_filter("countermeasure", "countermeasure")
    status = df.ChoiceFilter(choices=m.AnalysisStatus.choices)
    probe_kind = df.ChoiceFilter(choices=m.Capture.ProbeKind.choices)
    board_side = df.ChoiceFilter(choices=m.Capture.BoardSide.choices)
    location = df.CharFilter(lookup_expr="iexact", label="Zone or reference designator (any case).")
    captured_after, captured_before = date_range("captured_at", "Captured")

    class Meta:
        model = m.Capture
        fields = [
            "product",
            "case",
            "revision",
            "countermeasure",
            "status",
            "probe_kind",
            "board_side",
            "location",
        ]


class CountermeasureFilter(df.FilterSet):
    case = id_filter("case", "case")
    product = id_filter("case__product", "product")
    revision = id_filter("revision", "revision")
    kind = df.ChoiceFilter(choices=m.Countermeasure.Kind.choices)
    status = df.ChoiceFilter(choices=m.Countermeasure.Status.choices)
    proposed_after, proposed_before = date_range("proposed_at", "Proposed")

    class Meta:
        model = m.Countermeasure
        fields = ["case", "product", "revision", "kind", "status"]


class VerificationFilter(df.FilterSet):
    countermeasure = id_filter("countermeasure", "countermeasure")
    case = id_filter("countermeasure__case", "case")
    recorded_after, recorded_before = date_range("recorded_at", "Recorded")

    class Meta:
        model = m.Verification
        fields = ["countermeasure", "case"]


class EventFilter(df.FilterSet):
    kind = df.ChoiceFilter(choices=m.CaseEvent.Kind.choices)
    after, before = date_range("at", "Happened")

    class Meta:
        model = m.CaseEvent
        fields = ["kind"]


class AuditEventFilter(df.FilterSet):
    team = id_filter("team", "team")
    verb = df.ChoiceFilter(choices=m.AuditEvent.Verb.choices)
    at_after, at_before = date_range("at", "Recorded")

    class Meta:
        model = m.AuditEvent
        fields = ["team", "verb"]
