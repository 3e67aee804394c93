"""Countermeasures and the verifications that prove or disprove them."""

from __future__ import annotations

from django.core.exceptions import ValidationError
from django.db import transaction

from emicase.models import (
    Case,
    CaseEvent,
    Countermeasure,
    Revision,
    Verification,
    VerificationResult,
)
from emicase.services.access import require_role
from emicase.services.cases import event_add, stage_set_by_system


@transaction.atomic
def countermeasure_propose(*, case: Case, by, kind: str, description: str, revision: Revision) -> Countermeasure:
    require_role(by, case.product.team_id)
    if case.is_closed:
        raise ValidationError("The case is closed; reopen it to try another countermeasure.")
    if revision.product_id != case.product_id:
        raise ValidationError({"revision": "Choose a revision of the case's product."})
    if not description.strip():
        raise ValidationError({"description": "Describe the change, e.g. '33 Ω series resistor on the PHY clock'."})
    cm = Countermeasure(case=case, kind=kind, description=description.strip(), revision=revision, proposed_by=by)
    cm.full_clean()
    cm.save()
    event_add(case=case, kind=CaseEvent.Kind.COUNTERMEASURE, by=by, text=cm.description,
              data={"countermeasure": cm.pk, "status": cm.status})
    return cm


@transaction.atomic
def countermeasure_start_trial(*, countermeasure: Countermeasure, by) -> Countermeasure:
    require_role(by, countermeasure.case.product.team_id)
    cm = Countermeasure.objects.select_for_update().select_related("case").get(pk=countermeasure.pk)
    if cm.status not in (Countermeasure.Status.PROPOSED, Countermeasure.Status.REJECTED):
        raise ValidationError(f"A countermeasure that is {cm.get_status_display().lower()} cannot go on trial.")
    cm.status = Countermeasure.Status.TRIAL
    cm.save(update_fields=["status"])
    if cm.case.stage in (Case.Stage.LOGGED, Case.Stage.HUNTING):
        stage_set_by_system(case=cm.case, to=Case.Stage.TRIAL, by=by, note=f"Trying: {cm.description}")
    event_add(case=cm.case, kind=CaseEvent.Kind.COUNTERMEASURE, by=by, text=f"On trial: {cm.description}",
              data={"countermeasure": cm.pk, "status": cm.status})
    return cm


def verification_shortfalls(verification: Verification, guard_db: float) -> list[VerificationResult]:
    """The results of ``verification`` at open failing frequencies whose new margin is below the guard band.

    A frequency the after-measurement did not cover counts as a shortfall.
    """
    short = []
    for result in verification.results.select_related("failing_frequency"):
        if not result.failing_frequency.is_open:
            continue
        if result.new_margin_db is None or result.new_margin_db < guard_db:
            short.append(result)
    return short


@transaction.atomic
def countermeasure_verify(
    *, countermeasure: Countermeasure, verification: Verification, by, reason: str = ""
) -> Countermeasure:
    """Mark a countermeasure verified by ``verification``.

    Allowed when every open failing frequency now has margin ≥ the team's
    guard band, or, short of that, with a recorded reason.
    """
    require_role(by, countermeasure.case.product.team_id)
    cm = Countermeasure.objects.select_for_update().select_related("case__product__team").get(pk=countermeasure.pk)
    if verification.countermeasure_id != cm.pk:
        raise ValidationError({"verification": "That verification checks another countermeasure."})
    if not verification.results.exists():
        raise ValidationError({"verification": "This verification has no readings yet (is its after-scan analysed?)."})
    guard = cm.case.product.team.guard_band_db
    short = verification_shortfalls(verification, guard)
    reason = reason.strip()
    if short and not reason:
        listed = ", ".join(f"{r.failing_frequency.frequency_hz / 1e6:.3f} MHz" for r in short[:5])
        raise ValidationError(
            {"reason": f"{len(short)} frequencies stay below the {guard:g} dB guard band ({listed}); "
                       "give a reason to accept it anyway."}
        )
    cm.status = Countermeasure.Status.VERIFIED
    cm.verified_reason = reason
    cm.save(update_fields=["status", "verified_reason"])
    stage_set_by_system(case=cm.case, to=Case.Stage.PROVEN, by=by, note=f"Verified: {cm.description}")
    event_add(case=cm.case, kind=CaseEvent.Kind.VERIFICATION, by=by, text=reason or "All failing frequencies within margin.",
              data={"countermeasure": cm.pk, "verification": verification.pk, "shortfalls": len(short)})
    return cm


@transaction.atomic
def countermeasure_reject(*, countermeasure: Countermeasure, by, reason: str) -> Countermeasure:
    require_role(by, countermeasure.case.product.team_id)
    cm = Countermeasure.objects.select_for_update().select_related("case").get(pk=countermeasure.pk)
    if cm.status == Countermeasure.Status.VERIFIED and cm.case.fixed_by_id == cm.pk:
        raise ValidationError("This countermeasure closed the case; reopen the case first.")
    cm.status = Countermeasure.Status.REJECTED
    cm.save(update_fields=["status"])
    event_add(case=cm.case, kind=CaseEvent.Kind.COUNTERMEASURE, by=by, text=f"Rejected: {reason.strip()}",
              data={"countermeasure": cm.pk, "status": cm.status})
    return cm


@transaction.atomic
def verification_record_levels(
    *, countermeasure: Countermeasure, by, levels_after: dict[int, float | None], note: str = ""
) -> Verification:
    """Record a verification from levels measured by hand (failing frequency id → level after)."""
    require_role(by, countermeasure.case.product.team_id)
    failing = {ff.pk: ff for ff in countermeasure.case.failing_frequencies.all()}
    unknown = set(levels_after) - set(failing)
    if unknown:
        raise ValidationError({"levels_after": f"Not failing frequencies of this case: {sorted(unknown)}"})
    v = Verification.objects.create(countermeasure=countermeasure, recorded_by=by, note=note.strip())
    VerificationResult.objects.bulk_create(
        VerificationResult(verification=v, failing_frequency=failing[pk], level_after=level)
        for pk, level in levels_after.items()
    )
    event_add(case=countermeasure.case, kind=CaseEvent.Kind.VERIFICATION, by=by, text=note.strip(),
              data={"countermeasure": countermeasure.pk, "verification": v.pk})
    return v


@transaction.atomic
def verification_by_scan(*, countermeasure: Countermeasure, by, file, **scan_fields) -> Verification:
    """Attach an after-scan to a countermeasure; its analysis fills in the levels after."""
    from emicase.services.uploads import scan_upload

    scan = scan_upload(revision=countermeasure.revision, file=file, by=by, case=countermeasure.case, **scan_fields)
    v = Verification.objects.create(countermeasure=countermeasure, after_scan=scan, recorded_by=by)
    event_add(case=countermeasure.case, kind=CaseEvent.Kind.VERIFICATION, by=by,
              text=f"After-scan {scan.original_name} for: {countermeasure.description}",
              data={"countermeasure": countermeasure.pk, "verification": v.pk, "scan": scan.pk})
    return v
