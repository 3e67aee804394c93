"""The API's error responses: field-by-field JSON with words a user can act on."""

from __future__ import annotations

from django.core.exceptions import NON_FIELD_ERRORS
from django.core.exceptions import ValidationError as DjangoValidationError
from rest_framework import exceptions
from rest_framework.settings import api_settings
from rest_framework.views import exception_handler as drf_exception_handler


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


def exception_handler(exc, context):
    """DRF's handler, which also turns a service's ValidationError into a 400 (Http404 and PermissionDenied it knows)."""
    if isinstance(exc, DjangoValidationError):
        exc = exceptions.ValidationError(as_field_errors(exc))
    return drf_exception_handler(exc, context)
