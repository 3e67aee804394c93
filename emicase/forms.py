"""Page forms: validate at the edge and explain, beside the field, what is wrong.

Upload forms keep a valid file across a submission that fails for another
reason (a missing limit line, say), so the engineer does not pick the file
again: the file waits under ``MEDIA_ROOT/kept/`` against a token held in the
session, and the form says which file it kept.
"""

from __future__ import annotations

import re
import uuid
from pathlib import PurePath

from django import forms
from django.core.exceptions import ValidationError
from django.core.files import File
from django.core.files.storage import default_storage
from django.utils import timezone

from analysis.limits import get_limit, list_limits
from emicase.models import (
    Capture,
    Case,
    Countermeasure,
    Domain,
    EmissionSource,
    Membership,
    Scan,
    Verification,
)
from emicase.services.sweeper import KEPT_DIRECTORY
from emicase.services.uploads import check_trace_file

TRACE_SUFFIXES = (".csv", ".txt", ".tsv", ".dat", ".asc", ".prn")
KEPT_SESSION_KEY = "emicase_kept_uploads"
KEPT_PER_SESSION = 6


def limit_choices() -> list:
    """The built-in limit lines, grouped by kind (the page hides the group that does not apply)."""
    lines = list_limits()
    return [("", "— choose the limit line the test used —")] + [
        (f"{kind.title()} limits", [(line.id, line.title) for line in lines if line.kind == kind])
        for kind in ("radiated", "conducted")
    ]


def apply_service_error(form: forms.Form, exc: ValidationError) -> None:
    """Show a service's ValidationError on the form: beside its field when the form has it."""
    if hasattr(exc, "error_dict"):
        for name, errors in exc.error_dict.items():
            form.add_error(name if name in form.fields else None, errors)
    else:
        form.add_error(None, exc)


# ----------------------------------------------------------------- kept uploads


class KeepsUpload(forms.Form):
    """A form with a trace ``file`` that survives a failed submission (see the module docstring)."""

    kept_file = forms.CharField(required=False, widget=forms.HiddenInput)
    upload_domain = Domain.SPECTRUM

    def __init__(self, *args, session=None, **kwargs):
        super().__init__(*args, **kwargs)
        self.session = session if session is not None else {}
        self.kept_name = ""
        self._from_kept: str = ""
        entry = self._kept_entry()
        if entry:
            self.kept_name = entry["name"]

    def _kept_entry(self) -> dict | None:
        token = (self.data.get(self.add_prefix("kept_file")) or "") if self.is_bound else ""
        return self.session.get(KEPT_SESSION_KEY, {}).get(token) if token else None

    def _declared_domain(self) -> str:
        return self.upload_domain

    def clean_file(self):
        upload = self.cleaned_data.get("file")
        if upload:
            suffix = PurePath(upload.name).suffix.lower()
            if suffix not in TRACE_SUFFIXES:
                raise ValidationError(
                    f"{upload.name} is not a text trace export: choose a {', '.join(TRACE_SUFFIXES[:-1])} or "
                    f"{TRACE_SUFFIXES[-1]} file (save a spreadsheet as CSV first)."
                )
            try:
                check_trace_file(upload, domain=self._declared_domain())
            except ValidationError as exc:
                raise ValidationError(exc.message_dict.get("file", exc.messages)) from None
            return upload
        entry = self._kept_entry()
        if entry and default_storage.exists(entry["path"]):
            self._from_kept = self.data.get(self.add_prefix("kept_file"))
            return File(default_storage.open(entry["path"], "rb"), name=entry["name"])
        raise ValidationError(
            "Choose the trace file exported from the receiver, analyser or scope."
        )

    def keep_upload(self) -> None:
        """After a failed submission: keep a valid new file for the next try. Call only when invalid."""
        upload = self.cleaned_data.get("file") if hasattr(self, "cleaned_data") else None
        if not upload or self._from_kept:
            return
        token = uuid.uuid4().hex
        upload.seek(0)
        path = default_storage.save(f"{KEPT_DIRECTORY}/{token}", upload)
        kept = dict(self.session.get(KEPT_SESSION_KEY, {}))
        # A handful per session is plenty; drop the oldest files.
        for old in list(kept)[: max(0, len(kept) - KEPT_PER_SESSION + 1)]:
            default_storage.delete(kept.pop(old)["path"])
        kept[token] = {"name": upload.name, "path": path}
        self.session[KEPT_SESSION_KEY] = kept
        self.data = self.data.copy()
        self.data[self.add_prefix("kept_file")] = token
        self.kept_name = upload.name

    def forget_upload(self) -> None:
        """After a successful submission: drop the kept file it used, if any."""
        kept = dict(self.session.get(KEPT_SESSION_KEY, {}))
        entry = kept.pop(self._from_kept, None) if self._from_kept else None
        if entry:
            f = self.cleaned_data.get("file")
            if f is not None:
                f.close()
            default_storage.delete(entry["path"])
            self.session[KEPT_SESSION_KEY] = kept


# ----------------------------------------------------------------- scans


class ScanForm(KeepsUpload):
    file = forms.FileField(
        required=False,
        allow_empty_file=True,  # refused by check_trace_file, in words that name the file
        label="Scan file",
        help_text="The receiver's or analyser's text export (.csv, .txt, …) with frequency and level columns.",
    )
    emission_kind = forms.ChoiceField(
        choices=Scan.EmissionKind.choices,
        initial=Scan.EmissionKind.RADIATED,
        widget=forms.RadioSelect,
        label="Emission",
    )
    limit_id = forms.ChoiceField(
        label="Limit line",
        choices=limit_choices,
        error_messages={"required": "Choose the limit line the test was judged against."},
    )
    detector = forms.ChoiceField(choices=Scan.Detector.choices, initial=Scan.Detector.QUASI_PEAK)
    distance_m = forms.FloatField(
        required=False,
        label="Antenna distance (m)",
        min_value=0.1,
        max_value=100,
        help_text="Radiated only, e.g. 3 or 10.",
    )
    polarisation = forms.ChoiceField(
        choices=Scan.Polarisation.choices, required=False, help_text="Radiated only."
    )
    mains_line = forms.ChoiceField(
        choices=Scan.MainsLine.choices,
        required=False,
        label="Mains line",
        help_text="Conducted only: the line the LISN measured.",
    )
    setting = forms.ChoiceField(
        choices=Scan.Setting.choices, initial=Scan.Setting.PRE_COMPLIANCE, label="Where"
    )
    lab = forms.CharField(max_length=120, required=False, label="Lab")
    measured_on = forms.DateField(
        label="Measured on",
        widget=forms.DateInput(attrs={"type": "date"}),
        error_messages={"required": "Give the date of the measurement."},
    )
    operator = forms.CharField(max_length=120, required=False, label="Measured by")

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        if not self.is_bound and "measured_on" not in self.initial:
            self.initial["measured_on"] = timezone.localdate()

    def clean(self):
        cd = super().clean()
        kind, limit_id = cd.get("emission_kind"), cd.get("limit_id")
        if limit_id and kind:
            line = get_limit(limit_id)
            if line.kind != kind:
                self.add_error(
                    "limit_id", f"{line.title} is a {line.kind} limit; this scan is {kind}."
                )
        if kind == Scan.EmissionKind.RADIATED:
            if cd.get("distance_m") is None and "distance_m" not in self.errors:
                self.add_error("distance_m", "Give the antenna distance in metres (e.g. 3 or 10).")
            cd["mains_line"] = ""
        elif kind == Scan.EmissionKind.CONDUCTED:
            if not cd.get("mains_line"):
                self.add_error("mains_line", "Say which mains line (L1 or N) the LISN measured.")
            cd["distance_m"] = None
            cd["polarisation"] = ""
        return cd

    def scan_fields(self) -> dict:
        """The keyword arguments ``services.uploads.scan_upload`` takes from this form."""
        cd = self.cleaned_data
        return {
            name: cd[name]
            for name in (
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
            )
        }

    @classmethod
    def initial_from(cls, scan: Scan | None) -> dict:
        """Start a new scan form with an earlier scan's set-up (the after-scan repeats the test)."""
        if scan is None:
            return {}
        return {
            "emission_kind": scan.emission_kind,
            "limit_id": scan.limit_id,
            "detector": scan.detector,
            "distance_m": scan.distance_m,
            "polarisation": scan.polarisation,
            "mains_line": scan.mains_line,
            "setting": scan.setting,
            "lab": scan.lab,
        }


class RevisionChoiceField(forms.ModelChoiceField):
    def label_from_instance(self, obj):
        fw = f", firmware {obj.firmware_label}" if obj.firmware_label else ""
        return f"{obj.product.name} — rev {obj.hardware_label}{fw}"


class LogFailForm(ScanForm):
    """Log a failing test result: the analysis opens the case once it has the failing frequencies."""

    title = forms.CharField(
        max_length=200,
        label="What failed",
        help_text="A short title for the case, e.g. 'Radiated class B fail at 75 MHz'.",
        error_messages={"required": "Give the case a short title."},
    )
    revision = RevisionChoiceField(
        queryset=None,
        label="Product revision",
        error_messages={"required": "Choose the revision that was tested."},
    )

    field_order = [
        "title",
        "revision",
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
    ]

    def __init__(self, *args, revisions=None, **kwargs):
        super().__init__(*args, **kwargs)
        self.fields["revision"].queryset = revisions


class CaseScanForm(ScanForm):
    """Another scan for an open case (another polarisation, another lab)."""

    revision = RevisionChoiceField(queryset=None, label="Product revision")
    field_order = ["revision", "file"]

    def __init__(self, *args, revisions=None, **kwargs):
        super().__init__(*args, **kwargs)
        self.fields["revision"].queryset = revisions


# ----------------------------------------------------------------- captures


class CaptureForm(KeepsUpload):
    file = forms.FileField(
        required=False,
        allow_empty_file=True,  # refused by check_trace_file, in words that name the file
        label="Capture file",
        help_text="A spectrum export or an oscilloscope time record (.csv, .txt, …).",
    )
    declared_domain = forms.ChoiceField(
        choices=Domain.choices, initial=Domain.AUTO, label="The file holds"
    )
    revision = RevisionChoiceField(queryset=None, label="Board revision")
    probe_kind = forms.ChoiceField(choices=Capture.ProbeKind.choices, label="Probe")
    tip = forms.CharField(
        max_length=40,
        label="Tip",
        help_text="Size or shape, e.g. 'loop 10 mm', 'ball 3 mm'.",
        error_messages={"required": "Say which tip: levels only compare within one tip."},
    )
    board_side = forms.ChoiceField(
        choices=Capture.BoardSide.choices, initial=Capture.BoardSide.TOP, label="Side"
    )
    location = forms.CharField(
        max_length=80,
        label="Where on the board",
        help_text="A zone or a reference designator, e.g. 'U7', 'PHY area'.",
        error_messages={"required": "Say where on the board the probe was."},
    )
    x_mm = forms.FloatField(required=False, label="x (mm)")
    y_mm = forms.FloatField(required=False, label="y (mm)")
    notes = forms.CharField(required=False, widget=forms.Textarea(attrs={"rows": 2}))

    def __init__(self, *args, revisions=None, **kwargs):
        super().__init__(*args, **kwargs)
        self.fields["revision"].queryset = revisions
        if revisions is not None and not self.is_bound and "revision" not in self.initial:
            latest = revisions.order_by("-created_at", "-id").first()
            if latest is not None:
                self.initial["revision"] = latest.pk

    def _declared_domain(self) -> str:
        return self.data.get(self.add_prefix("declared_domain")) or Domain.AUTO

    def clean(self):
        cd = super().clean()
        x, y = cd.get("x_mm"), cd.get("y_mm")
        if (x is None) != (y is None) and "x_mm" not in self.errors and "y_mm" not in self.errors:
            self.add_error("x_mm" if x is None else "y_mm", "Give both x and y, or neither.")
        return cd

    def capture_fields(self) -> dict:
        cd = self.cleaned_data
        return {
            name: cd[name]
            for name in (
                "revision",
                "declared_domain",
                "probe_kind",
                "tip",
                "board_side",
                "location",
                "x_mm",
                "y_mm",
                "notes",
            )
        }

    @classmethod
    def initial_from(cls, capture: Capture | None) -> dict:
        """Re-measure the spot of an earlier capture: same probe, tip, side and place."""
        if capture is None:
            return {}
        return {
            "probe_kind": capture.probe_kind,
            "tip": capture.tip,
            "board_side": capture.board_side,
            "location": capture.location,
            "x_mm": capture.x_mm,
            "y_mm": capture.y_mm,
            "declared_domain": capture.declared_domain,
            "revision": capture.revision_id,
        }


# ----------------------------------------------------------------- failing frequencies


def _mhz_range(lo_hz: float, hi_hz: float) -> str:
    return f"{lo_hz / 1e6:g}–{hi_hz / 1e6:g} MHz"


class FailingFrequencyForm(forms.Form):
    """Add a failing frequency by hand, or edit one; the frequency must lie inside the case's scans."""

    frequency_mhz = forms.FloatField(
        label="Frequency (MHz)",
        min_value=0.000001,
        error_messages={"required": "Give the frequency in MHz."},
    )
    level = forms.FloatField(label="Level", error_messages={"required": "Give the measured level."})
    limit_level = forms.FloatField(
        label="Limit", error_messages={"required": "Give the limit at this frequency."}
    )
    is_open = forms.BooleanField(required=False, initial=True, label="Still open")

    def __init__(self, *args, ranges_hz: list[tuple[float, float]] | None = None, **kwargs):
        super().__init__(*args, **kwargs)
        self.ranges_hz = ranges_hz or []

    def clean_frequency_mhz(self):
        mhz = self.cleaned_data["frequency_mhz"]
        hz = mhz * 1e6
        if self.ranges_hz and not any(lo <= hz <= hi for lo, hi in self.ranges_hz):
            spans = ", ".join(_mhz_range(lo, hi) for lo, hi in self.ranges_hz)
            raise ValidationError(f"{mhz:g} MHz lies outside the case's scans ({spans}).")
        return mhz


class ConfirmFrequenciesForm(forms.Form):
    keep = forms.TypedMultipleChoiceField(
        coerce=int, required=False, widget=forms.CheckboxSelectMultiple
    )

    def __init__(self, *args, proposals=(), **kwargs):
        super().__init__(*args, **kwargs)
        self.fields["keep"].choices = [(ff.pk, str(ff)) for ff in proposals]


# ----------------------------------------------------------------- the case's story


class CommentForm(forms.Form):
    text = forms.CharField(
        label="Comment",
        widget=forms.Textarea(attrs={"rows": 3}),
        max_length=5000,
        error_messages={"required": "A comment needs some text."},
    )


class MoveForm(forms.Form):
    to = forms.ChoiceField(choices=Case.Stage.choices)
    note = forms.CharField(required=False, max_length=500, label="Why (optional)")


class CountermeasureForm(forms.Form):
    kind = forms.ChoiceField(choices=Countermeasure.Kind.choices, label="Kind of change")
    description = forms.CharField(
        widget=forms.Textarea(attrs={"rows": 3}),
        max_length=4000,
        label="The change",
        help_text="e.g. '33 Ω series resistor on the PHY clock, R41'.",
        error_messages={"required": "Describe the change you will try."},
    )
    revision = RevisionChoiceField(queryset=None, label="On revision")

    def __init__(self, *args, revisions=None, **kwargs):
        super().__init__(*args, **kwargs)
        self.fields["revision"].queryset = revisions
        if revisions is not None and not self.is_bound:
            latest = revisions.order_by("-created_at", "-id").first()
            if latest is not None:
                self.initial.setdefault("revision", latest.pk)


class AfterScanForm(ScanForm):
    """The after-scan of a countermeasure; its revision is the countermeasure's."""


class VerificationChoiceField(forms.ModelChoiceField):
    def label_from_instance(self, obj: Verification):
        how = (
            f"after-scan {obj.after_scan.original_name}"
            if obj.after_scan_id
            else "near-field estimate / by hand"
        )
        return f"{obj.recorded_at:%Y-%m-%d %H:%M} — {how}"


class VerifyForm(forms.Form):
    verification = VerificationChoiceField(
        queryset=None,
        label="Judge by",
        error_messages={"required": "Choose the verification to judge by."},
    )
    reason = forms.CharField(
        required=False,
        widget=forms.Textarea(attrs={"rows": 2}),
        max_length=2000,
        label="Reason to accept a margin inside the guard band",
        help_text="Needed only when some failing frequency stays inside the guard band.",
    )

    def __init__(self, *args, verifications=None, **kwargs):
        super().__init__(*args, **kwargs)
        self.fields["verification"].queryset = verifications


class CaptureVerificationForm(forms.Form):
    note = forms.CharField(required=False, max_length=500, label="Note (optional)")


class RejectForm(forms.Form):
    reason = forms.CharField(
        max_length=2000,
        label="Why it did not work",
        error_messages={"required": "Say why, so the next hunt knows."},
    )


class CloseForm(forms.Form):
    closure = forms.ChoiceField(
        choices=[
            (Case.Closure.FIXED, "Fixed — by a verified countermeasure"),
            (Case.Closure.WAIVED, "Accepted / waived — with a reason"),
        ],
        widget=forms.RadioSelect,
        label="Outcome",
    )
    countermeasure = forms.ModelChoiceField(queryset=None, required=False, label="Fixed by")
    reason = forms.CharField(
        required=False, widget=forms.Textarea(attrs={"rows": 3}), max_length=4000, label="Reason"
    )

    def __init__(self, *args, verified=None, **kwargs):
        super().__init__(*args, **kwargs)
        self.fields["countermeasure"].queryset = verified
        if verified is not None and not self.is_bound:
            only = list(verified[:2])
            if len(only) == 1:
                self.initial.setdefault("countermeasure", only[0].pk)
                self.initial.setdefault("closure", Case.Closure.FIXED)

    def clean(self):
        cd = super().clean()
        if cd.get("closure") == Case.Closure.FIXED and not cd.get("countermeasure"):
            self.add_error("countermeasure", "Choose the verified countermeasure that fixed it.")
        if cd.get("closure") == Case.Closure.WAIVED and not (cd.get("reason") or "").strip():
            self.add_error("reason", "Say why the remaining emissions are accepted.")
        return cd


class ReopenForm(forms.Form):
    reason = forms.CharField(
        max_length=2000,
        label="Why reopen",
        error_messages={"required": "Say why the case is reopened."},
    )


# ----------------------------------------------------------------- products and sources


class ProductForm(forms.Form):
    name = forms.CharField(max_length=120, error_messages={"required": "Give the product a name."})
    description = forms.CharField(required=False, widget=forms.Textarea(attrs={"rows": 2}))


class RevisionForm(forms.Form):
    hardware_label = forms.CharField(
        max_length=40,
        label="Hardware revision",
        help_text="e.g. 'B', 'rev 2.1'.",
        error_messages={"required": "Give the hardware revision label."},
    )
    firmware_label = forms.CharField(max_length=40, required=False, label="Firmware")
    notes = forms.CharField(required=False, widget=forms.Textarea(attrs={"rows": 2}))
    copy_sources_from = forms.ModelChoiceField(
        queryset=None, required=False, label="Copy known sources from"
    )

    def __init__(self, *args, revisions=None, **kwargs):
        super().__init__(*args, **kwargs)
        self.fields["copy_sources_from"].queryset = revisions


_TOLERANCE = re.compile(
    r"^\s*([0-9]*\.?[0-9]+(?:[eE][+-]?\d+)?)\s*(ppm|%|hz|khz|mhz)?\s*$", re.IGNORECASE
)


def parse_tolerance_hz(text: str, nominal_hz: float) -> float:
    """'50 ppm', '5 %', '110 kHz', '1250 Hz' (or a bare number of Hz) → Hz. Raises ValidationError."""
    m = _TOLERANCE.match(text or "")
    if not m:
        raise ValidationError(
            "Write the tolerance as e.g. '50 ppm', '5 %', '110 kHz' or '1250 Hz'."
        )
    value, unit = float(m.group(1)), (m.group(2) or "hz").lower()
    scale = {"ppm": nominal_hz * 1e-6, "%": nominal_hz * 1e-2, "hz": 1.0, "khz": 1e3, "mhz": 1e6}[
        unit
    ]
    return value * scale


class SourceForm(forms.Form):
    name = forms.CharField(
        max_length=80,
        help_text="e.g. 'MCU crystal Y1', 'buck U7'.",
        error_messages={"required": "Name the source."},
    )
    kind = forms.ChoiceField(choices=EmissionSource.Kind.choices)
    nominal_mhz = forms.FloatField(
        label="Nominal frequency (MHz)",
        min_value=1e-6,
        error_messages={"required": "Give its nominal frequency in MHz."},
    )
    tolerance = forms.CharField(
        max_length=30,
        label="Tolerance",
        help_text="'50 ppm', '5 %', '110 kHz'…",
        error_messages={"required": "Give how far the real frequency may lie from nominal."},
    )

    def clean(self):
        cd = super().clean()
        if cd.get("nominal_mhz") and cd.get("tolerance"):
            try:
                cd["tolerance_hz"] = parse_tolerance_hz(cd["tolerance"], cd["nominal_mhz"] * 1e6)
            except ValidationError as exc:
                self.add_error("tolerance", exc)
        return cd

    @classmethod
    def initial_from(cls, source: EmissionSource) -> dict:
        ppm = source.tolerance_hz / source.nominal_frequency_hz * 1e6
        tolerance = f"{ppm:g} ppm" if ppm < 1000 else f"{source.tolerance_hz / 1e3:g} kHz"
        return {
            "name": source.name,
            "kind": source.kind,
            "nominal_mhz": source.nominal_frequency_hz / 1e6,
            "tolerance": tolerance,
        }


class TeamSettingsForm(forms.Form):
    guard_band_db = forms.FloatField(
        label="Guard band (dB)",
        min_value=0,
        max_value=20,
        help_text="A failing frequency counts as fixed only with at least this margin.",
    )
    frequency_tolerance_pct = forms.FloatField(
        label="Frequency tolerance (%)",
        min_value=0.001,
        max_value=20,
        help_text="How far a capture's peak may lie from a failing frequency and still be read there.",
    )
    share_closed_cases = forms.BooleanField(
        label="Let other teams of this installation find our closed cases in the signature search",
        required=False,
        help_text="They see the product, the frequencies, the outcome and the verified countermeasures, "
                  "never the files or the case page.",
    )


class MemberAddForm(forms.Form):
    username = forms.CharField(label="Account name", max_length=150)
    role = forms.ChoiceField(label="Role", choices=Membership.Role.choices, initial=Membership.Role.ENGINEER)


class MemberRoleForm(forms.Form):
    role = forms.ChoiceField(label="Role", choices=Membership.Role.choices)
