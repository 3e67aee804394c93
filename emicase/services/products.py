"""Products, revisions, their known emission sources, and a team's settings."""

from __future__ import annotations

from django.core.exceptions import ValidationError
from django.db import transaction

from emicase.models import Capture, Case, EmissionSource, Product, Revision, Scan, Team
from emicase.services.access import LEAD_ROLES, require_role
from emicase.services.analysis import reread_enqueue
from emicase.services.audit import Verb, audit_record


@transaction.atomic
def product_create(*, team: Team, by, name: str, description: str = "") -> Product:
    require_role(by, team.pk)
    product = Product(team=team, name=name.strip(), description=description.strip())
    product.full_clean()
    product.save()
    return product


@transaction.atomic
def revision_create(*, product: Product, by, hardware_label: str, firmware_label: str = "", notes: str = "",
                    copy_sources_from: Revision | None = None) -> Revision:
    """A new revision; its known sources can be copied from an earlier one (boards keep most clocks)."""
    require_role(by, product.team_id)
    rev = Revision(product=product, hardware_label=hardware_label.strip(), firmware_label=firmware_label.strip(),
                   notes=notes.strip())
    rev.full_clean()
    rev.save()
    if copy_sources_from is not None:
        if copy_sources_from.product_id != product.pk:
            raise ValidationError({"copy_sources_from": "Copy sources only from a revision of the same product."})
        EmissionSource.objects.bulk_create(
            EmissionSource(revision=rev, name=s.name, kind=s.kind, nominal_frequency_hz=s.nominal_frequency_hz,
                           tolerance_hz=s.tolerance_hz)
            for s in copy_sources_from.sources.all()
        )
    return rev


def _cases_using(revision: Revision) -> set[int]:
    ids = set(Capture.objects.filter(revision=revision).values_list("case_id", flat=True))
    ids |= set(Scan.objects.filter(revision=revision, case__isnull=False).values_list("case_id", flat=True))
    return ids


@transaction.atomic
def source_save(*, revision: Revision, by, name: str, kind: str, nominal_frequency_hz: float, tolerance_hz: float,
                source: EmissionSource | None = None) -> EmissionSource:
    """Add a known source to a revision, or change ``source``. Re-reads the cases that use the revision."""
    require_role(by, revision.product.team_id)
    if source is not None and source.revision_id != revision.pk:
        raise ValidationError("That source belongs to another revision.")
    src = source or EmissionSource(revision=revision)
    src.name, src.kind = name.strip(), kind
    src.nominal_frequency_hz, src.tolerance_hz = nominal_frequency_hz, tolerance_hz
    src.full_clean()
    src.save()
    reread_enqueue(_cases_using(revision))
    return src


@transaction.atomic
def source_delete(*, source: EmissionSource, by) -> None:
    revision = source.revision
    require_role(by, revision.product.team_id)
    audit_record(
        team=revision.product.team_id, verb=Verb.DELETED, by=by, obj=source,
        text=f"Known source {source.name} ({source.nominal_frequency_hz / 1e6:g} MHz) of "
             f"{revision.product.name} rev {revision.hardware_label}",
    )
    source.delete()
    reread_enqueue(_cases_using(revision))


@transaction.atomic
def team_settings_update(*, team: Team, by, guard_band_db: float | None = None,
                         frequency_tolerance_pct: float | None = None,
                         share_closed_cases: bool | None = None, request=None) -> Team:
    """A lead changes the team's guard band, frequency tolerance or sharing; open cases are re-read."""
    require_role(by, team.pk, LEAD_ROLES)
    team = Team.objects.select_for_update().get(pk=team.pk)
    old_tol, old_guard, old_share = team.frequency_tolerance_pct, team.guard_band_db, team.share_closed_cases
    if guard_band_db is not None:
        team.guard_band_db = guard_band_db
    if frequency_tolerance_pct is not None:
        team.frequency_tolerance_pct = frequency_tolerance_pct
    if share_closed_cases is not None:
        team.share_closed_cases = share_closed_cases
    team.full_clean()
    team.save()
    if team.share_closed_cases != old_share:
        audit_record(
            team=team, verb=Verb.SHARING, by=by, obj=team, request=request,
            text=("Closed cases shared with every team of this installation" if team.share_closed_cases
                  else "Closed cases no longer shared"),
            data={"share_closed_cases": team.share_closed_cases},
        )
    if (team.guard_band_db, team.frequency_tolerance_pct) != (old_guard, old_tol):
        audit_record(
            team=team, verb=Verb.SETTINGS, by=by, obj=team, request=request,
            text=f"Guard band {old_guard:g} → {team.guard_band_db:g} dB, "
                 f"tolerance {old_tol:g} → {team.frequency_tolerance_pct:g} %",
        )
    if team.frequency_tolerance_pct != old_tol:
        reread_enqueue(Case.objects.filter(product__team=team).exclude(stage=Case.Stage.CLOSED)
                       .values_list("pk", flat=True))
    return team
