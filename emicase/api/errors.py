"""The API's error responses: field-by-field JSON with words a user can act on."""

from __future__ import annotations

import logging

from django.core.exceptions import NON_FIELD_ERRORS
from django.core.exceptions import ValidationError as DjangoValidationError
from rest_framework import exceptions
from rest_framework.settings import api_settings
from rest_framework.views import exception_handler as drf_exception_handler

from emicase.availability import DATABASE_AWAY, RETRY_AFTER_S

log = logging.getLogger("emicase.api")


def as_field_errors(exc: DjangoValidationError) -> dict[str, list[str]]:
    """A service's ValidationError as DRF's shape: {field: [messages]}, non-field ones under non_field_errors."""
    if hasattr(exc, "error_dict"):
        return {
            (api_settings.NON_FIELD_ERRORS_KEY if field == NON_FIELD_ERRORS else field): list(
                messages
            )
            for field, messages in exc.message_dict.items()
        }
    return {api_settings.NON_FIELD_ERRORS_KEY: list(exc.messages)}


class ServiceUnavailable(exceptions.APIException):
    status_code = 503
    default_code = "service_unavailable"
    default_detail = (
        "The database did not answer; nothing is lost, try again in a few seconds. An upload sent again "
        "with the same Idempotency-Key is never stored twice."
    )


def exception_handler(exc, context):
    """DRF's handler, which also turns a service's ValidationError into a 400 (Http404 and PermissionDenied it knows).

    A database that is restarting or unreachable answers 503 with a Retry-After, which
    clients (the bench uploader among them) retry, instead of a 500 and a traceback.
    """
    if isinstance(exc, DjangoValidationError):
        exc = exceptions.ValidationError(as_field_errors(exc))
    elif isinstance(exc, DATABASE_AWAY):
        log.warning("503 for %s: database unavailable (%s: %s)", _path(context), type(exc).__name__,
                    str(exc).strip().splitlines()[0] if str(exc).strip() else "")
        response = drf_exception_handler(ServiceUnavailable(), context)
        response["Retry-After"] = str(RETRY_AFTER_S)
        return response
    return drf_exception_handler(exc, context)


def _path(context) -> str:
    request = context.get("request")
    return getattr(request, "path", "?")
