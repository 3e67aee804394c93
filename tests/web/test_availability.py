"""When the broker or the database is away for a moment: accept what can be kept, refuse with a 503 the rest.

The whole-stack versions (real servers restarted during a burst) are in test_faults.py; these
pin each behaviour on the suite's own database, with the outage simulated where it strikes.
"""

from __future__ import annotations

import logging
from datetime import timedelta

import pytest
from django.core.files.uploadedfile import SimpleUploadedFile
from django.db import OperationalError
from kombu.exceptions import OperationalError as BrokerError
from redis.exceptions import ConnectionError as RedisConnectionError
from rest_framework.authtoken.models import Token
from rest_framework.test import APIClient

from emicase import selectors, tasks
from emicase.models import AnalysisStatus, Capture
from emicase.services.sweeper import sweep_stuck
from tests.web.traces import receiver_csv


def _post_capture(client, case, name="nf.csv"):
    content = receiver_csv([(75e6, 48.0)], unit="dBµV", points=201)
    return client.post(
        "/api/captures/",
        {"case": case.pk, "file": SimpleUploadedFile(name, content), "probe_kind": "h_field",
         "tip": "loop 10 mm", "location": "U4"},
        format="multipart",
    )


@pytest.fixture
def api(engineer):
    client = APIClient()
    client.credentials(HTTP_AUTHORIZATION=f"Token {Token.objects.create(user=engineer).key}")
    return client


def test_an_upload_is_accepted_while_the_broker_is_down_and_the_sweeper_queues_it(
    api, case, revision, monkeypatch, caplog, django_capture_on_commit_callbacks
):
    def broker_down(pk):
        raise BrokerError("Error 111 connecting to 127.0.0.1:6379. Connection refused.")

    monkeypatch.setattr(tasks.analyse_capture, "delay", broker_down)
    with caplog.at_level(logging.WARNING, logger="emicase.uploads"), \
            django_capture_on_commit_callbacks(execute=True):
        response = _post_capture(api, case)
    # Stored and committed before the broker was asked: the upload is kept, not a 500.
    assert response.status_code == 201, response.content
    capture = Capture.objects.get(pk=response.json()["id"])
    assert capture.status == AnalysisStatus.QUEUED
    assert "stored but not queued" in caplog.text and f"analyse_capture {capture.pk}" in caplog.text

    sent = []
    monkeypatch.setattr(tasks.analyse_capture, "delay", sent.append)
    with django_capture_on_commit_callbacks(execute=True):
        assert sweep_stuck(queued_after=timedelta(0))["capture"] == 1
    assert sent == [capture.pk]


def test_the_api_answers_503_with_retry_after_when_the_database_is_away(api, case, monkeypatch):
    def away(*args, **kwargs):
        raise OperationalError('connection failed: connection to server at "127.0.0.1", port 5432 failed')

    monkeypatch.setattr("emicase.api.views.upload_svc.capture_upload", away)
    response = _post_capture(api, case)
    assert response.status_code == 503
    assert response["Retry-After"] == "5"
    body = response.json()
    assert "try again" in body["detail"] and "Idempotency-Key" in body["detail"]
    assert "port 5432" not in body["detail"]  # the server's address stays in the log


def test_a_page_answers_503_without_touching_the_database(client, engineer, monkeypatch):
    client.force_login(engineer)

    def away(user):
        raise OperationalError("server closed the connection unexpectedly")

    monkeypatch.setattr(selectors, "memberships_of", away)
    response = client.get("/")
    assert response.status_code == 503
    assert response["Retry-After"] == "5"
    assert b"cannot reach its database" in response.content
    assert b"Sign out" not in response.content  # the page reads no user: there is no database to read


def test_the_health_check_says_503_when_the_database_is_away(client, monkeypatch):
    class NoDatabase:
        def cursor(self):
            raise OperationalError("Connection refused")

    monkeypatch.setattr("emicase.views.connection", NoDatabase())
    response = client.get("/health/")
    assert response.status_code == 503
    assert response.json()["code"] == "service_unavailable"


def test_the_throttle_lets_a_token_client_through_while_its_cache_is_away(api, case, monkeypatch):
    from emicase.api.throttles import TokenClientThrottle

    class CacheDown:
        def get(self, *args, **kwargs):
            raise RedisConnectionError("Error 111 connecting to 127.0.0.1:6379. Connection refused.")

        set = get

    monkeypatch.setattr(TokenClientThrottle, "cache", CacheDown())
    assert api.get(f"/api/cases/{case.pk}/").status_code == 200


def test_a_sweep_while_the_broker_is_down_keeps_the_rows_for_the_next_one(
    case, revision, engineer, monkeypatch, caplog, django_capture_on_commit_callbacks
):
    from emicase.services import uploads

    monkeypatch.setattr(uploads, "_enqueue", lambda name, pk: None)  # stored, never sent
    rows = [uploads.capture_upload(case=case, revision=revision, by=engineer, probe_kind="h_field",
                                   tip="loop 10 mm", location=f"U{i}",
                                   file=SimpleUploadedFile(f"nf{i}.csv", receiver_csv([(75e6, 48.0)], points=201)))
            for i in range(2)]
    tried = []

    def broker_down(pk):
        tried.append(pk)
        raise BrokerError("Connection refused")

    monkeypatch.setattr(tasks.analyse_capture, "delay", broker_down)
    with caplog.at_level(logging.WARNING, logger="emicase.uploads"), \
            django_capture_on_commit_callbacks(execute=True):
        assert sweep_stuck(queued_after=timedelta(0))["capture"] == 2  # no exception escapes
    assert sorted(tried) == sorted(r.pk for r in rows)  # the first failure did not stop the second
    assert set(Capture.objects.filter(pk__in=tried).values_list("status", flat=True)) == {AnalysisStatus.QUEUED}
    assert caplog.text.count("stored but not queued") == 2
