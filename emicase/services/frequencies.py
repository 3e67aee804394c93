"""A case's failing frequencies: the analysis proposes, an engineer confirms or edits.

Every change queues one re-read of the case, so captures are read again at
the frequencies that now matter.
"""

from __future__ import annotations

from django.core.exceptions import ValidationError
from django.db import transaction

from emicase.models import Case, CaseEvent, FailingFrequency
from emicase.services.access import require_role
from emicase.services.analysis import reread_enqueue
from emicase.services.cases import event_add


def _check_writable(case: Case, by) -> None:
    require_role(by, case.product.team_id)
    if case.is_closed:
        raise ValidationError("The case is closed; reopen it to change its failing frequencies.")


@transaction.atomic
def failing_frequencies_confirm(*, case: Case, by, keep_ids: list[int]) -> int:
    """Confirm the proposals in ``keep_ids`` and drop the case's other unconfirmed proposals. Returns how many are confirmed."""
    _check_writable(case, by)
    proposals = case.failing_frequencies.filter(confirmed=False)
    unknown = set(keep_ids) - set(proposals.values_list("pk", flat=True)) - set(
        case.failing_frequencies.filter(confirmed=True).values_list("pk", flat=True)
    )
    if unknown:
        raise ValidationError(f"Not failing frequencies of this case: {sorted(unknown)}")
    confirmed = proposals.filter(pk__in=keep_ids).update(confirmed=True)
    dropped, _ = proposals.exclude(pk__in=keep_ids).delete()
    event_add(case=case, kind=CaseEvent.Kind.FREQUENCIES, by=by,
              text=f"{confirmed} confirmed, {dropped} proposals dropped", data={"confirmed": keep_ids})
    reread_enqueue([case.pk])
    return confirmed


@transaction.atomic
def failing_frequency_add(
    *, case: Case, by, frequency_hz: float, level: float, limit_level: float, unit: str = "dBuV/m",
    detector: str = "quasi-peak", polarisation: str = "", mains_line: str = "",
) -> FailingFrequency:
    """Add a failing frequency by hand (e.g. from a test-house report with no trace file)."""
    _check_writable(case, by)
    ff = FailingFrequency(
        case=case, frequency_hz=frequency_hz, level=level, limit_level=limit_level, unit=unit, detector=detector,
        polarisation=polarisation, mains_line=mains_line, confirmed=True,
    )
    ff.full_clean()
    ff.save()
    event_add(case=case, kind=CaseEvent.Kind.FREQUENCIES, by=by, text=f"Added {ff}", data={"added": ff.pk})
    reread_enqueue([case.pk])
    return ff


@transaction.atomic
def failing_frequency_update(*, failing_frequency: FailingFrequency, by, **changes) -> FailingFrequency:
    """Edit frequency, level, limit or whether it is still open."""
    ff = FailingFrequency.objects.select_related("case__product").get(pk=failing_frequency.pk)
    _check_writable(ff.case, by)
    allowed = {"frequency_hz", "level", "limit_level", "is_open", "confirmed"}
    bad = set(changes) - allowed
    if bad:
        raise ValidationError(f"Cannot change {sorted(bad)} of a failing frequency.")
    for name, value in changes.items():
        setattr(ff, name, value)
    ff.full_clean()
    ff.save()
    event_add(case=ff.case, kind=CaseEvent.Kind.FREQUENCIES, by=by, text=f"Edited {ff}",
              data={"edited": ff.pk, "changes": {k: v for k, v in changes.items()}})
    reread_enqueue([ff.case_id])
    return ff
