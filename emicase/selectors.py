"""Reads, with the query count in mind, and the permission-checked fetch helpers.

Views and tasks get objects only through ``access_*`` helpers, so team
isolation is one small set of functions to test. An object of another team is
reported as missing (Http404), never as forbidden: its existence is not ours
to reveal.
"""

from __future__ import annotations

from django.db.models import F, Min, QuerySet
from django.http import Http404

from emicase.models import Capture, Case, Membership, Product, Revision, Scan, Team


def memberships_of(user) -> QuerySet[Membership]:
    if not user.is_authenticated:
        return Membership.objects.none()
    return Membership.objects.filter(user=user).select_related("team")


def teams_of(user) -> QuerySet[Team]:
    if not user.is_authenticated:
        return Team.objects.none()
    return Team.objects.filter(memberships__user=user)


def role_in(user, team_id: int) -> str | None:
    """The user's role in the team, or None when not a member."""
    if not user.is_authenticated:
        return None
    return Membership.objects.filter(user=user, team_id=team_id).values_list("role", flat=True).first()


def products_visible_to(user) -> QuerySet[Product]:
    return Product.objects.filter(team__in=teams_of(user))


def cases_visible_to(user) -> QuerySet[Case]:
    return (
        Case.objects.filter(product__team__in=teams_of(user))
        .select_related("product", "owner")
        .annotate(worst_margin_db=Min(F("failing_frequencies__limit_level") - F("failing_frequencies__level")))
    )


def _get_or_404(queryset: QuerySet, pk):
    try:
        return queryset.get(pk=pk)
    except (queryset.model.DoesNotExist, ValueError, TypeError):
        raise Http404(f"No {queryset.model._meta.verbose_name} {pk!r} here.") from None


def access_product(user, product_id) -> Product:
    return _get_or_404(products_visible_to(user).select_related("team"), product_id)


def access_revision(user, revision_id) -> Revision:
    return _get_or_404(
        Revision.objects.filter(product__team__in=teams_of(user)).select_related("product__team"), revision_id
    )


def access_case(user, case_id) -> Case:
    return _get_or_404(
        Case.objects.filter(product__team__in=teams_of(user)).select_related("product__team", "owner"), case_id
    )


def access_scan(user, scan_id) -> Scan:
    return _get_or_404(
        Scan.objects.filter(revision__product__team__in=teams_of(user)).select_related("revision__product__team"),
        scan_id,
    )


def access_capture(user, capture_id) -> Capture:
    return _get_or_404(
        Capture.objects.filter(case__product__team__in=teams_of(user)).select_related("case__product__team"),
        capture_id,
    )
