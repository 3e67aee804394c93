"""Writes the pages need that the other services do not offer.

Only one so far: a verification from after-captures, the quick near-field
check before a new scan gives the verdict.
"""

from __future__ import annotations

from django.core.exceptions import ValidationError
from django.db import transaction

from emicase.models import Countermeasure, Verification
from emicase.services.access import require_role
from emicase.services.countermeasures import verification_record_levels


@transaction.atomic
def verification_from_captures(
    *, countermeasure: Countermeasure, by, note: str = ""
) -> Verification:
    """Record a verification estimated from after-captures; returns it.

    At each open failing frequency, the level after = the failing level + the
    change the probe saw at the spot that was loudest there before (same
    location, board side, probe kind and tip; see
    ``selectors.capture_pairs``). A frequency no pair covers gets no level,
    which verification counts as a shortfall. Requires an engineer or lead.
    """
    from emicase.selectors import capture_pairs

    require_role(by, countermeasure.case.product.team_id)
    pairs = capture_pairs(countermeasure)
    if not pairs:
        raise ValidationError(
            {
                "captures": "No analysed after-capture matches a spot of the hunt (same location, side, probe and tip)."
            }
        )
    levels_after: dict[int, float | None] = {}
    for ff in countermeasure.case.failing_frequencies.filter(is_open=True):
        covered = [p for p in pairs if p.change_db.get(ff.pk) is not None]
        if not covered:
            levels_after[ff.pk] = None
            continue
        hottest = max(covered, key=lambda p: p.before_level[ff.pk])
        levels_after[ff.pk] = ff.level + hottest.change_db[ff.pk]
    spots = ", ".join(sorted({p.after.location for p in pairs}))
    text = (
        f"Estimated from near-field captures at {spots}: level after = failing level + the change at the "
        "loudest spot. A new scan gives the verdict."
    )
    if note.strip():
        text = f"{note.strip()} ({text})"
    return verification_record_levels(
        countermeasure=countermeasure, by=by, levels_after=levels_after, note=text
    )
