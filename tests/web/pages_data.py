"""Builders for the page tests: real uploads through the services, analysed in this process.

``analysed_scan`` / ``analysed_capture`` store a trace with the upload service
and run the analysis service on it directly (what the worker's task does), so
the pages see real engine output without a worker. ``bulk_captures`` makes
many analysed captures quickly for query-count tests.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
from django.core.files.uploadedfile import SimpleUploadedFile

from emicase.models import AnalysisStatus, Capture, CaptureReading
from emicase.services.analysis import analyse_capture, analyse_scan
from emicase.services.uploads import capture_upload, scan_upload
from tests.web.traces import receiver_csv

SCAN_SETUP = dict(
    emission_kind="radiated",
    limit_id="cispr32-b-rad-10m",
    detector="quasi-peak",
    distance_m=10.0,
    polarisation="vertical",
    setting="pre",
    lab="Bench room",
    measured_on=dt.date(2026, 11, 3),
)


def analysed_scan(revision, by, tones, *, case=None, title="", name="scan.csv", **extra):
    scan = scan_upload(
        revision=revision,
        file=SimpleUploadedFile(name, receiver_csv(tones)),
        by=by,
        case=case,
        opens_case_titled=title,
        **{**SCAN_SETUP, **extra},
    )
    assert analyse_scan(scan.pk) == "done"
    scan.refresh_from_db()
    return scan


def analysed_capture(
    case,
    by,
    revision,
    tones,
    *,
    location,
    tip="loop 10 mm",
    probe_kind="h_field",
    x_mm=None,
    y_mm=None,
    countermeasure=None,
    name="nf.csv",
    board_side="top",
):
    extra = {"countermeasure": countermeasure} if countermeasure is not None else {}
    cap = capture_upload(
        case=case,
        file=SimpleUploadedFile(name, receiver_csv(tones, unit="dBµV", floor=5.0)),
        by=by,
        revision=revision,
        probe_kind=probe_kind,
        tip=tip,
        location=location,
        x_mm=x_mm,
        y_mm=y_mm,
        board_side=board_side,
        **extra,
    )
    assert analyse_capture(cap.pk) == "done"
    cap.refresh_from_db()
    return cap


def bulk_captures(case, by, revision, n: int, *, start: int = 0) -> list[Capture]:
    """``n`` analysed captures with 400-point envelopes and a reading at each failing frequency."""
    f = np.geomspace(30e6, 1e9, 400)
    env = {
        "frequency_hz": f.round(3).tolist(),
        "level": (20 + 5 * np.sin(np.arange(400))).round(2).tolist(),
    }
    caps = Capture.objects.bulk_create(
        Capture(
            case=case,
            revision=revision,
            file=f"uploads/capture/bulk-{start + i}.csv",
            original_name=f"bulk-{start + i}.csv",
            uploaded_by=by,
            probe_kind="h_field",
            tip="loop 10 mm",
            location=f"Z{start + i}",
            x_mm=float(i % 10),
            y_mm=float(i // 10),
            status=AnalysisStatus.DONE,
            unit="dBuV",
            envelope=env,
            results={"peaks": []},
        )
        for i in range(n)
    )
    failing = list(case.failing_frequencies.all())
    CaptureReading.objects.bulk_create(
        CaptureReading(
            capture=c, failing_frequency=ff, frequency_hz=ff.frequency_hz, level=30.0 + (i % 17)
        )
        for i, c in enumerate(caps)
        for ff in failing
    )
    return caps
