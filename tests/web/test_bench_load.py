"""The load benchmark runs end to end at a tiny scale and reports what it promises.

Two clients × two uploads against its own gunicorn, worker, PostgreSQL and Redis (DEBUG on,
one process of each, to start fast): it checks the report's counts and consistency, never a
timing. On CI's PostgreSQL + Redis pass (skipped on the SQLite one).
"""

import json
import math
import os
import subprocess
import sys

import pytest
from django.conf import settings

from emicase.management.commands import _stack
from tests.conftest import ROOT, skip_or_fail

pytestmark = [pytest.mark.worker, pytest.mark.slow]


@pytest.fixture(scope="module")
def report(tmp_path_factory) -> dict:
    if settings.DATABASES["default"]["ENGINE"] != "django.db.backends.postgresql" or not (
        settings.CELERY_BROKER_URL.startswith("redis://")
    ):
        skip_or_fail("the load benchmark's smoke run belongs to the PostgreSQL + Redis pass")
    reason = _stack.unavailable()
    if reason:
        skip_or_fail(f"needs a private PostgreSQL and Redis: {reason}")
    var = tmp_path_factory.mktemp("bench-load")
    env = {k: v for k, v in os.environ.items()
           if k not in ("DATABASE_URL", "CELERY_BROKER_URL", "EMICASE_DATABASE_NAME")}
    env.update(DJANGO_SETTINGS_MODULE="emicase.settings", EMICASE_VAR_DIR=str(var / "parent"))
    done = subprocess.run(
        [sys.executable, "manage.py", "bench_load", "--clients", "2", "--uploads", "2", "--json", "--debug",
         "--web-workers", "1", "--workers", "1", "--var-dir", str(var)],
        cwd=ROOT, env=env, capture_output=True, text=True, timeout=180,
    )
    assert done.returncode == 0, done.stderr[-3000:]
    return json.loads(done.stdout)


def test_every_upload_is_accepted_and_analysed_once_and_none_lost(report):
    assert (report["setup"]["clients"], report["setup"]["uploads"]) == (2, 2)
    assert report["measured"]["uploads"] == {
        "sent": 4, "accepted": 4, "refused": 0, "refused_statuses": [], "analysed": 4, "failed": 0,
        "duplicated": 0, "lost": 0, "stored_though_refused": 0,
    }


def test_it_times_each_endpoint_and_the_request_rate(report):
    measured = report["measured"]
    endpoints = measured["endpoints"]
    assert set(endpoints) == {"POST /api/captures/", "GET /cases/<id>/", "GET /api/cases/<id>/"}
    for e in endpoints.values():
        assert e["n"] == 4 and e["errors"] == 0  # one of each per upload
        assert 0 < e["p50_ms"] <= e["p95_ms"] <= e["max_ms"]
    assert measured["requests"] == 12
    assert math.isclose(measured["requests_per_s"], 12 / measured["wall_s"], rel_tol=0.02)
    done = measured["analysis"]["upload_to_done"]
    assert 0 < done["p50_s"] <= done["p95_s"]


def test_it_says_whose_servers_it_measured(report):
    assert report["setup"]["private_servers"] is True
    assert "tuned for tests" in report["setup"]["servers"]


def test_it_splits_the_cores_used_between_the_stack_and_other_programs(report):
    cores = report["measured"]["cores_by_part"]
    if cores is None:  # only where /proc is missing
        return
    assert set(cores) == {"web", "workers", "redis", "postgres", "clients", "others"}
    assert all(v >= 0 for v in cores.values())
    assert cores["web"] > 0  # twelve requests were served
    cpu = report["measured"]["cpu_ms"]
    assert cpu["web_per_request"] > 0 and cpu["workers_per_analysis"] > 0


def test_the_text_report_shows_each_line_once(report):
    from emicase.management.commands.bench_load import render

    text = render(report)
    lines = ["requests in", "uploads: 4 sent, 4 accepted, 0 refused, 4 analysed", "lost uploads: 0 — MET"]
    if report["measured"]["cpu_ms"]:  # None only where /proc is missing
        lines.append("CPU per request")
    for line in lines:
        assert text.count(line) == 1, text
    for endpoint in report["measured"]["endpoints"]:
        assert text.count(endpoint) == 1, text
