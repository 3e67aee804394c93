"""The page where a user makes or revokes their token for scripts.

A token is shown once, right after it is made (the page after the redirect
pops it from the session); afterwards only its first characters are shown.
Making a new token replaces the old one, so a leaked key is dealt with by
making a new one or revoking it.
"""

from __future__ import annotations

from django.contrib import messages
from django.contrib.auth.decorators import login_required
from django.db import transaction
from django.shortcuts import redirect, render
from django.views.decorators.http import require_POST
from rest_framework.authtoken.models import Token

NEW_KEY = "emicase_new_api_token"


@transaction.atomic
def token_replace(*, user) -> Token:
    """Make the user a new token, revoking the one they had. Returns the new token."""
    Token.objects.filter(user=user).delete()
    return Token.objects.create(user=user)


@transaction.atomic
def token_revoke(*, user) -> bool:
    """Revoke the user's token. Returns whether there was one."""
    deleted, _ = Token.objects.filter(user=user).delete()
    return bool(deleted)


@login_required
def token_page(request):
    token = Token.objects.filter(user=request.user).first()
    new_key = request.session.pop(NEW_KEY, None)
    return render(
        request,
        "emicase/account/token.html",
        {"token": token, "new_key": new_key if token and new_key == token.key else None},
    )


@login_required
@require_POST
def token_create(request):
    token = token_replace(user=request.user)
    request.session[NEW_KEY] = token.key
    return redirect("account:token")


@login_required
def token_revoke_page(request):
    """GET asks for confirmation; POST revokes."""
    if request.method == "POST":
        if token_revoke(user=request.user):
            messages.success(
                request, "Your token is revoked: scripts using it are refused from now on."
            )
        return redirect("account:token")
    return render(
        request,
        "emicase/account/token_revoke.html",
        {"token": Token.objects.filter(user=request.user).first()},
    )
