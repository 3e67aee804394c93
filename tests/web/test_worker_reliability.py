"""Nothing is lost: a killed worker, a database that goes away for a moment, a burst of uploads.

Each test runs a real worker process on whichever broker the suite is
configured for (the filesystem transport by default, Redis in CI's second run).
"""

from __future__ import annotations

import datetime as dt
import re
import sqlite3
import time

import pytest
from django.conf import settings
from django.core.files.uploadedfile import SimpleUploadedFile
from django.db import connection

from emicase.models import AnalysisStatus, Capture, CaseEvent, FailingFrequency, Scan
from emicase.services import uploads
from emicase.services.sweeper import sweep_stuck
from tests.conftest import wait_until
from tests.web.traces import bad_csv, long_time_record_csv, receiver_csv

pytestmark = [pytest.mark.worker, pytest.mark.slow]

FINISHED = (AnalysisStatus.DONE, AnalysisStatus.FAILED)


@pytest.fixture(scope="session")
def long_record() -> bytes:
    # 4 million samples: long enough (about a second of analysis) to kill a worker in the middle.
    return long_time_record_csv(4_000_000)


def _capture(case, revision, by, content, name="nf.csv", **extra):
    return uploads.capture_upload(
        case=case, file=SimpleUploadedFile(name, content), by=by, revision=revision, probe_kind="e_field",
        tip="ball 3 mm", location="U4", **extra,
    )


def _finished(model, pk, timeout=90):
    return wait_until(lambda: model.objects.filter(pk=pk, status__in=FINISHED).first(), timeout=timeout,
                      what=f"{model.__name__} {pk} to finish")


def test_a_worker_killed_mid_analysis_leaves_its_item_to_the_next_worker(worker, case, revision, engineer, long_record):
    ff = FailingFrequency.objects.create(case=case, frequency_hz=25e6, level=40, limit_level=30, confirmed=True)
    cap = _capture(case, revision, engineer, long_record, name="long.csv", declared_domain="time")
    wait_until(lambda: Capture.objects.filter(pk=cap.pk, status=AnalysisStatus.RUNNING).exists(),
               interval=0.02, what="the analysis to start")
    worker.kill()
    assert Capture.objects.get(pk=cap.pk).status == AnalysisStatus.RUNNING  # orphaned, not lost

    worker.start()
    # The broker lost or still holds the message; the sweeper does not rely on either.
    assert sweep_stuck(queued_after=dt.timedelta(0), running_after=dt.timedelta(0))["capture"] == 1
    done = _finished(Capture, cap.pk)
    assert done.status == AnalysisStatus.DONE, done.error_text
    assert done.attempts == 2
    # Exactly one set of results: one reading per failing frequency, one "analysed" event.
    assert done.readings.count() == 1
    # 5 mV amplitude sine: 20·log10(5e-3/√2 / 1e-6) = 70.97 dBµV (definition of dBµV, rms of a sinusoid).
    assert done.readings.get(failing_frequency=ff).level == pytest.approx(70.97, abs=0.1)
    assert CaseEvent.objects.filter(case=case, kind="analysed", data__capture=cap.pk).count() == 1


def _hold_database_lock(seconds: float):
    """Take the database's write lock from another connection for ``seconds``, as a stalled server would."""
    if connection.vendor == "sqlite":
        raw = sqlite3.connect(connection.settings_dict["NAME"], timeout=10)
        raw.execute("BEGIN EXCLUSIVE")
    else:
        import psycopg

        s = connection.settings_dict
        raw = psycopg.connect(dbname=s["NAME"], user=s["USER"], password=s["PASSWORD"] or None,
                              host=s["HOST"] or None, port=s["PORT"] or None)
        raw.execute(f"LOCK TABLE {Scan._meta.db_table} IN ACCESS EXCLUSIVE MODE")
    return raw


def test_the_database_briefly_unavailable_makes_the_task_retry_then_succeed(
    worker, revision, engineer, monkeypatch, case
):
    queued = []
    monkeypatch.setattr(uploads, "_enqueue", lambda name, pk: queued.append((name, pk)))
    scan = uploads.scan_upload(
        revision=revision, file=SimpleUploadedFile("s.csv", receiver_csv([(75e6, 36.0)])), by=engineer, case=case,
        emission_kind="radiated", limit_id="cispr32-b-rad-10m", distance_m=10.0, measured_on=dt.date(2026, 11, 3),
    )
    from emicase.tasks import analyse_scan

    lock = _hold_database_lock(0)
    try:
        analyse_scan.delay(scan.pk)
        time.sleep(4.0)  # the worker's lock wait is 1 s: it fails at least once meanwhile
    finally:
        lock.rollback()
        lock.close()
    done = _finished(Scan, scan.pk, timeout=120)
    assert done.status == AnalysisStatus.DONE, done.error_text
    log = worker.log_path.read_text(errors="replace")
    assert re.search(r"analyse_scan\[[^\]]+\] retry: Retry in", log), "the task never retried"
    assert queued == [("analyse_scan", scan.pk)]


def test_a_burst_of_fifty_uploads_all_finish(worker, case, revision, engineer):
    contents = [receiver_csv([(25e6 * k, 40.0)], unit="dBµV", points=1001, seed=k) for k in range(2, 12)]
    ids = [_capture(case, revision, engineer, contents[i % 10], name=f"burst-{i}.csv").pk for i in range(49)]
    ids.append(_capture(case, revision, engineer, bad_csv(7), name="bad.csv").pk)
    wait_until(lambda: Capture.objects.filter(pk__in=ids, status__in=FINISHED).count() == 50, timeout=240,
               what="all fifty analyses")
    statuses = dict(Capture.objects.filter(pk__in=ids).values_list("pk", "status"))
    assert [statuses[i] for i in ids[:49]] == [AnalysisStatus.DONE] * 49
    assert statuses[ids[49]] == AnalysisStatus.FAILED
    assert Capture.objects.get(pk=ids[49]).error_text.startswith("bad.csv line 7:")


def test_changing_the_failing_frequencies_rereads_the_captures(worker, case, revision, engineer):
    from emicase.services.frequencies import failing_frequency_add

    cap = _capture(case, revision, engineer, receiver_csv([(125e6, 48.0)], unit="dBµV", floor=5.0), name="nf.csv")
    assert _finished(Capture, cap.pk).status == AnalysisStatus.DONE
    assert not cap.readings.exists()  # the case had no failing frequency yet
    ff = failing_frequency_add(case=case, by=engineer, frequency_hz=125e6, level=36.0, limit_level=30.0)
    reading = wait_until(lambda: cap.readings.filter(failing_frequency=ff).first(), what="the re-read")
    assert reading.level == pytest.approx(48.0, abs=0.5)


def test_settings_keep_the_reliability_options():
    # The options the brief asks of the analysis tasks (STACK.md: Celery's own docs on acks_late & co).
    from emicase.tasks import analyse_capture, analyse_scan

    for task in (analyse_scan, analyse_capture):
        assert task.acks_late and task.reject_on_worker_lost
        assert task.max_retries == 5 and task.autoretry_for
    assert settings.CELERY_WORKER_PREFETCH_MULTIPLIER == 1
    assert settings.CELERY_TASK_SOFT_TIME_LIMIT < settings.CELERY_TASK_TIME_LIMIT


def test_a_reread_keeps_attributions_found_with_the_traces_resolution(db, case, revision, engineer):
    # A coarse receiver trace puts the 3rd harmonic of the 25 MHz PHY clock 15 kHz off, well beyond
    # 3 × its 1250 Hz tolerance, but within the trace's point spacing: still 3 × PHY clock.
    from emicase.services.analysis import case_reread

    scan = Scan.objects.create(
        revision=revision, case=case, file="x.csv", original_name="x.csv", uploaded_by=engineer,
        emission_kind="radiated", limit_id="cispr32-b-rad-10m", distance_m=10.0, measured_on=dt.date(2026, 11, 3),
        status=AnalysisStatus.DONE,
        results={"peaks": [{"frequency_hz": 74.985e6, "level": 36.0, "prominence_db": 20.0, "width_hz": 1e5,
                            "resolution_hz": 60e3}]},
    )
    case_reread(case.pk)
    scan.refresh_from_db()
    assert scan.results["attributions"] == [
        {"frequency_hz": 74.985e6, "terms": [{"source": "PHY clock", "order": 3}], "error_hz": pytest.approx(-15e3)}
    ]
