"""Who may change what. Reading is scoped by ``emicase.selectors``."""

from __future__ import annotations

from django.core.exceptions import PermissionDenied

from emicase.models import Membership

WRITE_ROLES = (Membership.Role.LEAD, Membership.Role.ENGINEER)
LEAD_ROLES = (Membership.Role.LEAD,)


def require_role(user, team_id: int, roles=WRITE_ROLES) -> str:
    """Return the user's role in the team; PermissionDenied if not one of ``roles``."""
    role = (
        Membership.objects.filter(user=user, team_id=team_id).values_list("role", flat=True).first()
        if user is not None and user.is_authenticated
        else None
    )
    if role not in roles:
        raise PermissionDenied("Your role in this team does not allow this.")
    return role
