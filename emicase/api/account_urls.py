"""Account pages of the API side: the user's token for scripts (mounted at /account/)."""

from django.urls import path

from emicase.api import account

app_name = "account"

urlpatterns = [
    path("token/", account.token_page, name="token"),
    path("token/new/", account.token_create, name="token-create"),
    path("token/revoke/", account.token_revoke_page, name="token-revoke"),
]
