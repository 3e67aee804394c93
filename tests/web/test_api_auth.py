"""Signing in to the API: tokens for scripts (made and revoked on the account page or by command),
the session for the browser, throttling of token clients, and the schema and docs pages."""

from __future__ import annotations

import io
import json
from html.parser import HTMLParser

import pytest
from django.contrib.staticfiles import finders
from django.core.cache import cache
from django.core.management import CommandError, call_command
from django.test import Client
from rest_framework.authtoken.models import Token
from rest_framework.test import APIClient


@pytest.fixture(autouse=True)
def _fresh_throttle_counts():
    # Throttle counts live in the cache, which outlives a test's database.
    cache.clear()
    yield
    cache.clear()


def with_token(key: str) -> APIClient:
    client = APIClient()
    client.credentials(HTTP_AUTHORIZATION=f"Token {key}")
    return client


# ----------------------------------------------------------------- tokens


def test_a_token_signs_a_script_in_as_its_user(engineer, case):
    token = Token.objects.create(user=engineer)
    response = with_token(token.key).get("/api/cases/")
    assert response.status_code == 200
    assert [c["id"] for c in response.json()["results"]] == [case.pk]


def test_a_revoked_token_is_refused_with_401(engineer, case):
    token = Token.objects.create(user=engineer)
    client = with_token(token.key)
    assert client.get(f"/api/cases/{case.pk}/").status_code == 200
    call_command("api_token", "revoke", "engineer", stdout=io.StringIO())
    refused = client.get(f"/api/cases/{case.pk}/")
    assert refused.status_code == 401
    assert refused.json() == {"detail": "Invalid token."}


def test_a_made_up_token_is_refused(case):
    assert with_token("0" * 40).get("/api/cases/").status_code == 401


def test_the_command_makes_and_revokes_tokens(engineer):
    out = io.StringIO()
    call_command("api_token", "create", "engineer", stdout=out)
    key = out.getvalue().strip()
    assert Token.objects.get(user=engineer).key == key and len(key) == 40
    with pytest.raises(CommandError, match="already has a token"):
        call_command("api_token", "create", "engineer", stdout=io.StringIO())
    out = io.StringIO()
    call_command("api_token", "create", "engineer", "--replace", stdout=out)
    assert out.getvalue().strip() != key
    assert not Token.objects.filter(key=key).exists()
    call_command("api_token", "revoke", "engineer", stdout=io.StringIO())
    assert not Token.objects.filter(user=engineer).exists()
    with pytest.raises(CommandError, match="has no token"):
        call_command("api_token", "revoke", "engineer")
    with pytest.raises(CommandError, match="No user named 'nobody'"):
        call_command("api_token", "create", "nobody")


def test_the_token_page_needs_a_signed_in_user(db):
    response = Client().get("/account/token/")
    assert response.status_code == 302 and "/signin/" in response["Location"]
    assert Client().post("/account/token/new/").status_code == 302
    assert not Token.objects.exists()


def test_the_token_page_shows_a_new_key_once(engineer):
    browser = Client()
    browser.force_login(engineer)
    assert "You have no token" in browser.get("/account/token/").content.decode()
    assert browser.get("/account/token/new/").status_code == 405  # making one takes a POST
    page = browser.post("/account/token/new/", follow=True).content.decode()
    key = Token.objects.get(user=engineer).key
    assert key in page and "not shown again" in page
    later = browser.get("/account/token/").content.decode()
    assert key not in later and key[:6] in later


def test_revoking_on_the_page_asks_first(engineer):
    key = Token.objects.create(user=engineer).key
    browser = Client()
    browser.force_login(engineer)
    confirm = browser.get("/account/token/revoke/").content.decode()
    assert "Yes, revoke it" in confirm
    assert Token.objects.filter(key=key).exists()  # asking changed nothing
    done = browser.post("/account/token/revoke/", follow=True).content.decode()
    assert "revoked" in done and not Token.objects.filter(user=engineer).exists()
    assert with_token(key).get("/api/cases/").status_code == 401


def test_the_token_forms_are_csrf_protected(engineer):
    browser = Client(enforce_csrf_checks=True)
    browser.force_login(engineer)
    assert browser.post("/account/token/new/").status_code == 403
    Token.objects.create(user=engineer)
    assert browser.post("/account/token/revoke/").status_code == 403
    assert Token.objects.filter(user=engineer).exists()


def test_a_browser_session_reads_the_api_and_writes_only_with_its_csrf_token(engineer, case):
    browser = Client(enforce_csrf_checks=True)
    browser.force_login(engineer)
    assert browser.get(f"/api/cases/{case.pk}/").status_code == 200
    refused = browser.post(
        f"/api/cases/{case.pk}/comments/", {"text": "hi"}, content_type="application/json"
    )
    assert refused.status_code == 403 and "CSRF" in refused.json()["detail"]


# ----------------------------------------------------------------- throttling


def test_token_clients_are_throttled_and_browsers_are_not(settings, engineer, case):
    settings.REST_FRAMEWORK = {
        **settings.REST_FRAMEWORK,
        "DEFAULT_THROTTLE_RATES": {"token": "3/min"},
    }
    script = with_token(Token.objects.create(user=engineer).key)
    assert [script.get("/api/cases/").status_code for _ in range(4)] == [200, 200, 200, 429]
    assert "Retry-After" in script.get("/api/cases/")
    browser = APIClient()
    browser.force_login(engineer)
    assert {browser.get("/api/cases/").status_code for _ in range(5)} == {200}


# ----------------------------------------------------------------- schema and docs


def test_the_schema_is_openapi_3_and_validates_without_warnings(db, tmp_path):
    target = tmp_path / "schema.json"
    # --fail-on-warn turns any warning of the generator into an error; --validate checks it against the OpenAPI spec.
    call_command(
        "spectacular",
        "--validate",
        "--fail-on-warn",
        "--format",
        "openapi-json",
        "--file",
        str(target),
    )
    schema = json.loads(target.read_text())
    assert schema["openapi"].startswith("3.")
    assert {"/api/captures/", "/api/cases/{id}/move/", "/api/captures/{id}/envelope/"} <= set(
        schema["paths"]
    )
    # A stage changes only through an action, never by writing the field.
    assert set(schema["paths"]["/api/cases/{id}/"]) == {"get"}
    assert schema["components"]["schemas"]["CaseMoveRequest"]["required"] == ["to"]
    upload = schema["paths"]["/api/captures/"]["post"]
    assert "multipart/form-data" in upload["requestBody"]["content"]
    assert any(p["name"] == "Idempotency-Key" and p["in"] == "header" for p in upload["parameters"])


def test_the_schema_is_served(client):
    response = client.get("/api/schema/", HTTP_ACCEPT="application/vnd.oai.openapi+json")
    assert response.status_code == 200
    assert json.loads(response.content)["info"]["title"] == "emicase API"


class _References(HTMLParser):
    def __init__(self):
        super().__init__()
        self.urls: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.urls += [value for name, value in attrs if name in ("src", "href") and value]


def test_the_docs_page_loads_only_local_assets(client, settings):
    response = client.get("/api/docs/")
    assert response.status_code == 200
    html = response.content.decode()
    refs = _References()
    refs.feed(html)
    assert refs.urls, "found no assets on the docs page"
    for url in refs.urls:
        assert url.startswith(
            settings.STATIC_URL if settings.STATIC_URL.startswith("/") else "/"
        ), url
        assert "//" not in url, url
        assert finders.find(
            url.removeprefix("/").removeprefix(settings.STATIC_URL.strip("/") + "/")
        ), url
    assert "http://" not in html and "https://" not in html
    assert '"validatorUrl": null' in html  # no call to an outside validator either
