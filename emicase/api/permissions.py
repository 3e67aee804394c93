"""Who sees and who changes what through the API.

Reading is scoped by team: every queryset the API serves is filtered to the
requesting user's teams, so another team's object is simply not found (404,
never 403). Writing needs a lead or engineer role in the object's team; the
services check that again (and the lead-only rules, such as closing a case).
"""

from __future__ import annotations

from django.db import models
from django.db.models import QuerySet
from rest_framework.permissions import SAFE_METHODS, BasePermission

from emicase import models as m
from emicase.selectors import role_in, teams_of
from emicase.services.access import WRITE_ROLES

# How each model reaches its team, as a lookup path.
TEAM_PATH: dict[type[models.Model], str] = {
    m.Product: "team",
    m.Revision: "product__team",
    m.EmissionSource: "revision__product__team",
    m.Case: "product__team",
    m.Scan: "revision__product__team",
    m.FailingFrequency: "case__product__team",
    m.Capture: "case__product__team",
    m.Countermeasure: "case__product__team",
    m.Verification: "countermeasure__case__product__team",
    m.CaseEvent: "case__product__team",
}


def scoped(model: type[models.Model], user, queryset: QuerySet | None = None) -> QuerySet:
    """``queryset`` (default: all rows of ``model``) narrowed to the user's teams."""
    queryset = model._default_manager.all() if queryset is None else queryset
    if model is m.Team:
        return queryset.filter(pk__in=teams_of(user))
    return queryset.filter(**{f"{TEAM_PATH[model]}__in": teams_of(user)})


def team_id_of(obj: models.Model) -> int:
    """The id of the team ``obj`` belongs to (walks TEAM_PATH; a few queries at most)."""
    if isinstance(obj, m.Team):
        return obj.pk
    *hops, _team = TEAM_PATH[type(obj)].split("__")
    for hop in hops:
        obj = getattr(obj, hop)
    return obj.team_id


class RoleAllowsWrite(BasePermission):
    """Any member reads; writing takes a lead or engineer role.

    A user who writes in none of their teams is refused before the request
    body is even validated; otherwise the object's own team decides.
    """

    message = "Your role in this team does not allow this."

    def has_permission(self, request, view) -> bool:
        if request.method in SAFE_METHODS:
            return True
        return m.Membership.objects.filter(user=request.user, role__in=WRITE_ROLES).exists()

    def has_object_permission(self, request, view, obj) -> bool:
        if request.method in SAFE_METHODS:
            return True
        return role_in(request.user, team_id_of(obj)) in WRITE_ROLES
