"""Admin pages for every model: the lab's escape hatch, not its daily tool."""

from django.contrib import admin

from emicase import models


class MembershipInline(admin.TabularInline):
    model = models.Membership
    extra = 0
    autocomplete_fields = ["user"]


@admin.register(models.Team)
class TeamAdmin(admin.ModelAdmin):
    list_display = ["name", "guard_band_db", "frequency_tolerance_pct", "share_closed_cases"]
    prepopulated_fields = {"slug": ["name"]}
    search_fields = ["name"]
    inlines = [MembershipInline]


@admin.register(models.Membership)
class MembershipAdmin(admin.ModelAdmin):
    list_display = ["user", "team", "role", "joined_at"]
    list_filter = ["role", "team"]
    list_select_related = ["user", "team"]


@admin.register(models.Product)
class ProductAdmin(admin.ModelAdmin):
    list_display = ["name", "team", "created_at"]
    list_filter = ["team"]
    search_fields = ["name"]
    list_select_related = ["team"]


class EmissionSourceInline(admin.TabularInline):
    model = models.EmissionSource
    extra = 0


@admin.register(models.Revision)
class RevisionAdmin(admin.ModelAdmin):
    list_display = ["__str__", "hardware_label", "firmware_label", "created_at"]
    list_filter = ["product__team"]
    list_select_related = ["product"]
    inlines = [EmissionSourceInline]


@admin.register(models.EmissionSource)
class EmissionSourceAdmin(admin.ModelAdmin):
    list_display = ["name", "kind", "nominal_frequency_hz", "tolerance_hz", "revision"]
    list_filter = ["kind"]
    list_select_related = ["revision__product"]


ANALYSIS_READONLY = [
    "status",
    "status_changed_at",
    "attempts",
    "progress",
    "analysis_started_at",
    "analysis_finished_at",
    "engine_version",
    "error_kind",
    "error_text",
    "error_id",
    "domain",
    "unit",
    "file_size",
]


@admin.register(models.Scan)
class ScanAdmin(admin.ModelAdmin):
    list_display = ["id", "revision", "emission_kind", "limit_id", "measured_on", "status"]
    list_filter = ["status", "emission_kind", "setting"]
    list_select_related = ["revision__product"]
    readonly_fields = ANALYSIS_READONLY
    exclude = ["envelope"]


class FailingFrequencyInline(admin.TabularInline):
    model = models.FailingFrequency
    extra = 0
    fields = ["frequency_hz", "level", "limit_level", "unit", "detector", "confirmed", "is_open"]


@admin.register(models.Case)
class CaseAdmin(admin.ModelAdmin):
    list_display = ["id", "title", "product", "stage", "closure", "owner", "updated_at"]
    list_filter = ["stage", "closure", "product__team"]
    search_fields = ["title"]
    list_select_related = ["product", "owner"]
    inlines = [FailingFrequencyInline]
    raw_id_fields = ["fixed_by"]


@admin.register(models.FailingFrequency)
class FailingFrequencyAdmin(admin.ModelAdmin):
    list_display = ["case", "frequency_hz", "level", "limit_level", "confirmed", "is_open"]
    list_filter = ["is_open", "confirmed"]
    list_select_related = ["case"]


@admin.register(models.Capture)
class CaptureAdmin(admin.ModelAdmin):
    list_display = ["id", "case", "probe_kind", "tip", "location", "uploaded_by", "status"]
    list_filter = ["status", "probe_kind"]
    list_select_related = ["case", "uploaded_by"]
    readonly_fields = ANALYSIS_READONLY
    exclude = ["envelope"]


@admin.register(models.CaptureReading)
class CaptureReadingAdmin(admin.ModelAdmin):
    list_display = ["capture", "failing_frequency", "frequency_hz", "level"]
    list_select_related = ["capture", "failing_frequency"]


class VerificationInline(admin.TabularInline):
    model = models.Verification
    extra = 0
    raw_id_fields = ["after_scan"]


@admin.register(models.Countermeasure)
class CountermeasureAdmin(admin.ModelAdmin):
    list_display = ["id", "case", "kind", "status", "proposed_by", "proposed_at"]
    list_filter = ["status", "kind"]
    list_select_related = ["case", "proposed_by"]
    inlines = [VerificationInline]


class VerificationResultInline(admin.TabularInline):
    model = models.VerificationResult
    extra = 0


@admin.register(models.Verification)
class VerificationAdmin(admin.ModelAdmin):
    list_display = ["id", "countermeasure", "after_scan", "recorded_by", "recorded_at"]
    list_select_related = ["countermeasure", "recorded_by"]
    raw_id_fields = ["after_scan"]
    inlines = [VerificationResultInline]


@admin.register(models.VerificationResult)
class VerificationResultAdmin(admin.ModelAdmin):
    list_display = ["verification", "failing_frequency", "level_after"]
    list_select_related = ["verification", "failing_frequency"]


@admin.register(models.CaseEvent)
class CaseEventAdmin(admin.ModelAdmin):
    list_display = ["at", "case", "kind", "actor", "text"]
    list_filter = ["kind"]
    list_select_related = ["case", "actor"]


class ViewOnlyAdmin(admin.ModelAdmin):
    """Listed and shown, never added, changed or deleted here."""

    def has_add_permission(self, request):
        return False

    def has_change_permission(self, request, obj=None):
        return False

    def has_delete_permission(self, request, obj=None):
        return False


# The signature search index is derived data (services.search writes it,
# ``manage.py reindex_signatures`` rebuilds it): listed for inspection only, as
# an edit here would put an item's rows and its packed frequencies out of step.
@admin.register(models.SignatureItem)
class SignatureItemAdmin(ViewOnlyAdmin):
    list_display = ["id", "case", "source", "emission_kind", "peak_count", "indexed_at"]
    list_filter = ["source", "emission_kind"]
    raw_id_fields = ["case", "scan", "capture"]


@admin.register(models.SignatureRow)
class SignatureRowAdmin(ViewOnlyAdmin):
    list_display = ["id", "case", "role", "frequency_hz", "emission_kind", "outcome"]
    list_filter = ["role", "outcome", "emission_kind"]
    raw_id_fields = ["item", "case", "team", "product"]


# The audit log is append-only: the admin reads it, never adds, edits or deletes a line.
@admin.register(models.AuditEvent)
class AuditEventAdmin(ViewOnlyAdmin):
    list_display = ["at", "team", "actor_name", "verb", "text", "remote_addr"]
    list_filter = ["verb", "team"]
    list_select_related = ["team"]
