"""Hostile uploads analysed by a real worker process (never eager mode) fail on their own items."""

from __future__ import annotations

import datetime as dt

import pytest
from django.core.files.uploadedfile import SimpleUploadedFile
from django.urls import reverse
from django.utils.html import escape
from rest_framework.test import APIClient

from emicase import models as m
from emicase.services.uploads import capture_upload, scan_upload
from tests.conftest import wait_until
from tests.hostile.corpus import CORPUS
from tests.hostile.test_app_corpus import snapshot
from tests.web.traces import receiver_csv

pytestmark = pytest.mark.worker

BY_NAME = {h.name: h for h in CORPUS}
FINISHED = ("done", "failed")


def _finished(model, pk):
    return wait_until(
        lambda: model.objects.filter(pk=pk, status__in=FINISHED).first(),
        what=f"{model.__name__} {pk}",
    )


def test_the_worker_fails_hostile_captures_on_their_items_and_keeps_the_case(
    worker, client, revision, engineer
):
    # A good failing scan first (CISPR 32 Table A.4 via DOMAIN.md: 30 dBµV/m; 75 MHz is 6 dB over).
    scan = scan_upload(
        revision=revision,
        file=SimpleUploadedFile("scan.csv", receiver_csv([(75e6, 36.0)])),
        by=engineer,
        emission_kind="radiated",
        limit_id="cispr32-b-rad-10m",
        distance_m=10.0,
        polarisation="vertical",
        measured_on=dt.date(2026, 11, 3),
        opens_case_titled="Radiated fail",
    )
    assert _finished(m.Scan, scan.pk).status == "done"
    case = m.Case.objects.get(pk=m.Scan.objects.get(pk=scan.pk).case_id)
    good = capture_upload(
        case=case,
        file=SimpleUploadedFile("nf.csv", receiver_csv([(75e6, 50.0)], unit="dBµV", floor=5.0)),
        by=engineer,
        revision=revision,
        probe_kind="h_field",
        tip="loop 10 mm",
        location="U4",
    )
    assert _finished(m.Capture, good.pk).status == "done"
    wait_until(
        lambda: not m.Capture.objects.filter(case=case, status__in=["queued", "running"]).exists()
    )
    before = snapshot(case)

    api = APIClient()
    api.force_authenticate(engineer)
    names = ["nonnumber-1.csv", "decimal-comma.csv", '"><img src=x onerror=alert(1)>.csv']
    pks = []
    for name in names:
        h = BY_NAME[name]
        response = api.post(
            "/api/captures/",
            {
                "case": case.pk,
                "probe_kind": "h_field",
                "tip": "loop 10 mm",
                "location": "U7",
                "file": SimpleUploadedFile(h.name, h.content),
            },
            format="multipart",
        )
        assert response.status_code == 201, response.content
        pks.append(response.json()["id"])
    client.force_login(engineer)
    for name, pk in zip(names, pks, strict=True):
        h = BY_NAME[name]
        capture = _finished(m.Capture, pk)
        assert (capture.status, capture.error_kind) == ("failed", "input")
        assert capture.error_text.startswith(h.prefix) and all(
            f in capture.error_text for f in h.expect
        )
        page = client.get(reverse("case", args=[case.pk]))
        assert page.status_code == 200 and escape(capture.error_text) in page.content.decode()
    after = snapshot(case)
    # Only the three new captures and their upload events were added; everything else is as it was.
    after["captures"] = [c for c in after["captures"] if c["id"] not in pks]
    after["events"] = [e for e in after["events"] if e["data"].get("capture") not in pks]
    after["files"] = {k: v for k, v in after["files"].items() if k in before["files"]}
    assert after == before
