"""What the API reads and writes.

Output serializers (``XSerializer``) show stored rows. Input serializers
(``XCreateSerializer`` and the action ones) only validate a request at the
edge, with field-by-field messages; the view hands their ``validated_data`` to
a service, which makes the change. Nothing here saves a model.
"""

from __future__ import annotations

import re
import unicodedata

from django.contrib.auth import get_user_model
from drf_spectacular.utils import extend_schema_field
from rest_framework import serializers

from analysis.limits import list_limits
from emicase import models as m
from emicase.api.permissions import scoped

LIMITS = {line.id: line for line in list_limits()}
MAX_ID = 2**63 - 1  # the largest primary key the databases hold


class InMyTeams(serializers.PrimaryKeyRelatedField):
    """The id of an object in one of the requesting user's teams; any other id reads as missing."""

    def __init__(self, model: type, **kwargs):
        self.model = model
        kwargs.setdefault("queryset", model._default_manager.all())
        super().__init__(**kwargs)
        name = model._meta.verbose_name
        self.error_messages["does_not_exist"] = f"No {name} with id {{pk_value}} in your teams."
        self.error_messages["incorrect_type"] = f"Give the {name}'s id as a whole number."

    def get_queryset(self):
        return scoped(self.model, self.context["request"].user, super().get_queryset())


def _username(field: str = "username") -> serializers.SlugRelatedField:
    return serializers.SlugRelatedField(read_only=True, slug_field=field)


# ----------------------------------------------------------------- teams, products, revisions


class TeamSerializer(serializers.ModelSerializer):
    role = serializers.CharField(
        read_only=True, help_text="Your role in this team: lead, engineer or viewer."
    )

    class Meta:
        model = m.Team
        fields = [
            "id",
            "name",
            "slug",
            "role",
            "guard_band_db",
            "frequency_tolerance_pct",
            "share_closed_cases",
        ]


class ProductSerializer(serializers.ModelSerializer):
    url = serializers.HyperlinkedIdentityField(view_name="api:product-detail")

    class Meta:
        model = m.Product
        fields = ["id", "url", "team", "name", "description", "created_at"]


class ProductCreateSerializer(serializers.ModelSerializer):
    team = InMyTeams(m.Team)

    class Meta:
        model = m.Product
        fields = ["team", "name", "description"]
        validators: list = []  # the name check below says it in words

    def validate(self, data: dict) -> dict:
        if m.Product.objects.filter(team=data["team"], name=data["name"].strip()).exists():
            raise serializers.ValidationError(
                {"name": f"{data['team']} already has a product named {data['name']!r}."}
            )
        return data


class SourceInRevisionSerializer(serializers.ModelSerializer):
    class Meta:
        model = m.EmissionSource
        fields = ["id", "name", "kind", "nominal_frequency_hz", "tolerance_hz"]


class SourceSerializer(serializers.ModelSerializer):
    url = serializers.HyperlinkedIdentityField(view_name="api:source-detail")

    class Meta:
        model = m.EmissionSource
        fields = ["id", "url", "revision", "name", "kind", "nominal_frequency_hz", "tolerance_hz"]


class SourceCreateSerializer(serializers.ModelSerializer):
    revision = InMyTeams(m.Revision)
    kind = serializers.ChoiceField(
        choices=m.EmissionSource.Kind.choices, default=m.EmissionSource.Kind.CLOCK
    )
    nominal_frequency_hz = serializers.FloatField(help_text="Nominal frequency in Hz (above 0).")
    tolerance_hz = serializers.FloatField(
        min_value=0, help_text="How far the real frequency may lie from nominal (Hz, 0 or more)."
    )

    class Meta:
        model = m.EmissionSource
        fields = ["revision", "name", "kind", "nominal_frequency_hz", "tolerance_hz"]
        validators: list = []  # the name check below says it in words

    def validate(self, data: dict) -> dict:
        revision = data.get("revision") or getattr(self.instance, "revision", None)
        name = data.get("name", "").strip()
        others = m.EmissionSource.objects.filter(revision=revision, name=name)
        if self.instance is not None:
            others = others.exclude(pk=self.instance.pk)
        if name and revision is not None and others.exists():
            raise serializers.ValidationError(
                {"name": f"This revision already has a source named {name!r}."}
            )
        return data

    def validate_nominal_frequency_hz(self, value: float) -> float:
        if value <= 0:
            raise serializers.ValidationError("A source's frequency must be above 0 Hz.")
        return value


class SourceUpdateSerializer(SourceCreateSerializer):
    class Meta(SourceCreateSerializer.Meta):
        fields = ["name", "kind", "nominal_frequency_hz", "tolerance_hz"]


class RevisionSerializer(serializers.ModelSerializer):
    url = serializers.HyperlinkedIdentityField(view_name="api:revision-detail")
    sources = SourceInRevisionSerializer(
        many=True, read_only=True, help_text="The known emission sources."
    )

    class Meta:
        model = m.Revision
        fields = [
            "id",
            "url",
            "product",
            "hardware_label",
            "firmware_label",
            "notes",
            "created_at",
            "sources",
        ]


class RevisionCreateSerializer(serializers.ModelSerializer):
    product = InMyTeams(m.Product)
    copy_sources_from = InMyTeams(
        m.Revision,
        required=False,
        allow_null=True,
        help_text="Copy the known sources of this earlier revision of the same product.",
    )

    class Meta:
        model = m.Revision
        fields = ["product", "hardware_label", "firmware_label", "notes", "copy_sources_from"]
        validators: list = []  # the label check below says it in words

    def validate(self, data: dict) -> dict:
        labels = dict(
            hardware_label=data["hardware_label"].strip(),
            firmware_label=data.get("firmware_label", "").strip(),
        )
        if m.Revision.objects.filter(product=data["product"], **labels).exists():
            raise serializers.ValidationError(
                {
                    "hardware_label": f"{data['product']} already has revision {labels['hardware_label']!r}"
                    f"{' with firmware ' + repr(labels['firmware_label']) if labels['firmware_label'] else ''}."
                }
            )
        source = data.get("copy_sources_from")
        if source is not None and source.product_id != data["product"].pk:
            raise serializers.ValidationError(
                {"copy_sources_from": "Copy sources only from a revision of the same product."}
            )
        return data


# ----------------------------------------------------------------- cases


class FailingFrequencySerializer(serializers.ModelSerializer):
    url = serializers.HyperlinkedIdentityField(view_name="api:failingfrequency-detail")
    margin_db = serializers.FloatField(
        read_only=True, help_text="limit_level − level; negative is over the limit."
    )

    class Meta:
        model = m.FailingFrequency
        fields = [
            "id",
            "url",
            "case",
            "scan",
            "frequency_hz",
            "level",
            "limit_level",
            "margin_db",
            "unit",
            "detector",
            "polarisation",
            "mains_line",
            "confirmed",
            "is_open",
            "created_at",
        ]


def _positive_frequency(value: float) -> float:
    if value <= 0:
        raise serializers.ValidationError("A frequency must be above 0 Hz.")
    return value


class FailingFrequencyCreateSerializer(serializers.ModelSerializer):
    case = InMyTeams(m.Case)
    frequency_hz = serializers.FloatField(validators=[_positive_frequency], help_text="In Hz.")

    class Meta:
        model = m.FailingFrequency
        fields = [
            "case",
            "frequency_hz",
            "level",
            "limit_level",
            "unit",
            "detector",
            "polarisation",
            "mains_line",
        ]


class FailingFrequencyUpdateSerializer(serializers.ModelSerializer):
    frequency_hz = serializers.FloatField(
        validators=[_positive_frequency], required=False, help_text="In Hz."
    )

    class Meta:
        model = m.FailingFrequency
        fields = ["frequency_hz", "level", "limit_level", "is_open", "confirmed"]
        extra_kwargs = {name: {"required": False} for name in fields}


class CaseSerializer(serializers.ModelSerializer):
    url = serializers.HyperlinkedIdentityField(view_name="api:case-detail")
    owner = _username()
    opened_by = _username()
    worst_margin_db = serializers.FloatField(
        read_only=True,
        allow_null=True,
        help_text="The smallest margin (dB) over the case's failing frequencies; negative is over the limit.",
    )
    timeline_url = serializers.HyperlinkedIdentityField(
        view_name="api:case-timeline", lookup_url_kwarg="case_id"
    )
    comments_url = serializers.HyperlinkedIdentityField(
        view_name="api:case-comments", lookup_url_kwarg="case_id"
    )

    class Meta:
        model = m.Case
        fields = [
            "id",
            "url",
            "product",
            "title",
            "stage",
            "closure",
            "closure_reason",
            "fixed_by",
            "owner",
            "opened_by",
            "opened_at",
            "closed_at",
            "updated_at",
            "worst_margin_db",
            "timeline_url",
            "comments_url",
        ]


class CaseDetailSerializer(CaseSerializer):
    failing_frequencies = FailingFrequencySerializer(many=True, read_only=True)

    class Meta(CaseSerializer.Meta):
        fields = [*CaseSerializer.Meta.fields, "failing_frequencies"]


class CaseCreateSerializer(serializers.Serializer):
    product = InMyTeams(m.Product)
    title = serializers.CharField(max_length=200, help_text="e.g. 'Radiated fail at 75 MHz'.")
    owner = serializers.CharField(
        max_length=150,
        required=False,
        help_text="Username of a member of the product's team (default: you).",
    )

    def validate(self, data: dict) -> dict:
        username = data.pop("owner", None)
        if username:
            owner = (
                get_user_model()
                .objects.filter(username=username, memberships__team_id=data["product"].team_id)
                .first()
            )
            if owner is None:
                raise serializers.ValidationError(
                    {"owner": f"{username} is not a member of the product's team."}
                )
            data["owner"] = owner
        return data


class CaseMoveSerializer(serializers.Serializer):
    to = serializers.ChoiceField(
        choices=[c for c in m.Case.Stage.choices if c[0] != m.Case.Stage.CLOSED],
        help_text="The stage to move to. Closing has its own action; 'proven' follows a verified countermeasure.",
    )
    note = serializers.CharField(required=False, allow_blank=True, default="", max_length=2000)


class CaseCloseSerializer(serializers.Serializer):
    closure = serializers.ChoiceField(choices=[c for c in m.Case.Closure.choices if c[0]])
    countermeasure = InMyTeams(
        m.Countermeasure,
        required=False,
        allow_null=True,
        help_text="Closing as fixed: the verified countermeasure that fixed it.",
    )
    reason = serializers.CharField(
        required=False,
        allow_blank=True,
        default="",
        max_length=4000,
        help_text="Closing as waived: why the remaining emissions are accepted.",
    )


class CaseReopenSerializer(serializers.Serializer):
    reason = serializers.CharField(max_length=4000, help_text="Why the case is reopened.")


class FrequenciesConfirmSerializer(serializers.Serializer):
    keep = serializers.ListField(
        child=serializers.IntegerField(min_value=1, max_value=MAX_ID),
        allow_empty=True,
        help_text="Ids of the proposed failing frequencies to confirm; the case's other proposals are dropped.",
    )


class EventSerializer(serializers.ModelSerializer):
    actor = _username()
    data = serializers.JSONField(
        read_only=True, help_text="Details of the event (ids it refers to, old and new stage)."
    )

    class Meta:
        model = m.CaseEvent
        fields = ["id", "kind", "actor", "at", "text", "data"]


class CommentSerializer(serializers.ModelSerializer):
    author = serializers.SlugRelatedField(source="actor", read_only=True, slug_field="username")

    class Meta:
        model = m.CaseEvent
        fields = ["id", "case", "author", "at", "text"]


class CommentCreateSerializer(serializers.Serializer):
    text = serializers.CharField(max_length=10000)


# ----------------------------------------------------------------- analysed uploads


class PeakSerializer(serializers.Serializer):
    frequency_hz = serializers.FloatField()
    level = serializers.FloatField()
    prominence_db = serializers.FloatField()
    width_hz = serializers.FloatField()


class FamilySerializer(serializers.Serializer):
    fundamental_hz = serializers.FloatField()
    orders = serializers.ListField(child=serializers.IntegerField())
    odd_only = serializers.BooleanField()
    spread_spectrum = serializers.BooleanField()


class AttributionTermSerializer(serializers.Serializer):
    source = serializers.CharField()
    order = serializers.IntegerField()


class AttributionSerializer(serializers.Serializer):
    frequency_hz = serializers.FloatField()
    terms = AttributionTermSerializer(many=True)
    error_hz = serializers.FloatField()


class ExceedanceSerializer(serializers.Serializer):
    frequency_hz = serializers.FloatField()
    level = serializers.FloatField()
    limit = serializers.FloatField()
    margin_db = serializers.FloatField()


class JudgedLimitSerializer(serializers.Serializer):
    id = serializers.CharField()
    title = serializers.CharField()
    unit = serializers.CharField()
    detector = serializers.CharField()
    distance_m = serializers.FloatField(allow_null=True)


class ResultsSerializer(serializers.Serializer):
    """The engine's findings (present once the analysis is done)."""

    points = serializers.IntegerField(allow_null=True)
    frequency_range_hz = serializers.ListField(child=serializers.FloatField())
    rbw_hz = serializers.FloatField(allow_null=True)
    peaks = PeakSerializer(many=True)
    families = FamilySerializer(many=True)
    attributions = AttributionSerializer(many=True)
    warnings = serializers.ListField(child=serializers.CharField())
    limit = JudgedLimitSerializer(
        allow_null=True, help_text="The limit line judged against (scans only)."
    )
    exceedances = ExceedanceSerializer(
        many=True,
        allow_null=True,
        help_text="Peaks over or within the guard band of the limit (scans only).",
    )


def results_of(item: m.AnalysedUpload) -> dict | None:
    """The stored results in the shape of ResultsSerializer, or None before the analysis is done."""
    if item.status != m.AnalysisStatus.DONE:
        return None
    r = item.results or {}
    return {
        "points": r.get("points"),
        "frequency_range_hz": r.get("frequency_range_hz", []),
        "rbw_hz": r.get("rbw_hz"),
        "peaks": r.get("peaks", []),
        "families": r.get("families", []),
        "attributions": r.get("attributions", []),
        "warnings": r.get("warnings", []),
        "limit": r.get("limit"),
        "exceedances": r.get("exceedances"),
    }


UPLOAD_FIELDS = [
    "id",
    "url",
    "status",
    "progress",
    "error_kind",
    "error_text",
    "error_id",
    "original_name",
    "file_size",
    "uploaded_by",
    "uploaded_at",
    "analysis_started_at",
    "analysis_finished_at",
    "engine_version",
    "domain",
    "unit",
    "envelope_url",
]


class ScanSerializer(serializers.ModelSerializer):
    url = serializers.HyperlinkedIdentityField(view_name="api:scan-detail")
    envelope_url = serializers.HyperlinkedIdentityField(view_name="api:scan-envelope")
    uploaded_by = _username()
    product = serializers.IntegerField(source="revision.product_id", read_only=True)

    class Meta:
        model = m.Scan
        fields = [
            *UPLOAD_FIELDS,
            "product",
            "revision",
            "case",
            "emission_kind",
            "limit_id",
            "detector",
            "distance_m",
            "polarisation",
            "mains_line",
            "setting",
            "lab",
            "measured_on",
            "operator",
            "frequency_unit",
            "level_unit",
            "opens_case_titled",
        ]


class ScanDetailSerializer(ScanSerializer):
    results = serializers.SerializerMethodField()

    class Meta(ScanSerializer.Meta):
        fields = [*ScanSerializer.Meta.fields, "results"]

    @extend_schema_field(ResultsSerializer(allow_null=True))
    def get_results(self, scan: m.Scan) -> dict | None:
        return results_of(scan)


class CaptureReadingSerializer(serializers.ModelSerializer):
    class Meta:
        model = m.CaptureReading
        fields = ["failing_frequency", "frequency_hz", "level"]


class CaptureSerializer(serializers.ModelSerializer):
    url = serializers.HyperlinkedIdentityField(view_name="api:capture-detail")
    envelope_url = serializers.HyperlinkedIdentityField(view_name="api:capture-envelope")
    uploaded_by = _username()

    class Meta:
        model = m.Capture
        fields = [
            *UPLOAD_FIELDS,
            "case",
            "revision",
            "countermeasure",
            "declared_domain",
            "captured_at",
            "probe_kind",
            "tip",
            "board_side",
            "location",
            "x_mm",
            "y_mm",
            "notes",
        ]


class CaptureDetailSerializer(CaptureSerializer):
    results = serializers.SerializerMethodField()
    readings = CaptureReadingSerializer(
        many=True,
        read_only=True,
        help_text="The highest level within tolerance of each open failing frequency (null: nothing there).",
    )

    class Meta(CaptureSerializer.Meta):
        fields = [*CaptureSerializer.Meta.fields, "results", "readings"]

    @extend_schema_field(ResultsSerializer(allow_null=True))
    def get_results(self, capture: m.Capture) -> dict | None:
        return results_of(capture)


class EnvelopeSerializer(serializers.Serializer):
    id = serializers.IntegerField()
    unit = serializers.CharField()
    domain = serializers.CharField()
    frequency_hz = serializers.ListField(child=serializers.FloatField())
    level = serializers.ListField(
        child=serializers.FloatField(), help_text="In ``unit``, one per frequency."
    )


_CONTROL = re.compile(r"[\x00-\x1f\x7f]")


class TraceFileField(serializers.FileField):
    """An uploaded text trace; its name is kept for display only, cleaned of control characters."""

    def __init__(self, **kwargs):
        kwargs.setdefault("max_length", 255)
        # An empty file is refused by the upload service, in words that name the file.
        kwargs.setdefault("allow_empty_file", True)
        kwargs.setdefault(
            "help_text", "The trace file as exported by the instrument (text: CSV or similar)."
        )
        super().__init__(**kwargs)

    def to_internal_value(self, data):
        file = super().to_internal_value(data)
        file.name = _CONTROL.sub("_", unicodedata.normalize("NFC", file.name)).strip() or "upload"
        return file


class ScanMeasurementSerializer(serializers.ModelSerializer):
    """How a scan was measured: shared by scan uploads and after-scans."""

    file = TraceFileField()
    limit_id = serializers.ChoiceField(
        choices=[(line.id, line.title) for line in LIMITS.values()],
        help_text="A built-in limit line.",
    )
    distance_m = serializers.FloatField(
        required=False, allow_null=True, help_text="Antenna distance, radiated only."
    )

    class Meta:
        model = m.Scan
        fields = [
            "file",
            "emission_kind",
            "limit_id",
            "detector",
            "distance_m",
            "polarisation",
            "mains_line",
            "setting",
            "lab",
            "measured_on",
            "operator",
            "frequency_unit",
            "level_unit",
        ]

    def validate(self, data: dict) -> dict:
        kind = data.get("emission_kind")
        errors = {}
        if kind == m.Scan.EmissionKind.CONDUCTED:
            if data.get("distance_m") is not None:
                errors["distance_m"] = "A conducted scan has no antenna distance."
            if data.get("polarisation"):
                errors["polarisation"] = "A conducted scan has no polarisation."
        elif kind == m.Scan.EmissionKind.RADIATED and data.get("mains_line"):
            errors["mains_line"] = "A radiated scan has no mains line; that is for conducted scans."
        distance = data.get("distance_m")
        if distance is not None and distance <= 0:
            errors["distance_m"] = "The antenna distance must be above 0 m."
        line = LIMITS.get(data.get("limit_id"))
        if line is not None and kind and line.kind != kind:
            errors["limit_id"] = f"{line.id} is a {line.kind} limit; this scan is {kind}."
        if errors:
            raise serializers.ValidationError(errors)
        return data


class ScanUploadSerializer(ScanMeasurementSerializer):
    revision = InMyTeams(m.Revision)
    case = InMyTeams(
        m.Case, required=False, allow_null=True, help_text="The case this scan belongs to, if any."
    )

    class Meta(ScanMeasurementSerializer.Meta):
        fields = ["revision", "case", *ScanMeasurementSerializer.Meta.fields, "opens_case_titled"]


class CaptureUploadSerializer(serializers.ModelSerializer):
    case = InMyTeams(m.Case)
    revision = InMyTeams(
        m.Revision,
        required=False,
        allow_null=True,
        help_text="Default: the newest revision of the case's product.",
    )
    countermeasure = InMyTeams(
        m.Countermeasure,
        required=False,
        allow_null=True,
        help_text="Set when this capture re-measures a spot after a countermeasure.",
    )
    file = TraceFileField()

    class Meta:
        model = m.Capture
        fields = [
            "case",
            "revision",
            "countermeasure",
            "file",
            "declared_domain",
            "captured_at",
            "probe_kind",
            "tip",
            "board_side",
            "location",
            "x_mm",
            "y_mm",
            "notes",
        ]

    def validate(self, data: dict) -> dict:
        errors = {}
        if (data.get("x_mm") is None) != (data.get("y_mm") is None):
            errors["y_mm" if data.get("y_mm") is None else "x_mm"] = (
                "Give both x_mm and y_mm, or neither."
            )
        cm = data.get("countermeasure")
        if cm is not None and cm.case_id != data["case"].pk:
            errors["countermeasure"] = "That countermeasure belongs to another case."
        if errors:
            raise serializers.ValidationError(errors)
        return data


# ----------------------------------------------------------------- countermeasures and verifications


class CountermeasureSerializer(serializers.ModelSerializer):
    url = serializers.HyperlinkedIdentityField(view_name="api:countermeasure-detail")
    proposed_by = _username()

    class Meta:
        model = m.Countermeasure
        fields = [
            "id",
            "url",
            "case",
            "revision",
            "kind",
            "description",
            "proposed_by",
            "proposed_at",
            "status",
            "verified_reason",
        ]


class CountermeasureCreateSerializer(serializers.ModelSerializer):
    case = InMyTeams(m.Case)
    revision = InMyTeams(m.Revision, help_text="The revision the change is made on.")

    class Meta:
        model = m.Countermeasure
        fields = ["case", "revision", "kind", "description"]


class CountermeasureVerifySerializer(serializers.Serializer):
    verification = InMyTeams(
        m.Verification, help_text="The verification that proves the countermeasure."
    )
    reason = serializers.CharField(
        required=False,
        allow_blank=True,
        default="",
        max_length=4000,
        help_text="Needed when some failing frequency stays inside the team's guard band.",
    )


class CountermeasureRejectSerializer(serializers.Serializer):
    reason = serializers.CharField(required=False, allow_blank=True, default="", max_length=4000)


class VerificationResultSerializer(serializers.ModelSerializer):
    frequency_hz = serializers.FloatField(source="failing_frequency.frequency_hz", read_only=True)
    change_db = serializers.FloatField(
        read_only=True,
        allow_null=True,
        help_text="level_after − the failing level; negative is quieter.",
    )
    new_margin_db = serializers.FloatField(
        read_only=True, allow_null=True, help_text="limit − level_after."
    )

    class Meta:
        model = m.VerificationResult
        fields = ["failing_frequency", "frequency_hz", "level_after", "change_db", "new_margin_db"]


class VerificationSerializer(serializers.ModelSerializer):
    url = serializers.HyperlinkedIdentityField(view_name="api:verification-detail")
    case = serializers.IntegerField(source="countermeasure.case_id", read_only=True)
    recorded_by = _username()
    results = VerificationResultSerializer(many=True, read_only=True)

    class Meta:
        model = m.Verification
        fields = [
            "id",
            "url",
            "countermeasure",
            "case",
            "after_scan",
            "recorded_by",
            "recorded_at",
            "note",
            "results",
        ]


class LevelAfterSerializer(serializers.Serializer):
    failing_frequency = serializers.IntegerField(min_value=1, max_value=MAX_ID)
    level_after = serializers.FloatField(
        allow_null=True, help_text="The level measured after the change (null: not measured)."
    )


class VerificationCreateSerializer(serializers.Serializer):
    countermeasure = InMyTeams(m.Countermeasure)
    levels_after = LevelAfterSerializer(many=True, allow_empty=False)
    note = serializers.CharField(required=False, allow_blank=True, default="", max_length=4000)

    def validate_levels_after(self, rows: list[dict]) -> dict[int, float | None]:
        ids = [row["failing_frequency"] for row in rows]
        if len(ids) != len(set(ids)):
            raise serializers.ValidationError("Give each failing frequency once.")
        return {row["failing_frequency"]: row["level_after"] for row in rows}


class VerificationByScanSerializer(ScanMeasurementSerializer):
    countermeasure = InMyTeams(m.Countermeasure)

    class Meta(ScanMeasurementSerializer.Meta):
        fields = ["countermeasure", *ScanMeasurementSerializer.Meta.fields]


# ----------------------------------------------------------------- reference data


class LimitSerializer(serializers.Serializer):
    id = serializers.CharField()
    title = serializers.CharField()
    kind = serializers.CharField(help_text="radiated or conducted")
    detector = serializers.CharField()
    unit = serializers.CharField()
    distance_m = serializers.FloatField(allow_null=True)
    source = serializers.CharField(help_text="Where the values come from.")


class AuditEventSerializer(serializers.ModelSerializer):
    actor = serializers.CharField(source="actor_name", read_only=True, help_text="The account name at the time.")
    team = serializers.SlugRelatedField(slug_field="slug", read_only=True)

    class Meta:
        model = m.AuditEvent
        fields = ["id", "team", "at", "actor", "verb", "object_type", "object_id", "text", "remote_addr"]
