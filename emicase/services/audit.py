"""The audit log: append a line for the things a lead must be able to trace.

Which actions are recorded (sign-ins, stage changes, waivers, deletions,
sharing, membership, downloads of uploaded files) is decided by the services
that perform them; this module only writes the rows and wires the sign-in
signals. The log is read by team leads only (``audit_visible_to``).
"""

from __future__ import annotations

from django.contrib.auth import get_user_model
from django.contrib.auth.signals import user_logged_in, user_logged_out, user_login_failed
from django.db.models import QuerySet

from emicase.models import AuditEvent, Membership, Team

Verb = AuditEvent.Verb


def _name(user) -> str:
    if user is None or not getattr(user, "is_authenticated", False):
        return ""
    return user.get_username()


def _addr(request) -> str | None:
    if request is None:
        return None
    # REMOTE_ADDR is what the socket saw; behind a proxy that is the proxy (as configured in
    # production, gunicorn is given the client address by the proxy through forwarded-allow-ips).
    return request.META.get("REMOTE_ADDR") or None


def audit_record(
    *,
    team: Team | int,
    verb: str,
    by=None,
    obj=None,
    text: str = "",
    data: dict | None = None,
    request=None,
) -> AuditEvent:
    """Append one line to ``team``'s log. Call inside the caller's transaction."""
    return AuditEvent.objects.create(
        team_id=team if isinstance(team, int) else team.pk,
        verb=verb,
        actor=by if getattr(by, "is_authenticated", False) else None,
        actor_name=_name(by),
        object_type=type(obj).__name__.lower() if obj is not None else "",
        object_id=getattr(obj, "pk", None),
        text=text[:300],
        data=data or {},
        remote_addr=_addr(request),
    )


def _record_for_each_team(user, verb: str, request, text: str = "") -> None:
    team_ids = list(Membership.objects.filter(user=user).values_list("team_id", flat=True))
    AuditEvent.objects.bulk_create(
        AuditEvent(team_id=tid, verb=verb, actor=user, actor_name=user.get_username(), text=text,
                   remote_addr=_addr(request), object_type="user", object_id=user.pk)
        for tid in team_ids
    )


def _on_logged_in(sender, request, user, **kwargs) -> None:
    _record_for_each_team(user, Verb.SIGNED_IN, request)


def _on_logged_out(sender, request, user, **kwargs) -> None:
    if user is not None:
        _record_for_each_team(user, Verb.SIGNED_OUT, request)


def _on_login_failed(sender, credentials, request=None, **kwargs) -> None:
    # Only a failed sign-in for a known user name has a team to tell; the
    # password is never in ``credentials`` here (Django cleanses it).
    username = credentials.get("username") or ""
    user = get_user_model().objects.filter(username=username).first()
    if user is not None:
        _record_for_each_team(user, Verb.SIGN_IN_FAILED, request, text="wrong password")


def connect_signals() -> None:
    user_logged_in.connect(_on_logged_in, dispatch_uid="emicase-audit-login")
    user_logged_out.connect(_on_logged_out, dispatch_uid="emicase-audit-logout")
    user_login_failed.connect(_on_login_failed, dispatch_uid="emicase-audit-login-failed")


def audit_visible_to(user) -> QuerySet[AuditEvent]:
    """The log lines of the teams ``user`` leads (nothing for anyone else)."""
    if user is None or not user.is_authenticated:
        return AuditEvent.objects.none()
    led = Membership.objects.filter(user=user, role=Membership.Role.LEAD).values("team_id")
    return AuditEvent.objects.filter(team_id__in=led).select_related("team")
