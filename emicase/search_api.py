"""``/api/similar-problems/``: the signature search for scripts.

GET with ``case`` (a case of yours) or ``frequencies`` (typed, with an
optional ``tolerance``); POST a ``trace`` file (multipart) to search with a
trace analysed on the fly and not stored. Filters and ``limit`` work with
both. The serializers only validate and shape; ``services.search`` does the
work, scoped to the requesting user's teams.
"""

from __future__ import annotations

from django.core.exceptions import ValidationError as DjangoValidationError
from django.urls import reverse
from drf_spectacular.utils import extend_schema
from rest_framework import serializers
from rest_framework.parsers import FormParser, MultiPartParser
from rest_framework.response import Response
from rest_framework.views import APIView

from emicase import selectors
from emicase.models import Scan
from emicase.search_views import IMPROVEMENT_RULE
from emicase.services import search as search_svc

MAX_ID = 2**63 - 1  # the largest primary key the databases hold


class _FiltersSerializer(serializers.Serializer):
    tolerance = serializers.CharField(
        required=False,
        allow_blank=True,
        max_length=40,
        help_text="Matching tolerance: '0.5 %', '50 ppm' or '200 kHz'. Default: your team's frequency "
        "tolerance (a case query uses its team's).",
    )
    emission_kind = serializers.ChoiceField(
        choices=Scan.EmissionKind.choices,
        required=False,
        allow_blank=True,
        help_text="Only matches in scans (or failing frequencies) of this kind.",
    )
    fixed_only = serializers.BooleanField(
        required=False,
        default=False,
        help_text="Only cases closed as fixed by a verified countermeasure.",
    )
    opened_from = serializers.DateField(
        required=False, help_text="Cases opened on or after this date."
    )
    opened_to = serializers.DateField(
        required=False, help_text="Cases opened on or before this date."
    )
    product = serializers.IntegerField(
        required=False,
        min_value=1,
        max_value=MAX_ID,
        help_text="Only cases of this product (its id).",
    )
    limit = serializers.IntegerField(
        required=False,
        default=10,
        min_value=1,
        max_value=search_svc.MAX_HITS,
        help_text="How many cases.",
    )

    def validate(self, data):
        start, end = data.get("opened_from"), data.get("opened_to")
        if start and end and start > end:
            raise serializers.ValidationError(
                {"opened_to": "The end date is before the start date."}
            )
        return data

    def filters(self) -> search_svc.Filters:
        d = self.validated_data
        return search_svc.Filters(
            emission_kind=d.get("emission_kind") or "",
            fixed_only=d.get("fixed_only", False),
            opened_from=d.get("opened_from"),
            opened_to=d.get("opened_to"),
            product_id=d.get("product"),
        )


class SimilarQuerySerializer(_FiltersSerializer):
    case = serializers.IntegerField(
        required=False,
        min_value=1,
        max_value=MAX_ID,
        help_text="Search with this case's failing frequencies and its scans' families (it is left out of the results).",
    )
    frequencies = serializers.CharField(
        required=False,
        max_length=2000,
        help_text="Typed frequencies, e.g. '48 MHz, 96 MHz, 144.2 MHz' or '48e6 96e6'.",
    )

    def validate(self, data):
        data = super().validate(data)
        if ("case" in data) == bool(data.get("frequencies", "").strip()):
            raise serializers.ValidationError("Give either a case or frequencies (one of them).")
        return data


class SimilarTraceSerializer(_FiltersSerializer):
    trace = serializers.FileField(
        help_text="A trace file (spectrum or time record), analysed now and not stored; up to 20 MB."
    )


class MatchSerializer(serializers.Serializer):
    query_hz = serializers.FloatField(help_text="The query's frequency.")
    their_hz = serializers.FloatField(
        help_text="What explains it: their peak (direct match) or order × their fundamental (family match)."
    )
    order = serializers.IntegerField(
        allow_null=True, help_text="Harmonic order on a shared family, if any."
    )
    fundamental_hz = serializers.FloatField(
        allow_null=True, help_text="Their value of the shared fundamental."
    )
    deviation_pct = serializers.FloatField(help_text="(query − theirs) / theirs, in %.")


class FixSerializer(serializers.Serializer):
    id = serializers.IntegerField()
    kind = serializers.CharField()
    description = serializers.CharField()
    revision = serializers.CharField(help_text="The revision the countermeasure was made on.")
    closed_the_case = serializers.BooleanField()
    improvement_db = serializers.FloatField(
        allow_null=True,
        help_text="Level before − level after at improvement_at_hz (positive = quieter).",
    )
    improvement_at_hz = serializers.FloatField(
        allow_null=True,
        help_text="The worst failing frequency measured (least margin before the fix).",
    )
    mean_improvement_db = serializers.FloatField(allow_null=True)
    measured_frequencies = serializers.IntegerField()


class HitSerializer(serializers.Serializer):
    score = serializers.FloatField(help_text="0..1, how well the case explains the query.")
    explanation = serializers.CharField()
    case = serializers.DictField(
        help_text="id, title, url (null for another team's shared case), team, "
        "product, stage, outcome, opened_at, closed_at."
    )
    matched = serializers.DictField(
        help_text="What of the case matched: source, emission_kind, revision, name."
    )
    matches = MatchSerializer(many=True)
    shared_fundamentals_hz = serializers.ListField(child=serializers.FloatField())
    fixes = FixSerializer(many=True)


class SimilarResultSerializer(serializers.Serializer):
    query = serializers.DictField(
        help_text="kind, label, frequencies_hz, fundamentals_hz, tolerance, warnings."
    )
    improvement_rule = serializers.CharField()
    matched = serializers.IntegerField(
        help_text="Cases that matched (more than are listed when limited)."
    )
    candidates = serializers.IntegerField(help_text="Cases scored.")
    results = HitSerializer(many=True)


def _fix_json(fix: search_svc.Fix) -> dict:
    cm = fix.countermeasure
    return {
        "id": cm.pk,
        "kind": cm.get_kind_display(),
        "description": cm.description,
        "revision": str(cm.revision),
        "closed_the_case": fix.closed_the_case,
        "improvement_db": fix.improvement_db,
        "improvement_at_hz": fix.at_frequency_hz,
        "mean_improvement_db": fix.mean_improvement_db,
        "measured_frequencies": fix.measured,
    }


def _matched_name(item) -> str:
    if item.scan is not None:
        return item.scan.original_name
    if item.capture is not None:
        return f"{item.capture.location} ({item.capture.tip})"
    return "failing frequencies"


def result_json(result: search_svc.SearchResult, request) -> dict:
    """The search result as the endpoint's JSON (plain data)."""
    q = result.query
    hits = []
    for hit in result.hits:
        case = hit.case
        hits.append(
            {
                "score": hit.score,
                "explanation": hit.similarity.explanation,
                "case": {
                    "id": case.pk,
                    "title": case.title,
                    "url": None
                    if hit.shared
                    else request.build_absolute_uri(reverse("case", args=[case.pk])),
                    "team": case.product.team.name,
                    "product": case.product.name,
                    "stage": case.get_stage_display(),
                    "outcome": hit.outcome,
                    "opened_at": case.opened_at,
                    "closed_at": case.closed_at,
                },
                "matched": {
                    "source": hit.item.source,
                    "emission_kind": hit.item.emission_kind,
                    "revision": str(hit.revision) if hit.revision else None,
                    "name": _matched_name(hit.item),
                },
                "matches": [
                    {
                        "query_hz": m.query_hz,
                        "their_hz": m.other_hz,
                        "order": m.order,
                        "fundamental_hz": m.fundamental_hz,
                        "deviation_pct": 100.0 * m.deviation,
                    }
                    for m in hit.similarity.matches
                ],
                "shared_fundamentals_hz": list(hit.similarity.shared_fundamentals_hz),
                "fixes": [_fix_json(f) for f in hit.fixes],
            }
        )
    return {
        "query": {
            "kind": q.kind,
            "label": q.label,
            "frequencies_hz": q.signature.frequency_hz.tolist(),
            "fundamentals_hz": q.signature.fundamentals_hz.tolist(),
            "tolerance": q.tolerance.text,
            "warnings": list(q.warnings),
        },
        "improvement_rule": IMPROVEMENT_RULE,
        "matched": result.matched,
        "candidates": result.candidates,
        "results": hits,
    }


def _field_errors(exc: DjangoValidationError) -> dict:
    if hasattr(exc, "error_dict"):
        return {name: list(messages) for name, messages in exc.message_dict.items()}
    return {"non_field_errors": list(exc.messages)}


class SimilarProblemsView(APIView):
    """Past cases with the same frequency signature, best first, each explained."""

    parser_classes = [MultiPartParser, FormParser]

    def _search(self, request, serializer: _FiltersSerializer, build_query) -> Response:
        serializer.is_valid(raise_exception=True)
        try:
            query = build_query(serializer.validated_data)
            result = search_svc.search(
                user=request.user,
                query=query,
                filters=serializer.filters(),
                limit=serializer.validated_data.get("limit", 10),
            )
        except DjangoValidationError as exc:
            raise serializers.ValidationError(_field_errors(exc)) from None
        return Response(result_json(result, request))

    @extend_schema(
        operation_id="similar_problems",
        summary="Search past cases by a case's or by typed frequencies",
        parameters=[SimilarQuerySerializer],
        responses=SimilarResultSerializer,
    )
    def get(self, request):
        def build(data):
            if "case" in data:
                case = selectors.access_case(request.user, data["case"])
                return search_svc.query_from_case(case=case)
            return search_svc.query_from_frequencies(
                text=data["frequencies"], tolerance=data.get("tolerance", ""), user=request.user
            )

        return self._search(request, SimilarQuerySerializer(data=request.query_params), build)

    @extend_schema(
        operation_id="similar_problems_by_trace",
        summary="Search past cases by an uploaded trace (analysed now, not stored)",
        request={"multipart/form-data": SimilarTraceSerializer},
        responses=SimilarResultSerializer,
    )
    def post(self, request):
        def build(data):
            return search_svc.query_from_trace(
                file=data["trace"], tolerance=data.get("tolerance", ""), user=request.user
            )

        return self._search(request, SimilarTraceSerializer(data=request.data), build)
