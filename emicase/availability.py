"""A database that is restarting or unreachable answers 503 with a Retry-After, never a 500.

While PostgreSQL restarts (or a network blip cuts a connection) every query
raises ``OperationalError``/``InterfaceError``. That is not a bug to show as an
internal error with a traceback: the request can simply be sent again in a few
seconds, and a client (the bench uploader, a load balancer's health check)
needs to be told so. The API's exception handler (``api/errors.py``) answers
JSON; this middleware answers the pages, with a page that reads no database
(no user, no team), since there is none to read.
"""

from __future__ import annotations

import logging

from django.db import InterfaceError, OperationalError
from django.http import JsonResponse
from django.template.response import TemplateResponse

log = logging.getLogger("emicase.availability")

# The exceptions a database that went away raises (Django wraps the driver's in these).
DATABASE_AWAY = (OperationalError, InterfaceError)
RETRY_AFTER_S = 5

PAGE_TEXT = "emicase cannot reach its database just now. Nothing you sent is lost; try again in a few seconds."


class DatabaseUnavailableMiddleware:
    """Turn a view's database-unavailable error into a 503 (JSON under /api/, a plain page elsewhere)."""

    def __init__(self, get_response):
        self.get_response = get_response

    def __call__(self, request):
        return self.get_response(request)

    def process_exception(self, request, exc):
        if not isinstance(exc, DATABASE_AWAY):
            return None
        first = str(exc).strip().splitlines()
        log.warning("503 for %s: database unavailable (%s: %s)", request.path, type(exc).__name__,
                    first[0] if first else "")
        if request.path.startswith("/api/") or request.path.startswith("/health/"):
            response = JsonResponse({"detail": PAGE_TEXT, "code": "service_unavailable"}, status=503)
        else:
            response = TemplateResponse(request, "503.html", {"text": PAGE_TEXT}, status=503).render()
        response["Retry-After"] = str(RETRY_AFTER_S)
        return response
