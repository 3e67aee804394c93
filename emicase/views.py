"""Pages. Thin: validate input, call a service or a selector, render."""

from django.contrib.auth.decorators import login_required
from django.db import connection
from django.http import JsonResponse
from django.shortcuts import render

from emicase import selectors


@login_required
def home(request):
    cases = selectors.cases_visible_to(request.user).exclude(stage="closed").order_by("stage", "-updated_at")
    return render(
        request,
        "emicase/home.html",
        {"memberships": selectors.memberships_of(request.user), "cases": cases},
    )


def health(request):
    """For load balancers: the process answers and reaches its database."""
    with connection.cursor() as cursor:
        cursor.execute("SELECT 1")
    return JsonResponse({"ok": True})
