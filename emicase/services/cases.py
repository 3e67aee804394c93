"""Opening, moving, commenting on and closing cases."""

from __future__ import annotations

from django.core.exceptions import ValidationError
from django.db import transaction
from django.utils import timezone

from emicase.models import Case, CaseEvent, Countermeasure, Product
from emicase.services.access import LEAD_ROLES, require_role
from emicase.services.audit import Verb, audit_record
from emicase.services.search import signature_case_closed

Stage = Case.Stage

# Stage changes an engineer makes by hand. Reaching PROVEN takes a verified
# countermeasure (countermeasure_verify) and CLOSED takes case_close.
MANUAL_MOVES: dict[str, set[str]] = {
    Stage.LOGGED: {Stage.HUNTING, Stage.TRIAL},
    Stage.HUNTING: {Stage.LOGGED, Stage.TRIAL},
    Stage.TRIAL: {Stage.HUNTING},
    Stage.PROVEN: {Stage.TRIAL, Stage.HUNTING},
    Stage.CLOSED: set(),
}


def event_add(*, case: Case, kind: str, by=None, text: str = "", data: dict | None = None) -> CaseEvent:
    """Append a timeline event and mark the case as changed. Call inside the caller's transaction."""
    now = timezone.now()
    event = CaseEvent.objects.create(case=case, kind=kind, actor=by, at=now, text=text, data=data or {})
    Case.objects.filter(pk=case.pk).update(updated_at=now)
    if kind in (CaseEvent.Kind.STAGE, CaseEvent.Kind.CLOSED):
        _audit_stage(case, kind, by, text, data or {})
    return event


def _audit_stage(case: Case, kind: str, by, text: str, data: dict) -> None:
    """Stage changes, closures, waivers and reopenings go to the team's audit log too."""
    if kind == CaseEvent.Kind.CLOSED:
        verb = Verb.WAIVED if data.get("closure") == Case.Closure.WAIVED else Verb.CLOSED
    elif data.get("from") == Stage.CLOSED:
        verb = Verb.REOPENED
    else:
        verb = Verb.STAGE
    detail = f"{case.title}: {data.get('from', '')} → {data.get('to', Stage.CLOSED)}"
    audit_record(team=case.product.team_id, verb=verb, by=by, obj=case,
                 text=f"{detail} ({text})" if text else detail, data=data)


@transaction.atomic
def case_open(*, product: Product, title: str, by, owner=None) -> Case:
    require_role(by, product.team_id)
    title = title.strip()
    if not title:
        raise ValidationError({"title": "Give the case a title, e.g. 'Radiated fail at 75 MHz'."})
    case = Case.objects.create(product=product, title=title, opened_by=by, owner=owner or by)
    event_add(case=case, kind=CaseEvent.Kind.OPENED, by=by, text=title)
    return case


def case_open_by_system(*, product: Product, title: str, by) -> Case:
    """Open a case for a failing result an engineer logged earlier. Call inside a transaction."""
    case = Case.objects.create(product=product, title=title, opened_by=by, owner=by)
    event_add(case=case, kind=CaseEvent.Kind.OPENED, by=by, text=title)
    return case


@transaction.atomic
def case_move(*, case: Case, to: str, by, note: str = "") -> Case:
    """Move a case to another stage by hand (see MANUAL_MOVES)."""
    require_role(by, case.product.team_id)
    case = Case.objects.select_for_update().get(pk=case.pk)
    if to not in MANUAL_MOVES.get(case.stage, set()):
        raise ValidationError(
            f"A case cannot move from '{case.get_stage_display()}' to '{Stage(to).label if to in Stage.values else to}' by hand."
        )
    old = case.stage
    case.stage = to
    case.save(update_fields=["stage"])
    event_add(
        case=case, kind=CaseEvent.Kind.STAGE, by=by, text=note, data={"from": old, "to": to}
    )
    return case


def stage_set_by_system(*, case: Case, to: str, by, note: str = "") -> None:
    """Record a stage change that another service decided. Call inside its transaction."""
    if case.stage == to:
        return
    old = case.stage
    Case.objects.filter(pk=case.pk).update(stage=to)
    case.stage = to
    event_add(case=case, kind=CaseEvent.Kind.STAGE, by=by, text=note, data={"from": old, "to": to})


@transaction.atomic
def case_close(
    *, case: Case, by, closure: str, countermeasure: Countermeasure | None = None, reason: str = ""
) -> Case:
    """Close a case as fixed (naming its verified countermeasure) or waived (with a reason).

    Only a team lead closes a case.
    """
    require_role(by, case.product.team_id, LEAD_ROLES)
    case = Case.objects.select_for_update().get(pk=case.pk)
    if case.is_closed:
        raise ValidationError("This case is already closed.")
    reason = reason.strip()
    if closure == Case.Closure.FIXED:
        if countermeasure is None:
            raise ValidationError({"countermeasure": "Closing as fixed needs the countermeasure that fixed it."})
        countermeasure = Countermeasure.objects.get(pk=countermeasure.pk)  # judge its stored state
        if countermeasure.case_id != case.pk:
            raise ValidationError({"countermeasure": "That countermeasure belongs to another case."})
        if countermeasure.status != Countermeasure.Status.VERIFIED:
            raise ValidationError(
                {"countermeasure": "Only a verified countermeasure can close a case as fixed; verify it first."}
            )
    elif closure == Case.Closure.WAIVED:
        if not reason:
            raise ValidationError({"reason": "Say why the remaining emissions are accepted."})
        countermeasure = None
    else:
        raise ValidationError({"closure": "Choose fixed or waived."})
    old = case.stage
    case.stage = Stage.CLOSED
    case.closure = closure
    case.closure_reason = reason
    case.fixed_by = countermeasure
    case.closed_at = timezone.now()
    case.save(update_fields=["stage", "closure", "closure_reason", "fixed_by", "closed_at"])
    case.failing_frequencies.filter(is_open=True).update(is_open=closure != Case.Closure.FIXED)
    signature_case_closed(case=case)
    event_add(
        case=case,
        kind=CaseEvent.Kind.CLOSED,
        by=by,
        text=reason,
        data={"from": old, "closure": closure, "countermeasure": countermeasure.pk if countermeasure else None},
    )
    return case


@transaction.atomic
def case_reopen(*, case: Case, by, reason: str) -> Case:
    """Reopen a closed case (a lead's decision, e.g. the fix did not hold at the test house)."""
    require_role(by, case.product.team_id, LEAD_ROLES)
    case = Case.objects.select_for_update().get(pk=case.pk)
    if not case.is_closed:
        raise ValidationError("Only a closed case can be reopened.")
    if not reason.strip():
        raise ValidationError({"reason": "Say why the case is reopened."})
    case.stage = Stage.HUNTING
    case.closure = Case.Closure.OPEN
    case.closure_reason = ""
    case.fixed_by = None
    case.closed_at = None
    case.save(update_fields=["stage", "closure", "closure_reason", "fixed_by", "closed_at"])
    event_add(
        case=case, kind=CaseEvent.Kind.STAGE, by=by, text=reason.strip(), data={"from": Stage.CLOSED, "to": Stage.HUNTING}
    )
    # The search index copies each case's outcome; a reopened case has none again.
    from emicase.services.search import signature_case_outcome

    signature_case_outcome(case=case)
    return case


@transaction.atomic
def comment_add(*, case: Case, by, text: str) -> CaseEvent:
    require_role(by, case.product.team_id)
    text = text.strip()
    if not text:
        raise ValidationError({"text": "A comment needs some text."})
    return event_add(case=case, kind=CaseEvent.Kind.COMMENT, by=by, text=text)
