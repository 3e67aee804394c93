"""Pages about who may see what: a team's members, its audit log, and downloads of uploaded files."""

from __future__ import annotations

from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.core.exceptions import ValidationError
from django.core.paginator import Paginator
from django.shortcuts import get_object_or_404, redirect, render

from emicase import forms, selectors
from emicase.models import AuditEvent, Membership
from emicase.services import teams as team_svc
from emicase.services.access import LEAD_ROLES, require_role
from emicase.services.audit import audit_visible_to
from emicase.services.files import upload_file_response

AUDIT_PAGE_SIZE = 50


# ----------------------------------------------------------------- members


@login_required
def team_members(request, slug):
    """Leads add members, change roles and remove members; removing asks for confirmation first."""
    team = selectors.access_team(request.user, slug)
    require_role(request.user, team.pk, LEAD_ROLES)
    add_form = forms.MemberAddForm(request.POST if request.POST.get("action") == "add" else None)
    if request.method == "POST":
        action = request.POST.get("action")
        try:
            if action == "add":
                if add_form.is_valid():
                    member = team_svc.member_add(team=team, by=request.user, request=request,
                                                 **add_form.cleaned_data)
                    messages.success(request, f"{member.user.get_username()} joined {team.name}.")
                    return redirect("team_members", team.slug)
            elif action in ("role", "remove"):
                membership = get_object_or_404(Membership, pk=request.POST.get("membership"), team=team)
                if action == "role":
                    role_form = forms.MemberRoleForm(request.POST)
                    if not role_form.is_valid():
                        raise ValidationError(role_form.errors["role"])
                    team_svc.member_role_set(membership=membership, by=request.user, request=request,
                                             role=role_form.cleaned_data["role"])
                    messages.success(request, f"{membership.user.get_username()} is now "
                                              f"{Membership.Role(role_form.cleaned_data['role']).label.lower()}.")
                    return redirect("team_members", team.slug)
                if request.POST.get("confirmed") != "yes":
                    return render(request, "emicase/member_remove.html", {"team": team, "membership": membership})
                team_svc.member_remove(membership=membership, by=request.user, request=request)
                messages.success(request, f"{membership.user.get_username()} no longer belongs to {team.name}.")
                return redirect("team_members", team.slug)
            else:
                messages.error(request, "Unknown action.")
        except ValidationError as exc:
            if hasattr(exc, "error_dict") and action == "add":
                forms.apply_service_error(add_form, exc)
            else:
                for text in exc.messages:
                    messages.error(request, text)
    members = team.memberships.select_related("user").order_by("role", "user__username")
    return render(
        request,
        "emicase/team_members.html",
        {"team": team, "members": members, "add_form": add_form, "roles": Membership.Role.choices},
    )


# ----------------------------------------------------------------- audit log


@login_required
def team_audit(request, slug):
    team = selectors.access_team(request.user, slug)
    require_role(request.user, team.pk, LEAD_ROLES)
    events = audit_visible_to(request.user).filter(team=team)
    verb = request.GET.get("verb", "")
    if verb in AuditEvent.Verb.values:
        events = events.filter(verb=verb)
    page = Paginator(events, AUDIT_PAGE_SIZE).get_page(request.GET.get("page"))
    return render(
        request,
        "emicase/team_audit.html",
        {"team": team, "page": page, "verb": verb, "verbs": AuditEvent.Verb.choices},
    )


# ----------------------------------------------------------------- uploaded files


@login_required
def scan_file(request, scan_id):
    scan = selectors.access_scan(request.user, scan_id)
    return upload_file_response(scan, by=request.user, request=request)


@login_required
def capture_file(request, capture_id):
    capture = selectors.access_capture(request.user, capture_id)
    return upload_file_response(capture, by=request.user, request=request)

