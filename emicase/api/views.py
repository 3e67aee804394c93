"""API views: validate at the edge, call a service, show the result.

Every queryset is scoped to the user's teams (``permissions.scoped`` or a
selector), so another team's object is a 404. Changes go through
``emicase.services``; their ValidationError becomes a field-by-field 400 and
their PermissionDenied a 403 (see ``errors.py``).
"""

from __future__ import annotations

import json
import re
from collections.abc import Callable

from django.core.exceptions import ValidationError as DjangoValidationError
from django.db import IntegrityError, models
from django.db.models import F, Prefetch
from drf_spectacular.types import OpenApiTypes
from drf_spectacular.utils import (
    OpenApiParameter,
    OpenApiResponse,
    extend_schema,
)
from rest_framework import generics, mixins, status, viewsets
from rest_framework.decorators import action
from rest_framework.exceptions import APIException, ValidationError
from rest_framework.parsers import MultiPartParser
from rest_framework.permissions import IsAuthenticated
from rest_framework.renderers import BaseRenderer, JSONRenderer
from rest_framework.response import Response
from rest_framework.views import APIView

from emicase import models as m
from emicase import selectors
from emicase.api import filters
from emicase.api import serializers as s
from emicase.api.permissions import RoleAllowsWrite, scoped
from emicase.services import cases as case_svc
from emicase.services import countermeasures as cm_svc
from emicase.services import frequencies as ff_svc
from emicase.services import products as product_svc
from emicase.services import uploads as upload_svc
from emicase.services.audit import audit_visible_to
from emicase.services.files import upload_file_response

# ----------------------------------------------------------------- idempotent uploads

IDEMPOTENCY_HEADER = "Idempotency-Key"
_KEY_CHARS = re.compile(r"[\x21-\x7e]{1,64}")

IDEMPOTENCY_PARAMETER = OpenApiParameter(
    IDEMPOTENCY_HEADER,
    OpenApiTypes.STR,
    OpenApiParameter.HEADER,
    required=False,
    description=(
        "Any 1–64 visible ASCII characters chosen by the client, e.g. a SHA-256 hex digest of the file. "
        "Posting again with the same key returns the upload already stored (200) instead of a second one."
    ),
)


def idempotency_key(request) -> str:
    """The request's Idempotency-Key ('' when absent); a 400 when it is malformed."""
    key = request.headers.get(IDEMPOTENCY_HEADER, "").strip()
    if key and not _KEY_CHARS.fullmatch(key):
        raise ValidationError(
            {IDEMPOTENCY_HEADER: ["Use 1 to 64 visible ASCII characters, e.g. a hex digest."]}
        )
    return key


def store_once(
    model: type[m.AnalysedUpload], *, key: str, by, scope: dict, store: Callable[[], models.Model]
):
    """Run ``store`` unless an upload with this key is already stored. Returns (upload, created).

    A concurrent twin may commit between the look-up and the insert; its
    unique constraint then refuses ours and the twin is returned.
    """

    def earlier():
        return (
            model.objects.filter(uploaded_by=by, idempotency_key=key, **scope).first()
            if key
            else None
        )

    found = earlier()
    if found is not None:
        return found, False
    try:
        return store(), True
    except (IntegrityError, DjangoValidationError):
        found = earlier()
        if found is None:
            raise
        return found, False


class AnalysisNotFinished(APIException):
    status_code = status.HTTP_409_CONFLICT
    default_code = "analysis_not_finished"


# ----------------------------------------------------------------- common ground


class ScopedViewSet(viewsets.GenericViewSet):
    """Lists and details of one model, scoped to the user's teams; writes by role."""

    model: type[models.Model]
    permission_classes = [IsAuthenticated, RoleAllowsWrite]
    # action → output serializer; "default" for the rest.
    serializers: dict[str, type] = {}

    def get_queryset(self):
        return scoped(self.model, self.request.user)

    def get_serializer_class(self):
        return self.serializers.get(self.action, self.serializers["default"])

    def shown(self, obj, serializer_class=None, code=status.HTTP_200_OK, **kwargs) -> Response:
        """Respond with ``obj`` as the API shows it (re-read through this view's queryset)."""
        fresh = self.get_queryset().get(pk=obj.pk)
        serializer_class = serializer_class or self.serializers.get(
            "retrieve", self.serializers["default"]
        )
        data = serializer_class(fresh, context=self.get_serializer_context()).data
        headers = (
            {"Location": str(data["url"])}
            if code == status.HTTP_201_CREATED and "url" in data
            else None
        )
        return Response(data, status=code, headers=headers, **kwargs)

    def validated(self, serializer_class, **kwargs) -> dict:
        serializer = serializer_class(
            data=self.request.data, context=self.get_serializer_context(), **kwargs
        )
        serializer.is_valid(raise_exception=True)
        return dict(serializer.validated_data)


# ----------------------------------------------------------------- teams and reference data


class TeamViewSet(mixins.ListModelMixin, mixins.RetrieveModelMixin, ScopedViewSet):
    """Your teams and your role in each."""

    model = m.Team
    serializers = {"default": s.TeamSerializer}
    ordering_fields = ["name"]

    def get_queryset(self):
        # The role comes through the same membership join that picks the teams.
        return selectors.teams_of(self.request.user).annotate(role=F("memberships__role"))


class LimitListView(APIView):
    """The built-in limit lines a scan can be judged against."""

    @extend_schema(responses=s.LimitSerializer(many=True))
    def get(self, request):
        rows = [
            {
                "id": line.id,
                "title": line.title,
                "kind": line.kind,
                "detector": line.detector,
                "unit": line.unit,
                "distance_m": line.distance_m,
                "source": line.source,
            }
            for line in s.LIMITS.values()
        ]
        return Response(s.LimitSerializer(rows, many=True).data)


# ----------------------------------------------------------------- products, revisions, sources


class ProductViewSet(mixins.ListModelMixin, mixins.RetrieveModelMixin, ScopedViewSet):
    model = m.Product
    serializers = {"default": s.ProductSerializer}
    filterset_class = filters.ProductFilter
    ordering_fields = ["name", "created_at"]

    @extend_schema(request=s.ProductCreateSerializer, responses={201: s.ProductSerializer})
    def create(self, request):
        data = self.validated(s.ProductCreateSerializer)
        product = product_svc.product_create(by=request.user, **data)
        return self.shown(product, code=status.HTTP_201_CREATED)


class RevisionViewSet(mixins.ListModelMixin, mixins.RetrieveModelMixin, ScopedViewSet):
    """Revisions of your products, each with its known emission sources."""

    model = m.Revision
    serializers = {"default": s.RevisionSerializer}
    filterset_class = filters.RevisionFilter
    ordering_fields = ["created_at", "hardware_label"]

    def get_queryset(self):
        return super().get_queryset().prefetch_related("sources")

    @extend_schema(request=s.RevisionCreateSerializer, responses={201: s.RevisionSerializer})
    def create(self, request):
        data = self.validated(s.RevisionCreateSerializer)
        revision = product_svc.revision_create(by=request.user, **data)
        return self.shown(revision, code=status.HTTP_201_CREATED)


class SourceViewSet(mixins.ListModelMixin, mixins.RetrieveModelMixin, ScopedViewSet):
    """Known emission sources of a revision (clocks, converters, buses). Changes re-read the affected cases."""

    model = m.EmissionSource
    serializers = {"default": s.SourceSerializer}
    filterset_class = filters.SourceFilter
    ordering_fields = ["nominal_frequency_hz", "name"]

    @extend_schema(request=s.SourceCreateSerializer, responses={201: s.SourceSerializer})
    def create(self, request):
        data = self.validated(s.SourceCreateSerializer)
        source = product_svc.source_save(by=request.user, **data)
        return self.shown(source, code=status.HTTP_201_CREATED)

    @extend_schema(request=s.SourceUpdateSerializer, responses=s.SourceSerializer)
    def partial_update(self, request, pk=None):
        source = self.get_object()
        data = self.validated(s.SourceUpdateSerializer, instance=source, partial=True)
        current = {
            f: getattr(source, f) for f in ("name", "kind", "nominal_frequency_hz", "tolerance_hz")
        }
        source = product_svc.source_save(
            revision=source.revision, source=source, by=request.user, **{**current, **data}
        )
        return self.shown(source)

    @extend_schema(responses={204: None})
    def destroy(self, request, pk=None):
        product_svc.source_delete(source=self.get_object(), by=request.user)
        return Response(status=status.HTTP_204_NO_CONTENT)


# ----------------------------------------------------------------- cases


class CaseViewSet(mixins.ListModelMixin, mixins.RetrieveModelMixin, ScopedViewSet):
    """Cases of your teams' products. Stages change only through the actions (move, close, reopen)."""

    model = m.Case
    serializers = {"default": s.CaseSerializer, "retrieve": s.CaseDetailSerializer}
    filterset_class = filters.CaseFilter
    ordering_fields = ["updated_at", "opened_at", "worst_margin_db", "stage", "title"]

    def get_queryset(self):
        # The worst-margin annotation groups rows, and grouped queries drop
        # Meta.ordering: say the order again for stable pages.
        queryset = (
            selectors.cases_visible_to(self.request.user)
            .select_related("opened_by")
            .order_by("-updated_at", "-id")
        )
        if self.action != "list":
            queryset = queryset.prefetch_related("failing_frequencies")
        return queryset

    @extend_schema(request=s.CaseCreateSerializer, responses={201: s.CaseDetailSerializer})
    def create(self, request):
        data = self.validated(s.CaseCreateSerializer)
        case = case_svc.case_open(by=request.user, **data)
        return self.shown(case, code=status.HTTP_201_CREATED)

    @extend_schema(request=s.CaseMoveSerializer, responses=s.CaseDetailSerializer)
    @action(detail=True, methods=["post"])
    def move(self, request, pk=None):
        """Move the case to another stage by hand (the allowed moves depend on the stage it is in)."""
        case = self.get_object()
        data = self.validated(s.CaseMoveSerializer)
        return self.shown(case_svc.case_move(case=case, by=request.user, **data))

    @extend_schema(request=s.CaseCloseSerializer, responses=s.CaseDetailSerializer)
    @action(detail=True, methods=["post"])
    def close(self, request, pk=None):
        """Close as fixed (naming a verified countermeasure) or as waived (with a reason). Team leads only."""
        case = self.get_object()
        data = self.validated(s.CaseCloseSerializer)
        return self.shown(case_svc.case_close(case=case, by=request.user, **data))

    @extend_schema(request=s.CaseReopenSerializer, responses=s.CaseDetailSerializer)
    @action(detail=True, methods=["post"])
    def reopen(self, request, pk=None):
        """Reopen a closed case, saying why. Team leads only."""
        case = self.get_object()
        data = self.validated(s.CaseReopenSerializer)
        return self.shown(case_svc.case_reopen(case=case, by=request.user, **data))

    @extend_schema(request=s.FrequenciesConfirmSerializer, responses=s.CaseDetailSerializer)
    @action(detail=True, methods=["post"], url_path="confirm-frequencies")
    def confirm_frequencies(self, request, pk=None):
        """Confirm the analysis's proposed failing frequencies you keep; the other proposals are dropped."""
        case = self.get_object()
        data = self.validated(s.FrequenciesConfirmSerializer)
        ff_svc.failing_frequencies_confirm(case=case, by=request.user, keep_ids=data["keep"])
        return self.shown(case)


class CaseTimelineView(generics.ListAPIView):
    """A case's timeline, oldest first."""

    serializer_class = s.EventSerializer
    filterset_class = filters.EventFilter
    ordering_fields = ["at"]
    queryset = m.CaseEvent.objects.none()  # for the schema; requests use get_queryset

    def get_queryset(self):
        if getattr(self, "swagger_fake_view", False):
            return self.queryset
        case = selectors.access_case(self.request.user, self.kwargs["case_id"])
        return case.events.select_related("actor")


class CaseCommentsView(generics.ListCreateAPIView):
    """Comments on a case, oldest first."""

    serializer_class = s.CommentSerializer
    permission_classes = [IsAuthenticated, RoleAllowsWrite]
    ordering_fields = ["at"]
    queryset = m.CaseEvent.objects.none()  # for the schema; requests use get_queryset

    def get_queryset(self):
        if getattr(self, "swagger_fake_view", False):
            return self.queryset
        case = selectors.access_case(self.request.user, self.kwargs["case_id"])
        return case.events.filter(kind=m.CaseEvent.Kind.COMMENT).select_related("actor")

    @extend_schema(request=s.CommentCreateSerializer, responses={201: s.CommentSerializer})
    def post(self, request, case_id: int):
        case = selectors.access_case(request.user, case_id)
        serializer = s.CommentCreateSerializer(data=request.data)
        serializer.is_valid(raise_exception=True)
        event = case_svc.comment_add(
            case=case, by=request.user, text=serializer.validated_data["text"]
        )
        return Response(s.CommentSerializer(event).data, status=status.HTTP_201_CREATED)


class FailingFrequencyViewSet(mixins.ListModelMixin, mixins.RetrieveModelMixin, ScopedViewSet):
    """Frequencies where a case's product fails or lacks margin. Changes re-read the case's captures."""

    model = m.FailingFrequency
    serializers = {"default": s.FailingFrequencySerializer}
    filterset_class = filters.FailingFrequencyFilter
    ordering_fields = ["frequency_hz", "created_at", "level"]

    @extend_schema(
        request=s.FailingFrequencyCreateSerializer, responses={201: s.FailingFrequencySerializer}
    )
    def create(self, request):
        data = self.validated(s.FailingFrequencyCreateSerializer)
        ff = ff_svc.failing_frequency_add(by=request.user, **data)
        return self.shown(ff, code=status.HTTP_201_CREATED)

    @extend_schema(
        request=s.FailingFrequencyUpdateSerializer, responses=s.FailingFrequencySerializer
    )
    def partial_update(self, request, pk=None):
        ff = self.get_object()
        data = self.validated(s.FailingFrequencyUpdateSerializer, instance=ff, partial=True)
        ff = ff_svc.failing_frequency_update(failing_frequency=ff, by=request.user, **data)
        return self.shown(ff)


# ----------------------------------------------------------------- analysed uploads


class PassthroughRenderer(BaseRenderer):
    """Lets a client that asks for the raw bytes (Accept: application/octet-stream) have them."""

    media_type = "application/octet-stream"
    format = "bin"
    charset = None
    render_style = "binary"

    def render(self, data, accepted_media_type=None, renderer_context=None):
        # Only an error reaches a renderer here (the file itself is a FileResponse): keep its words.
        return json.dumps(data).encode() if isinstance(data, dict | list) else data


FILE_DOC = extend_schema(
    responses={(200, "application/octet-stream"): OpenApiTypes.BINARY},
    description="The file as uploaded (an attachment named as it was sent); each download is in the team's audit log.",
)


class UploadViewSet(mixins.ListModelMixin, mixins.RetrieveModelMixin, ScopedViewSet):
    """Shared by scans and captures: heavy columns stay out of lists, the envelope has its own endpoint."""

    related: tuple[str, ...] = ("uploaded_by",)

    def get_queryset(self):
        queryset = super().get_queryset()
        if self.action == "envelope":
            return queryset.only("pk", "status", "unit", "domain", "envelope", "error_text")
        queryset = queryset.select_related(*self.related).defer("envelope")
        if self.action == "list":
            queryset = queryset.defer("envelope", "results")
        return queryset

    @FILE_DOC
    # JSON first, so a refusal reads as every other API error does; a client that asks for the raw
    # bytes alone (Accept: application/octet-stream) is served too.
    @action(detail=True, methods=["get"], renderer_classes=[JSONRenderer, PassthroughRenderer])
    def file(self, request, pk=None):
        """The uploaded file itself, for members of its team only."""
        return upload_file_response(self.get_object(), by=request.user, request=request)

    def envelope_response(self) -> Response:
        item = self.get_object()
        if item.status != m.AnalysisStatus.DONE:
            words = (
                f"its analysis failed: {item.error_text}"
                if item.status == m.AnalysisStatus.FAILED
                else (
                    f"its analysis is {item.get_status_display().lower()}; ask again when the status is done"
                )
            )
            raise AnalysisNotFinished(f"No envelope for this upload: {words}.")
        env = item.envelope or {}
        data = {
            "id": item.pk,
            "unit": item.unit,
            "domain": item.domain,
            "frequency_hz": env.get("frequency_hz", []),
            "level": env.get("level", []),
        }
        return Response(s.EnvelopeSerializer(data).data)


ENVELOPE_DOC = extend_schema(
    responses={
        200: s.EnvelopeSerializer,
        409: OpenApiResponse(description="The analysis is not done."),
    },
    description="The decimated min/max envelope of the trace for plotting (each bucket's extremes kept).",
)


class ScanViewSet(UploadViewSet):
    """Emissions scans (compliance or pre-compliance) of a revision, and their analysis."""

    model = m.Scan
    serializers = {
        "default": s.ScanSerializer,
        "retrieve": s.ScanDetailSerializer,
        "create": s.ScanDetailSerializer,
    }
    filterset_class = filters.ScanFilter
    ordering_fields = ["measured_on", "uploaded_at", "status"]
    parser_classes = [MultiPartParser]
    related = ("uploaded_by", "revision")

    @extend_schema(
        request=s.ScanUploadSerializer,
        parameters=[IDEMPOTENCY_PARAMETER],
        responses={201: s.ScanDetailSerializer, 200: s.ScanDetailSerializer},
        description=(
            "Upload a scan's trace file; it is analysed in the background (poll ``url`` until ``status`` is "
            "done or failed). A file that is plainly not a text trace is refused at once (400); a text file the "
            "engine cannot read is stored and its analysis ends ``failed`` with the engine's words in "
            "``error_text``. Without a case, ``opens_case_titled`` opens a case if the scan fails. "
            "In-house results are pre-compliance only; certification comes from an accredited lab."
        ),
    )
    def create(self, request):
        data = self.validated(s.ScanUploadSerializer)
        key = idempotency_key(request)
        scan, created = store_once(
            m.Scan,
            key=key,
            by=request.user,
            scope={"revision": data["revision"]},
            store=lambda: upload_svc.scan_upload(by=request.user, idempotency_key=key, **data),
        )
        return self.shown(scan, code=status.HTTP_201_CREATED if created else status.HTTP_200_OK)

    @ENVELOPE_DOC
    @action(detail=True, methods=["get"])
    def envelope(self, request, pk=None):
        return self.envelope_response()


class CaptureViewSet(UploadViewSet):
    """Near-field probe captures on a case, and their analysis."""

    model = m.Capture
    serializers = {
        "default": s.CaptureSerializer,
        "retrieve": s.CaptureDetailSerializer,
        "create": s.CaptureDetailSerializer,
    }
    filterset_class = filters.CaptureFilter
    ordering_fields = ["captured_at", "uploaded_at", "location", "status"]
    parser_classes = [MultiPartParser]

    def get_queryset(self):
        queryset = super().get_queryset()
        if self.action not in ("list", "envelope"):
            queryset = queryset.prefetch_related(
                Prefetch("readings", queryset=m.CaptureReading.objects.order_by("frequency_hz"))
            )
        return queryset

    @extend_schema(
        request=s.CaptureUploadSerializer,
        parameters=[IDEMPOTENCY_PARAMETER],
        responses={201: s.CaptureDetailSerializer, 200: s.CaptureDetailSerializer},
        description=(
            "Upload a probe capture (spectrum or time record) with where and how it was taken; it is analysed "
            "in the background and read at the case's failing frequencies (poll ``url`` until ``status`` is done "
            "or failed). A file that is plainly not a text trace is refused at once (400); a text file the engine "
            "cannot read is stored and its analysis ends ``failed`` with the engine's words in ``error_text``.\n\n"
            "At the bench: boards powered from the mains may carry lethal voltages (use an isolation transformer "
            "or a LISN as intended, keep one hand away); a scope's ground clip on a mains-referenced node is a "
            "short; RF set-ups may exceed exposure limits. Probe readings are relative levels for finding the "
            "source, not compliance results."
        ),
    )
    def create(self, request):
        data = self.validated(s.CaptureUploadSerializer)
        key = idempotency_key(request)
        capture, created = store_once(
            m.Capture,
            key=key,
            by=request.user,
            scope={"case": data["case"]},
            store=lambda: upload_svc.capture_upload(by=request.user, idempotency_key=key, **data),
        )
        return self.shown(capture, code=status.HTTP_201_CREATED if created else status.HTTP_200_OK)

    @ENVELOPE_DOC
    @action(detail=True, methods=["get"])
    def envelope(self, request, pk=None):
        return self.envelope_response()


# ----------------------------------------------------------------- countermeasures and verifications


class CountermeasureViewSet(mixins.ListModelMixin, mixins.RetrieveModelMixin, ScopedViewSet):
    """Changes tried against a case's emissions: proposed, on trial, verified or rejected."""

    model = m.Countermeasure
    serializers = {"default": s.CountermeasureSerializer}
    filterset_class = filters.CountermeasureFilter
    ordering_fields = ["proposed_at", "status", "kind"]

    def get_queryset(self):
        return super().get_queryset().select_related("proposed_by")

    @extend_schema(
        request=s.CountermeasureCreateSerializer, responses={201: s.CountermeasureSerializer}
    )
    def create(self, request):
        data = self.validated(s.CountermeasureCreateSerializer)
        cm = cm_svc.countermeasure_propose(by=request.user, **data)
        return self.shown(cm, code=status.HTTP_201_CREATED)

    @extend_schema(request=None, responses=s.CountermeasureSerializer)
    @action(detail=True, methods=["post"])
    def trial(self, request, pk=None):
        """Put the countermeasure on trial (a logged or hunting case moves to 'Fix on trial')."""
        return self.shown(
            cm_svc.countermeasure_start_trial(countermeasure=self.get_object(), by=request.user)
        )

    @extend_schema(request=s.CountermeasureVerifySerializer, responses=s.CountermeasureSerializer)
    @action(detail=True, methods=["post"])
    def verify(self, request, pk=None):
        """Mark it verified by one of its verifications (the case moves to 'Fix proven')."""
        cm = self.get_object()
        data = self.validated(s.CountermeasureVerifySerializer)
        return self.shown(cm_svc.countermeasure_verify(countermeasure=cm, by=request.user, **data))

    @extend_schema(request=s.CountermeasureRejectSerializer, responses=s.CountermeasureSerializer)
    @action(detail=True, methods=["post"])
    def reject(self, request, pk=None):
        """Mark it rejected (it did not help enough), saying why."""
        cm = self.get_object()
        data = self.validated(s.CountermeasureRejectSerializer)
        return self.shown(cm_svc.countermeasure_reject(countermeasure=cm, by=request.user, **data))


class VerificationViewSet(mixins.ListModelMixin, mixins.RetrieveModelMixin, ScopedViewSet):
    """Re-measurements that check a countermeasure, with the level after at each failing frequency."""

    model = m.Verification
    serializers = {"default": s.VerificationSerializer}
    filterset_class = filters.VerificationFilter
    ordering_fields = ["recorded_at"]

    def get_queryset(self):
        return (
            super()
            .get_queryset()
            .select_related("countermeasure", "recorded_by")
            .prefetch_related("results__failing_frequency")
        )

    @extend_schema(
        request=s.VerificationCreateSerializer, responses={201: s.VerificationSerializer}
    )
    def create(self, request):
        """Record levels measured after the change by hand, one per failing frequency."""
        data = self.validated(s.VerificationCreateSerializer)
        v = cm_svc.verification_record_levels(by=request.user, **data)
        return self.shown(v, code=status.HTTP_201_CREATED)

    @extend_schema(
        request=s.VerificationByScanSerializer, responses={201: s.VerificationSerializer}
    )
    @action(detail=False, methods=["post"], url_path="after-scan", parser_classes=[MultiPartParser])
    def after_scan(self, request):
        """Attach an after-scan to a countermeasure; its analysis fills in the levels after."""
        data = self.validated(s.VerificationByScanSerializer)
        v = cm_svc.verification_by_scan(by=request.user, **data)
        return self.shown(v, code=status.HTTP_201_CREATED)


# ----------------------------------------------------------------- audit log


class AuditEventViewSet(mixins.ListModelMixin, viewsets.GenericViewSet):
    """The audit log of the teams you lead (empty for everyone else), newest first."""

    serializer_class = s.AuditEventSerializer
    permission_classes = [IsAuthenticated]
    filterset_class = filters.AuditEventFilter
    ordering_fields = ["at"]

    def get_queryset(self):
        return audit_visible_to(self.request.user)
