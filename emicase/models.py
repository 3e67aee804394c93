"""emicase's domain model.

Measurements and analysis outputs are stored; anything derivable from them
(margins, changes in dB, worst margins) is computed when read — see the
``margin_db`` properties and the annotations in ``selectors.py``.

The lifecycle of a case (stage names are our own):

    logged → hunting → trial → proven → closed (fixed | waived)

Rules that span rows (closing as fixed needs a verified countermeasure of the
same case) live in ``services``; rules within one row are database
constraints, so no code path can break them.
"""

from __future__ import annotations

import uuid
from pathlib import PurePath

from django.conf import settings
from django.db import models
from django.db.models import Q
from django.utils import timezone

# ----------------------------------------------------------------- teams


class Team(models.Model):
    name = models.CharField(max_length=120, unique=True)
    slug = models.SlugField(max_length=60, unique=True)
    guard_band_db = models.FloatField(
        default=3.0,
        help_text="A failing frequency counts as fixed only with at least this much margin (dB).",
    )
    frequency_tolerance_pct = models.FloatField(
        default=0.5,
        help_text="How far (in % of frequency) a capture's peak may lie from a failing frequency and still be read there.",
    )
    share_closed_cases = models.BooleanField(
        default=False,
        help_text="Let every team of this installation find this team's closed cases in the signature search.",
    )
    created_at = models.DateTimeField(default=timezone.now)

    class Meta:
        ordering = ["name"]
        constraints = [
            models.CheckConstraint(condition=Q(guard_band_db__gte=0), name="team_guard_band_not_negative"),
            models.CheckConstraint(
                condition=Q(frequency_tolerance_pct__gt=0) & Q(frequency_tolerance_pct__lte=20),
                name="team_tolerance_in_range",
            ),
        ]

    def __str__(self) -> str:
        return self.name


class Membership(models.Model):
    class Role(models.TextChoices):
        LEAD = "lead", "Team lead"
        ENGINEER = "engineer", "Engineer"
        VIEWER = "viewer", "Viewer"

    team = models.ForeignKey(Team, on_delete=models.CASCADE, related_name="memberships")
    user = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.CASCADE, related_name="memberships")
    role = models.CharField(max_length=10, choices=Role.choices, default=Role.ENGINEER)
    joined_at = models.DateTimeField(default=timezone.now)

    class Meta:
        constraints = [models.UniqueConstraint(fields=["team", "user"], name="one_membership_per_team")]

    def __str__(self) -> str:
        return f"{self.user} in {self.team} ({self.role})"


# ----------------------------------------------------------------- products


class Product(models.Model):
    team = models.ForeignKey(Team, on_delete=models.PROTECT, related_name="products")
    name = models.CharField(max_length=120)
    description = models.TextField(blank=True)
    created_at = models.DateTimeField(default=timezone.now)

    class Meta:
        ordering = ["name"]
        constraints = [models.UniqueConstraint(fields=["team", "name"], name="product_name_unique_in_team")]

    def __str__(self) -> str:
        return self.name


class Revision(models.Model):
    product = models.ForeignKey(Product, on_delete=models.PROTECT, related_name="revisions")
    hardware_label = models.CharField(max_length=40, help_text="e.g. 'A', 'rev 2.1'")
    firmware_label = models.CharField(max_length=40, blank=True, help_text="e.g. '1.4.0'")
    notes = models.TextField(blank=True)
    created_at = models.DateTimeField(default=timezone.now)

    class Meta:
        ordering = ["product", "created_at", "id"]
        constraints = [
            models.UniqueConstraint(
                fields=["product", "hardware_label", "firmware_label"], name="revision_labels_unique"
            )
        ]

    def __str__(self) -> str:
        fw = f" / fw {self.firmware_label}" if self.firmware_label else ""
        return f"{self.product} rev {self.hardware_label}{fw}"


class EmissionSource(models.Model):
    """Something on the board known to emit: a clock, a converter, a bus."""

    class Kind(models.TextChoices):
        CLOCK = "clock", "Clock or crystal"
        SWITCHING = "switching", "Switching converter"
        DATA_BUS = "data_bus", "Data bus"
        RADIO = "radio", "Radio"
        OTHER = "other", "Other"

    revision = models.ForeignKey(Revision, on_delete=models.CASCADE, related_name="sources")
    name = models.CharField(max_length=80, help_text="e.g. 'MCU crystal', 'buck U7'")
    kind = models.CharField(max_length=12, choices=Kind.choices, default=Kind.CLOCK)
    nominal_frequency_hz = models.FloatField()
    tolerance_hz = models.FloatField(help_text="How far the real frequency may lie from nominal (Hz).")

    class Meta:
        ordering = ["nominal_frequency_hz"]
        constraints = [
            models.UniqueConstraint(fields=["revision", "name"], name="source_name_unique_in_revision"),
            models.CheckConstraint(condition=Q(nominal_frequency_hz__gt=0), name="source_frequency_positive"),
            models.CheckConstraint(condition=Q(tolerance_hz__gte=0), name="source_tolerance_not_negative"),
        ]

    def __str__(self) -> str:
        return f"{self.name} ({self.nominal_frequency_hz / 1e6:g} MHz)"


# ----------------------------------------------------------------- analysed uploads


def upload_path(instance: models.Model, filename: str) -> str:
    """Generated names only: a user-supplied name never becomes a path."""
    suffix = PurePath(filename).suffix.lower()[:10]
    if not suffix.replace(".", "").isalnum():
        suffix = ""
    return f"uploads/{type(instance).__name__.lower()}/{uuid.uuid4().hex}{suffix}"


class AnalysisStatus(models.TextChoices):
    QUEUED = "queued", "Queued"
    RUNNING = "running", "Running"
    DONE = "done", "Done"
    FAILED = "failed", "Failed"


class ErrorKind(models.TextChoices):
    NONE = "", "—"
    INPUT = "input", "Problem in the file"
    INTERNAL = "internal", "Internal error"


class Domain(models.TextChoices):
    AUTO = "auto", "Decide from the file"
    SPECTRUM = "spectrum", "Spectrum"
    TIME = "time", "Time record"


class AnalysedUpload(models.Model):
    """An uploaded trace file and what the background analysis made of it.

    ``status`` is the truth about the work: the worker claims a row by moving
    it from queued to running with a conditional UPDATE, so two workers never
    analyse the same row, and a sweeper re-enqueues rows stuck too long.
    """

    file = models.FileField(upload_to=upload_path, max_length=200)
    original_name = models.CharField(max_length=255)
    file_size = models.BigIntegerField(default=0)
    declared_domain = models.CharField(max_length=8, choices=Domain.choices, default=Domain.AUTO)
    uploaded_by = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT, related_name="+")
    uploaded_at = models.DateTimeField(default=timezone.now)

    status = models.CharField(
        max_length=8, choices=AnalysisStatus.choices, default=AnalysisStatus.QUEUED, db_index=True
    )
    status_changed_at = models.DateTimeField(default=timezone.now)
    attempts = models.PositiveIntegerField(default=0)
    # The task message working on the row: a retry of the same message may
    # resume a row it left 'running' (say the database went away mid-task).
    claim_token = models.CharField(max_length=64, blank=True)
    progress = models.FloatField(default=0.0)
    analysis_started_at = models.DateTimeField(null=True, blank=True)
    analysis_finished_at = models.DateTimeField(null=True, blank=True)
    engine_version = models.CharField(max_length=20, blank=True)
    error_kind = models.CharField(max_length=8, choices=ErrorKind.choices, default=ErrorKind.NONE, blank=True)
    error_text = models.TextField(blank=True)
    error_id = models.CharField(max_length=32, blank=True)

    # What the engine found. ``domain`` is what the file turned out to hold;
    # ``results`` holds peaks, families, attributions and exceedances in the
    # engine's JSON form; ``envelope`` the decimated plotting points, kept apart
    # so lists never load it.
    domain = models.CharField(max_length=8, blank=True)
    unit = models.CharField(max_length=8, blank=True)
    results = models.JSONField(default=dict, blank=True)
    envelope = models.JSONField(default=dict, blank=True)

    # Chosen by the client that posted the file (the bench uploader sends a
    # hash of the file and its case), so a retried upload finds its first
    # attempt instead of storing the file twice. Unique per uploader and
    # case (captures) or revision (scans) when given.
    idempotency_key = models.CharField(max_length=64, blank=True)

    class Meta:
        abstract = True

    @property
    def is_finished(self) -> bool:
        return self.status in (AnalysisStatus.DONE, AnalysisStatus.FAILED)


class Case(models.Model):
    """One emissions problem of one product, from first fail to closure."""

    class Stage(models.TextChoices):
        LOGGED = "logged", "Logged"
        HUNTING = "hunting", "Hunting the source"
        TRIAL = "trial", "Fix on trial"
        PROVEN = "proven", "Fix proven"
        CLOSED = "closed", "Closed"

    class Closure(models.TextChoices):
        OPEN = "", "—"
        FIXED = "fixed", "Fixed"
        WAIVED = "waived", "Accepted / waived"

    product = models.ForeignKey(Product, on_delete=models.PROTECT, related_name="cases")
    title = models.CharField(max_length=200)
    stage = models.CharField(max_length=8, choices=Stage.choices, default=Stage.LOGGED, db_index=True)
    closure = models.CharField(max_length=8, choices=Closure.choices, default=Closure.OPEN, blank=True)
    closure_reason = models.TextField(blank=True)
    fixed_by = models.ForeignKey(
        "Countermeasure", on_delete=models.PROTECT, null=True, blank=True, related_name="+"
    )
    owner = models.ForeignKey(
        settings.AUTH_USER_MODEL, on_delete=models.PROTECT, null=True, blank=True, related_name="owned_cases"
    )
    opened_by = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT, related_name="+")
    opened_at = models.DateTimeField(default=timezone.now)
    closed_at = models.DateTimeField(null=True, blank=True)
    updated_at = models.DateTimeField(default=timezone.now, db_index=True)

    class Meta:
        ordering = ["-updated_at"]
        constraints = [
            # Closed ⇔ an outcome is recorded, with when.
            models.CheckConstraint(
                condition=(Q(stage="closed") & ~Q(closure="") & Q(closed_at__isnull=False))
                | (~Q(stage="closed") & Q(closure="") & Q(closed_at__isnull=True)),
                name="case_closed_iff_outcome",
            ),
            # Fixed names the countermeasure that did it; waived says why.
            models.CheckConstraint(
                condition=~Q(closure="fixed") | Q(fixed_by__isnull=False), name="case_fixed_names_countermeasure"
            ),
            models.CheckConstraint(
                condition=~Q(closure="waived") | ~Q(closure_reason=""), name="case_waiver_has_reason"
            ),
        ]

    def __str__(self) -> str:
        return f"#{self.pk} {self.title}"

    @property
    def team_id(self) -> int:
        return self.product.team_id

    @property
    def is_closed(self) -> bool:
        return self.stage == self.Stage.CLOSED


class Scan(AnalysedUpload):
    """A compliance or pre-compliance emissions measurement of a revision."""

    class EmissionKind(models.TextChoices):
        RADIATED = "radiated", "Radiated"
        CONDUCTED = "conducted", "Conducted"

    class Detector(models.TextChoices):
        PEAK = "peak", "Peak"
        QUASI_PEAK = "quasi-peak", "Quasi-peak"
        AVERAGE = "average", "Average"

    class Polarisation(models.TextChoices):
        NONE = "", "—"
        HORIZONTAL = "horizontal", "Horizontal"
        VERTICAL = "vertical", "Vertical"

    class MainsLine(models.TextChoices):
        NONE = "", "—"
        LINE = "L1", "Line (L1)"
        NEUTRAL = "N", "Neutral (N)"

    class Setting(models.TextChoices):
        COMPLIANCE = "compliance", "Accredited test house"
        PRE_COMPLIANCE = "pre", "Pre-compliance (in-house)"

    revision = models.ForeignKey(Revision, on_delete=models.PROTECT, related_name="scans")
    case = models.ForeignKey(Case, on_delete=models.CASCADE, null=True, blank=True, related_name="scans")
    emission_kind = models.CharField(max_length=10, choices=EmissionKind.choices)
    limit_id = models.CharField(max_length=40, help_text="A built-in limit line, e.g. cispr32-b-rad-10m")
    detector = models.CharField(max_length=10, choices=Detector.choices, default=Detector.QUASI_PEAK)
    distance_m = models.FloatField(null=True, blank=True, help_text="Antenna distance, radiated only")
    polarisation = models.CharField(max_length=10, choices=Polarisation.choices, blank=True)
    mains_line = models.CharField(max_length=2, choices=MainsLine.choices, blank=True)
    setting = models.CharField(max_length=10, choices=Setting.choices, default=Setting.PRE_COMPLIANCE)
    lab = models.CharField(max_length=120, blank=True)
    measured_on = models.DateField()
    operator = models.CharField(max_length=120, blank=True, help_text="Who ran the measurement")
    frequency_unit = models.CharField(max_length=4, blank=True, help_text="Only for files without a header")
    level_unit = models.CharField(max_length=8, blank=True, help_text="Only for files without a header")
    # A failing test result logged before any case exists: once analysed, a
    # case with this title opens with the proposed failing frequencies.
    opens_case_titled = models.CharField(max_length=200, blank=True)

    class Meta:
        ordering = ["-measured_on", "-id"]
        constraints = [
            models.CheckConstraint(
                condition=Q(emission_kind="conducted", distance_m__isnull=True, polarisation="")
                | Q(emission_kind="radiated", mains_line=""),
                name="scan_fields_match_emission_kind",
            ),
            models.CheckConstraint(
                condition=Q(distance_m__isnull=True) | Q(distance_m__gt=0), name="scan_distance_positive"
            ),
            models.UniqueConstraint(
                fields=["revision", "uploaded_by", "idempotency_key"],
                condition=~Q(idempotency_key=""),
                name="scan_idempotency_key_unique",
            ),
        ]

    def __str__(self) -> str:
        return f"{self.get_emission_kind_display()} scan of {self.revision} on {self.measured_on}"


class FailingFrequency(models.Model):
    """A frequency at which a case's product is over the limit or too close to it.

    ``margin_db`` = limit − level: negative means over the limit.
    """

    case = models.ForeignKey(Case, on_delete=models.CASCADE, related_name="failing_frequencies")
    scan = models.ForeignKey(Scan, on_delete=models.PROTECT, null=True, blank=True, related_name="+")
    frequency_hz = models.FloatField()
    level = models.FloatField()
    limit_level = models.FloatField()
    unit = models.CharField(max_length=8, default="dBuV/m")
    detector = models.CharField(max_length=10, choices=Scan.Detector.choices, default=Scan.Detector.QUASI_PEAK)
    polarisation = models.CharField(max_length=10, choices=Scan.Polarisation.choices, blank=True)
    mains_line = models.CharField(max_length=2, choices=Scan.MainsLine.choices, blank=True)
    confirmed = models.BooleanField(
        default=False, help_text="Proposed by the analysis until an engineer confirms it."
    )
    is_open = models.BooleanField(default=True)
    created_at = models.DateTimeField(default=timezone.now)

    class Meta:
        ordering = ["frequency_hz"]
        constraints = [
            models.CheckConstraint(condition=Q(frequency_hz__gt=0), name="failing_frequency_positive"),
        ]

    def __str__(self) -> str:
        return f"{self.frequency_hz / 1e6:.3f} MHz ({self.margin_db:+.1f} dB)"

    @property
    def margin_db(self) -> float:
        return self.limit_level - self.level


class Capture(AnalysedUpload):
    """A near-field probe reading at one place on the board."""

    class ProbeKind(models.TextChoices):
        E_FIELD = "e_field", "Electric-field probe"
        H_FIELD = "h_field", "Magnetic-field probe"
        CURRENT = "current", "Current probe"
        OTHER = "other", "Other"

    class BoardSide(models.TextChoices):
        TOP = "top", "Top"
        BOTTOM = "bottom", "Bottom"
        EDGE = "edge", "Edge / cable"

    case = models.ForeignKey(Case, on_delete=models.CASCADE, related_name="captures")
    revision = models.ForeignKey(Revision, on_delete=models.PROTECT, related_name="captures")
    countermeasure = models.ForeignKey(
        "Countermeasure",
        on_delete=models.SET_NULL,
        null=True,
        blank=True,
        related_name="after_captures",
        help_text="Set when this capture re-measures a spot after a countermeasure.",
    )
    captured_at = models.DateTimeField(default=timezone.now)
    probe_kind = models.CharField(max_length=8, choices=ProbeKind.choices)
    tip = models.CharField(max_length=40, help_text="Tip size or shape, e.g. 'loop 10 mm', 'ball 3 mm'")
    board_side = models.CharField(max_length=6, choices=BoardSide.choices, default=BoardSide.TOP)
    location = models.CharField(max_length=80, help_text="A zone or reference designator, e.g. 'U7', 'PHY area'")
    x_mm = models.FloatField(null=True, blank=True)
    y_mm = models.FloatField(null=True, blank=True)
    notes = models.TextField(blank=True)

    class Meta:
        ordering = ["-captured_at", "-id"]
        constraints = [
            models.CheckConstraint(
                condition=(Q(x_mm__isnull=True) & Q(y_mm__isnull=True))
                | (Q(x_mm__isnull=False) & Q(y_mm__isnull=False)),
                name="capture_xy_both_or_neither",
            ),
            models.UniqueConstraint(
                fields=["case", "uploaded_by", "idempotency_key"],
                condition=~Q(idempotency_key=""),
                name="capture_idempotency_key_unique",
            ),
        ]

    def __str__(self) -> str:
        return f"{self.get_probe_kind_display()} {self.tip} at {self.location}"


class CaptureReading(models.Model):
    """What a capture reads at one failing frequency: the highest level within tolerance.

    An analysis output, rewritten whenever the case's failing frequencies or
    the team's tolerance change. ``level`` is null when the capture has no
    point within tolerance of the frequency.
    """

    capture = models.ForeignKey(Capture, on_delete=models.CASCADE, related_name="readings")
    failing_frequency = models.ForeignKey(FailingFrequency, on_delete=models.CASCADE, related_name="readings")
    frequency_hz = models.FloatField(null=True, blank=True)
    level = models.FloatField(null=True, blank=True)

    class Meta:
        constraints = [
            models.UniqueConstraint(fields=["capture", "failing_frequency"], name="one_reading_per_frequency")
        ]

    def __str__(self) -> str:
        level = "no reading" if self.level is None else f"{self.level:.1f}"
        return f"capture {self.capture_id} at failing frequency {self.failing_frequency_id}: {level}"


class Countermeasure(models.Model):
    class Kind(models.TextChoices):
        FILTERING = "filtering", "Filtering"
        FERRITE = "ferrite", "Ferrite / choke"
        SHIELDING = "shielding", "Shielding"
        LAYOUT = "layout", "Layout change"
        GROUNDING = "grounding", "Grounding / return path"
        FIRMWARE = "firmware", "Firmware / clocking"
        OTHER = "other", "Other"

    class Status(models.TextChoices):
        PROPOSED = "proposed", "Proposed"
        TRIAL = "trial", "On trial"
        VERIFIED = "verified", "Verified"
        REJECTED = "rejected", "Rejected"

    case = models.ForeignKey(Case, on_delete=models.CASCADE, related_name="countermeasures")
    revision = models.ForeignKey(Revision, on_delete=models.PROTECT, related_name="countermeasures")
    kind = models.CharField(max_length=10, choices=Kind.choices)
    description = models.TextField()
    proposed_by = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT, related_name="+")
    proposed_at = models.DateTimeField(default=timezone.now)
    status = models.CharField(max_length=8, choices=Status.choices, default=Status.PROPOSED)
    verified_reason = models.TextField(
        blank=True, help_text="Why it was accepted although some frequency stays inside the guard band."
    )

    class Meta:
        ordering = ["proposed_at", "id"]

    def __str__(self) -> str:
        return f"{self.get_kind_display()}: {self.description[:60]}"


class Verification(models.Model):
    """A countermeasure checked by an after-scan or after-captures."""

    countermeasure = models.ForeignKey(Countermeasure, on_delete=models.CASCADE, related_name="verifications")
    after_scan = models.ForeignKey(Scan, on_delete=models.PROTECT, null=True, blank=True, related_name="+")
    recorded_by = models.ForeignKey(settings.AUTH_USER_MODEL, on_delete=models.PROTECT, related_name="+")
    recorded_at = models.DateTimeField(default=timezone.now)
    note = models.TextField(blank=True)

    class Meta:
        ordering = ["recorded_at", "id"]

    def __str__(self) -> str:
        how = f"after-scan {self.after_scan_id}" if self.after_scan_id else "levels recorded by hand"
        return f"verification {self.pk} of countermeasure {self.countermeasure_id} ({how})"


class VerificationResult(models.Model):
    """The level after the change at one failing frequency.

    change_db = level_after − the failing frequency's level (negative = quieter);
    new margin = the failing frequency's limit − level_after.
    """

    verification = models.ForeignKey(Verification, on_delete=models.CASCADE, related_name="results")
    failing_frequency = models.ForeignKey(FailingFrequency, on_delete=models.CASCADE, related_name="+")
    level_after = models.FloatField(null=True, blank=True)

    class Meta:
        constraints = [
            models.UniqueConstraint(
                fields=["verification", "failing_frequency"], name="one_result_per_frequency"
            )
        ]

    def __str__(self) -> str:
        level = "not measured" if self.level_after is None else f"{self.level_after:.1f} after"
        return f"verification {self.verification_id}, failing frequency {self.failing_frequency_id}: {level}"

    @property
    def change_db(self) -> float | None:
        if self.level_after is None:
            return None
        return self.level_after - self.failing_frequency.level

    @property
    def new_margin_db(self) -> float | None:
        if self.level_after is None:
            return None
        return self.failing_frequency.limit_level - self.level_after


class CaseEvent(models.Model):
    """One line of a case's timeline. Events are appended, never edited."""

    class Kind(models.TextChoices):
        OPENED = "opened", "Case opened"
        SCAN = "scan", "Scan uploaded"
        CAPTURE = "capture", "Capture uploaded"
        ANALYSED = "analysed", "Analysis finished"
        FREQUENCIES = "frequencies", "Failing frequencies set"
        STAGE = "stage", "Stage changed"
        COMMENT = "comment", "Comment"
        COUNTERMEASURE = "countermeasure", "Countermeasure"
        VERIFICATION = "verification", "Verification"
        CLOSED = "closed", "Case closed"

    case = models.ForeignKey(Case, on_delete=models.CASCADE, related_name="events")
    kind = models.CharField(max_length=16, choices=Kind.choices)
    actor = models.ForeignKey(
        settings.AUTH_USER_MODEL, on_delete=models.PROTECT, null=True, blank=True, related_name="+"
    )
    at = models.DateTimeField(default=timezone.now, db_index=True)
    text = models.TextField(blank=True)
    data = models.JSONField(default=dict, blank=True)

    class Meta:
        ordering = ["at", "id"]

    def __str__(self) -> str:
        return f"{self.at:%Y-%m-%d %H:%M} {self.get_kind_display()}"


# ----------------------------------------------------------------- signature search index


class SignatureItem(models.Model):
    """One indexed frequency signature of a case: a scan's, a probe capture's, or its failing frequencies'.

    Derived data, written by ``services.search`` when a scan or capture is
    analysed (in the same transaction) and when the case closes, and rebuilt
    from the stored results by ``manage.py reindex_signatures``. After-scans
    and after-captures of a countermeasure are not indexed: they show the
    problem fixed, not the problem.
    """

    class Source(models.TextChoices):
        SCAN = "scan", "Scan"
        CAPTURE = "capture", "Probe capture"
        FAILING = "failing", "Failing frequencies"

    case = models.ForeignKey(Case, on_delete=models.CASCADE, related_name="signature_items")
    source = models.CharField(max_length=8, choices=Source.choices)
    scan = models.OneToOneField(Scan, on_delete=models.CASCADE, null=True, blank=True, related_name="+")
    capture = models.OneToOneField(Capture, on_delete=models.CASCADE, null=True, blank=True, related_name="+")
    # Blank for near-field captures and failing frequencies of unknown kind.
    emission_kind = models.CharField(max_length=10, choices=Scan.EmissionKind.choices, blank=True)
    indexed_at = models.DateTimeField(default=timezone.now)
    # The same frequencies as the item's rows, packed for scoring: its peaks,
    # then its fundamentals, each ascending, as little-endian float64
    # (``services.search.pack_signature``). The rows serve the range scans;
    # the search reads a candidate's signature from here, one row per item
    # (4,400 rows for 200 candidates took 5.4 ms to read, these 1.6 ms).
    peak_count = models.PositiveIntegerField(default=0)
    packed_hz = models.BinaryField(default=b"")

    class Meta:
        constraints = [
            models.CheckConstraint(
                condition=(Q(source="scan") & Q(scan__isnull=False) & Q(capture__isnull=True))
                | (Q(source="capture") & Q(capture__isnull=False) & Q(scan__isnull=True))
                | (Q(source="failing") & Q(scan__isnull=True) & Q(capture__isnull=True)),
                name="signature_item_source_matches",
            ),
            models.UniqueConstraint(
                fields=["case", "emission_kind"], condition=Q(source="failing"), name="one_failing_signature_per_kind"
            ),
        ]

    def __str__(self) -> str:
        return f"{self.get_source_display()} signature of case {self.case_id}"


class SignatureRow(models.Model):
    """One frequency of an indexed signature: a peak, or a harmonic family's fundamental.

    The candidate search reads only this table, one range scan of the
    frequency index per query range, so the columns its filters need are
    copied here from the case (team, product, outcome, opened on) and the
    item (emission kind) and kept in step by ``services.search``.
    """

    class Role(models.IntegerChoices):
        PEAK = 0, "Peak"
        FUNDAMENTAL = 1, "Family fundamental"

    class Outcome(models.IntegerChoices):
        OPEN = 0, "Still open"
        FIXED = 1, "Fixed"
        WAIVED = 2, "Accepted / waived"

    item = models.ForeignKey(SignatureItem, on_delete=models.CASCADE, related_name="rows")
    case = models.ForeignKey(Case, on_delete=models.CASCADE, related_name="+", db_index=False)
    team = models.ForeignKey(Team, on_delete=models.CASCADE, related_name="+", db_index=False)
    product = models.ForeignKey(Product, on_delete=models.CASCADE, related_name="+", db_index=False)
    role = models.PositiveSmallIntegerField(choices=Role.choices)
    frequency_hz = models.FloatField()
    emission_kind = models.CharField(max_length=10, choices=Scan.EmissionKind.choices, blank=True)
    outcome = models.PositiveSmallIntegerField(choices=Outcome.choices, default=Outcome.OPEN)
    opened_on = models.DateField()

    class Meta:
        indexes = [
            # Frequency first for the range scans; team, outcome and case after
            # it (the scans' order), then every other column a filter tests, so
            # a search reads the index alone whatever its filters. (With the
            # emission kind outside it, PostgreSQL read table pages: one
            # 22-range query at 100,000 cases took 106 ms filtered, 16 ms not.)
            models.Index(
                fields=["frequency_hz", "team", "outcome", "case", "emission_kind", "product", "opened_on"],
                name="signature_row_by_frequency",
            ),
            # A case's rows in scoring order, with the emission kind its filter
            # tests: read from the index alone.
            models.Index(
                fields=["case", "item", "role", "frequency_hz", "emission_kind"], name="signature_row_by_case"
            ),
        ]
        constraints = [
            models.CheckConstraint(condition=Q(frequency_hz__gt=0), name="signature_row_frequency_positive"),
        ]

    def __str__(self) -> str:
        return f"{self.get_role_display()} {self.frequency_hz / 1e6:.4f} MHz of case {self.case_id}"


# ----------------------------------------------------------------- audit


class AuditEvent(models.Model):
    """Who did what, when: sign-ins, stage changes, waivers, deletions, sharing, membership.

    Rows are appended, never edited, and survive what they describe (a removed
    member or a deleted source keeps its line: ``actor_name`` and ``text`` are
    copied in, not joined). Each row belongs to one team, so a team's leads
    read exactly their team's log; a sign-in is written once per team of the
    person signing in.
    """

    class Verb(models.TextChoices):
        SIGNED_IN = "signed_in", "Signed in"
        SIGN_IN_FAILED = "sign_in_failed", "Sign-in refused"
        SIGNED_OUT = "signed_out", "Signed out"
        STAGE = "stage", "Stage changed"
        CLOSED = "closed", "Case closed as fixed"
        WAIVED = "waived", "Case closed as waived"
        REOPENED = "reopened", "Case reopened"
        DELETED = "deleted", "Deleted"
        SHARING = "sharing", "Sharing changed"
        SETTINGS = "settings", "Team settings changed"
        MEMBER_ADDED = "member_added", "Member added"
        MEMBER_ROLE = "member_role", "Member's role changed"
        MEMBER_REMOVED = "member_removed", "Member removed"
        FILE_DOWNLOADED = "file_downloaded", "Uploaded file downloaded"

    team = models.ForeignKey(Team, on_delete=models.CASCADE, related_name="audit_events")
    at = models.DateTimeField(default=timezone.now)
    actor = models.ForeignKey(
        settings.AUTH_USER_MODEL, on_delete=models.SET_NULL, null=True, blank=True, related_name="+"
    )
    actor_name = models.CharField(max_length=150, blank=True)
    verb = models.CharField(max_length=20, choices=Verb.choices)
    object_type = models.CharField(max_length=40, blank=True)
    object_id = models.PositiveBigIntegerField(null=True, blank=True)
    text = models.CharField(max_length=300, blank=True)
    remote_addr = models.GenericIPAddressField(null=True, blank=True)
    data = models.JSONField(default=dict, blank=True)

    class Meta:
        ordering = ["-at", "-id"]
        indexes = [models.Index(fields=["team", "-at"], name="audit_team_recent")]

    def __str__(self) -> str:
        return f"{self.at:%Y-%m-%d %H:%M} {self.actor_name or '—'} {self.get_verb_display()}"
