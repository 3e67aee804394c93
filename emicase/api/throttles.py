"""Fair use for scripts: a request rate per token client.

Throttling is a fairness tool, not security (a bench script stuck in a loop
should not starve the lab's browsers). Browser sessions pass untouched. The
rate is ``REST_FRAMEWORK["DEFAULT_THROTTLE_RATES"]["token"]`` (e.g. "600/min",
set by EMICASE_API_TOKEN_RATE); counts live in Django's cache, so several
server processes need a shared cache (Redis) to count together.
"""

from __future__ import annotations

import logging

from redis.exceptions import RedisError
from rest_framework.authentication import TokenAuthentication
from rest_framework.settings import api_settings
from rest_framework.throttling import UserRateThrottle

log = logging.getLogger("emicase.api")


class TokenClientThrottle(UserRateThrottle):
    scope = "token"

    def get_rate(self) -> str | None:
        # Read the settings on every request rather than once at import, so a
        # changed rate applies (and tests can set one).
        return api_settings.DEFAULT_THROTTLE_RATES.get(self.scope)

    def allow_request(self, request, view) -> bool:
        if not isinstance(request.successful_authenticator, TokenAuthentication):
            return True
        try:
            return super().allow_request(request, view)
        except (OSError, RedisError) as exc:
            # The shared cache (Redis) is restarting: count nothing rather than refuse or
            # crash the request. Fairness can wait a few seconds; the upload cannot.
            log.warning("throttle cache unavailable (%s: %s); request let through", type(exc).__name__, exc)
            return True
