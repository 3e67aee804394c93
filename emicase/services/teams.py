"""A team's members: a lead adds people, changes their role and removes them.

A team always keeps at least one lead, so nobody can lock the team out of its
own settings, and every change goes to the audit log.
"""

from __future__ import annotations

from django.contrib.auth import get_user_model
from django.core.exceptions import ValidationError
from django.db import transaction

from emicase.models import Membership, Team
from emicase.services.access import LEAD_ROLES, require_role
from emicase.services.audit import Verb, audit_record

Role = Membership.Role


def _check_role(role: str) -> None:
    if role not in Role.values:
        raise ValidationError({"role": f"Choose one of: {', '.join(Role.labels)}."})


def _leads_left(team: Team, without: Membership) -> int:
    return team.memberships.filter(role=Role.LEAD).exclude(pk=without.pk).count()


@transaction.atomic
def member_add(*, team: Team, by, username: str, role: str, request=None) -> Membership:
    require_role(by, team.pk, LEAD_ROLES)
    _check_role(role)
    username = username.strip()
    user = get_user_model().objects.filter(username=username, is_active=True).first()
    if user is None:
        raise ValidationError({"username": f"No active account is called '{username}'."})
    if team.memberships.filter(user=user).exists():
        raise ValidationError({"username": f"{username} is already a member of {team.name}."})
    membership = Membership.objects.create(team=team, user=user, role=role)
    audit_record(team=team, verb=Verb.MEMBER_ADDED, by=by, obj=membership, request=request,
                 text=f"{username} as {membership.get_role_display()}", data={"user": user.pk, "role": role})
    return membership


@transaction.atomic
def member_role_set(*, membership: Membership, by, role: str, request=None) -> Membership:
    require_role(by, membership.team_id, LEAD_ROLES)
    _check_role(role)
    membership = Membership.objects.select_for_update().select_related("team", "user").get(pk=membership.pk)
    old = membership.role
    if old == role:
        return membership
    if old == Role.LEAD and _leads_left(membership.team, membership) == 0:
        raise ValidationError({"role": f"{membership.team.name} needs at least one lead; make someone else lead first."})
    membership.role = role
    membership.save(update_fields=["role"])
    audit_record(team=membership.team, verb=Verb.MEMBER_ROLE, by=by, obj=membership, request=request,
                 text=f"{membership.user.get_username()}: {Role(old).label} → {membership.get_role_display()}",
                 data={"user": membership.user_id, "from": old, "to": role})
    return membership


@transaction.atomic
def member_remove(*, membership: Membership, by, request=None) -> None:
    require_role(by, membership.team_id, LEAD_ROLES)
    membership = Membership.objects.select_for_update().select_related("team", "user").get(pk=membership.pk)
    if membership.role == Role.LEAD and _leads_left(membership.team, membership) == 0:
        raise ValidationError(f"{membership.team.name} needs at least one lead; make someone else lead first.")
    audit_record(team=membership.team, verb=Verb.MEMBER_REMOVED, by=by, obj=membership, request=request,
                 text=f"{membership.user.get_username()} ({membership.get_role_display()})",
                 data={"user": membership.user_id, "role": membership.role})
    membership.delete()
