"""An upload is analysed by a real worker process on the configured broker (never eager mode)."""

import datetime as dt

import pytest
from django.core.files.uploadedfile import SimpleUploadedFile

from emicase.models import AnalysisStatus, Case, Scan
from emicase.services.uploads import capture_upload, scan_upload
from tests.conftest import wait_until
from tests.web.traces import bad_csv, receiver_csv

pytestmark = pytest.mark.worker


def _scan(revision, by, content, name="scan.csv", **extra):
    return scan_upload(
        revision=revision, file=SimpleUploadedFile(name, content), by=by, emission_kind="radiated",
        limit_id="cispr32-b-rad-10m", distance_m=10.0, polarisation="vertical", measured_on=dt.date(2026, 11, 3),
        **extra,
    )


def test_a_first_failing_scan_opens_its_case_with_the_failing_frequencies(worker, revision, engineer):
    # CISPR 32 Table A.4 (class B, 10 m) via DOMAIN.md: 30 dBµV/m below 230 MHz, 37 above.
    scan = _scan(revision, engineer, receiver_csv([(75e6, 36.0), (400e6, 35.5), (120e6, 20.0)]),
                 opens_case_titled="Radiated fail")
    done = wait_until(lambda: Scan.objects.filter(pk=scan.pk, status__in=["done", "failed"]).first(), what="analysis")
    assert done.status == AnalysisStatus.DONE, done.error_text
    assert done.engine_version and done.analysis_finished_at >= done.analysis_started_at
    case = Case.objects.get(pk=done.case_id)
    failing = list(case.failing_frequencies.order_by("frequency_hz"))
    # 75 MHz is 6 dB over; 400 MHz is 1.5 dB under the limit, inside the team's 3 dB guard band.
    assert [round(ff.frequency_hz / 1e6) for ff in failing] == [75, 400]
    assert [ff.margin_db for ff in failing] == [pytest.approx(-6.0, abs=0.2), pytest.approx(1.5, abs=0.2)]
    assert all(not ff.confirmed for ff in failing)  # proposals until an engineer confirms them
    assert done.envelope["frequency_hz"] and len(done.envelope["level"]) == len(done.envelope["frequency_hz"])


def test_a_bad_file_fails_with_the_engines_words_and_touches_nothing_else(worker, revision, engineer, case):
    before = case.failing_frequencies.count()
    scan = _scan(revision, engineer, bad_csv(line_of_error=5), name="broken.csv", case=case)
    done = wait_until(lambda: Scan.objects.filter(pk=scan.pk, status__in=["done", "failed"]).first(), what="analysis")
    assert done.status == AnalysisStatus.FAILED
    assert done.error_kind == "input"
    assert "broken.csv line 5" in done.error_text and "abc" in done.error_text
    assert case.failing_frequencies.count() == before


def test_a_capture_is_read_at_the_case_failing_frequencies(worker, revision, engineer, case):
    from emicase.models import Capture, FailingFrequency

    ff = FailingFrequency.objects.create(case=case, frequency_hz=75e6, level=36.0, limit_level=30.0, confirmed=True)
    cap = capture_upload(
        case=case, file=SimpleUploadedFile("nf.csv", receiver_csv([(75.1e6, 52.0)], unit="dBµV", floor=5.0)),
        by=engineer, revision=revision, probe_kind="h_field", tip="loop 10 mm", location="U4", x_mm=10.0, y_mm=20.0,
    )
    done = wait_until(lambda: Capture.objects.filter(pk=cap.pk, status__in=["done", "failed"]).first(), what="analysis")
    assert done.status == AnalysisStatus.DONE, done.error_text
    reading = done.readings.get(failing_frequency=ff)
    # 75.1 MHz lies within the team's 0.5 % of 75 MHz, so the capture reads its tone there.
    assert reading.level == pytest.approx(52.0, abs=0.5)
