"""Refuse an oversized request before its body is read.

Each upload form and API endpoint checks its own file against the per-kind
limits (``EMICASE_MAX_SPECTRUM_BYTES``, ``EMICASE_MAX_TIME_RECORD_BYTES``);
this cap stops a request that could never pass them before Django spools it to
disk, with a 413 that says what the limit is. The reverse proxy in front of
gunicorn should carry the same cap (e.g. nginx ``client_max_body_size``).
"""

from __future__ import annotations

from django.conf import settings
from django.http import JsonResponse
from django.template.response import TemplateResponse


def _mb(n: int) -> str:
    if n < 2**20:
        return f"{n / 2**10:.0f} kB"
    return f"{n / 2**20:.0f} MB"


class RequestSizeLimitMiddleware:
    def __init__(self, get_response):
        self.get_response = get_response

    def __call__(self, request):
        try:
            length = int(request.META.get("CONTENT_LENGTH") or 0)
        except ValueError:
            length = 0
        cap = settings.EMICASE_MAX_REQUEST_BYTES
        if length > cap:
            text = (
                f"This upload is {_mb(length)}; this installation accepts at most {_mb(cap)} per request "
                f"(spectra up to {_mb(settings.EMICASE_MAX_SPECTRUM_BYTES)}, time records up to "
                f"{_mb(settings.EMICASE_MAX_TIME_RECORD_BYTES)}). Nothing was stored. Decimate the record "
                "on the instrument, or ask the administrator to raise the limit."
            )
            # The body is left unread: closing the connection spares the server the rest of it.
            if request.path.startswith("/api/"):
                response = JsonResponse({"detail": text, "code": "too_large"}, status=413)
            else:
                response = TemplateResponse(request, "413.html", {"text": text}, status=413).render()
            response["Connection"] = "close"
            return response
        return self.get_response(request)
