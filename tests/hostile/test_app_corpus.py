"""Hostile files uploaded into a case that already holds good analysed work.

Each upload, through the page form or the REST API, ends with one clear
message on its own item (or a refusal naming the file), the pages keep
working, and nothing else in the case changes. The analysis runs through the
worker's own service in this process (``services.analysis``), as the page
tests do; one test goes through a real worker process.
"""

from __future__ import annotations

import hashlib

import pytest
from django.core.files.uploadedfile import SimpleUploadedFile
from django.urls import reverse
from django.utils.html import escape
from rest_framework.test import APIClient

from emicase import models as m
from emicase.services.analysis import analyse_capture, analyse_scan
from tests.hostile.corpus import CORPUS, Hostile
from tests.web.pages_data import analysed_capture, analysed_scan

BY_NAME = {h.name: h for h in CORPUS}

# Analysed by the worker's service: the engine's words end on the item.
ANALYSED = [
    "header-only.csv",
    "ragged-long.csv",
    "nonfinite-1.csv",
    "nonnumber-1.csv",
    "decimal-comma.csv",
    "duplicate.csv",
    "unknown-level-unit.csv",
    "too-few.csv",
    "script-header.csv",
    '"><img src=x onerror=alert(1)>.csv',
    "uneven-steps.csv",
]
# Refused at upload by the first bytes (services.uploads.check_trace_file): nothing is stored.
REFUSED = ["empty.csv", "image.csv", "bomb.csv", "packed.csv", "utf16-bom.csv", "nul.csv"]


@pytest.fixture(autouse=True)
def _media(settings, tmp_path):
    settings.MEDIA_ROOT = tmp_path


@pytest.fixture
def busy_case(revision, engineer):
    """A case opened by a good failing scan (CISPR 32 Table A.4 via DOMAIN.md: 75 MHz 6 dB over),
    with its failing frequencies confirmed and one analysed capture read at them."""
    scan = analysed_scan(revision, engineer, [(75e6, 36.0), (400e6, 35.5)], title="Radiated fail")
    case = m.Case.objects.get(pk=scan.case_id)
    case.failing_frequencies.update(confirmed=True)
    analysed_capture(case, engineer, revision, [(75e6, 50.0)], location="U4")
    return case


def _rows(queryset) -> list[dict]:
    return list(queryset.order_by("pk").values())


def snapshot(case: m.Case, *, leave_out: tuple[str, int] | None = None) -> dict:
    """Every stored row of the case (and the search index), minus the one new upload and its event."""
    scans = m.Scan.objects.filter(case=case)
    captures = m.Capture.objects.filter(case=case)
    events = m.CaseEvent.objects.filter(case=case)
    if leave_out is not None:
        kind, pk = leave_out
        scans = scans.exclude(pk=pk) if kind == "scan" else scans
        captures = captures.exclude(pk=pk) if kind == "capture" else captures
    row = m.Case.objects.filter(pk=case.pk).values().get()
    row.pop("updated_at")  # an upload is news on the case: its time stamp moves, nothing else
    files = {s.file.name: hashlib.sha256(s.file.read()).hexdigest() for s in [*scans, *captures]}
    return {
        "case": row,
        "failing": _rows(m.FailingFrequency.objects.filter(case=case)),
        "scans": _rows(scans),
        "captures": _rows(captures),
        "readings": _rows(m.CaptureReading.objects.filter(capture__case=case)),
        "countermeasures": _rows(m.Countermeasure.objects.filter(case=case)),
        "events": [
            e
            for e in _rows(events)
            if leave_out is None or e["data"].get(leave_out[0]) != leave_out[1]
        ],
        "signature_items": _rows(m.SignatureItem.objects.all()),
        "signature_rows": _rows(m.SignatureRow.objects.all()),
        "files": files,
    }


def _capture_form(revision, name: str, content: bytes, domain: str) -> dict:
    return {
        "file": SimpleUploadedFile(name, content),
        "declared_domain": "time" if domain == "time" else "auto",
        "revision": revision.pk,
        "probe_kind": "h_field",
        "tip": "loop 10 mm",
        "board_side": "top",
        "location": "U7",
        "notes": "",
    }


def _assert_failed_with(item, h: Hostile) -> None:
    item.refresh_from_db()
    assert (item.status, item.error_kind) == ("failed", "input")
    assert item.error_text.startswith(h.prefix), item.error_text
    assert all(f in item.error_text for f in h.expect), item.error_text


def _assert_pages_work(client, case, message: str | None = None) -> None:
    response = client.get(reverse("case", args=[case.pk]))
    assert response.status_code == 200
    if message is not None:
        html = response.content.decode()
        assert escape(message) in html  # the engine's words, escaped like any other text


@pytest.mark.parametrize("name", ANALYSED)
def test_a_hostile_capture_through_the_page_fails_on_its_item_alone(
    client, engineer, revision, busy_case, name
):
    h = BY_NAME[name]
    client.force_login(engineer)
    before = snapshot(busy_case)
    response = client.post(
        reverse("capture_new", args=[busy_case.pk]),
        _capture_form(revision, h.name, h.content, h.domain),
    )
    assert response.status_code == 302  # stored: the engine, not the form, judges the contents
    capture = m.Capture.objects.get(case=busy_case, original_name=h.name[:255])
    assert analyse_capture(capture.pk) == "failed"
    _assert_failed_with(capture, h)
    _assert_pages_work(client, busy_case, capture.error_text)
    page = client.get(reverse("capture", args=[capture.pk]))
    assert (
        page.status_code == 200
        and escape("Problem in the file: " + capture.error_text) in page.content.decode()
    )
    assert snapshot(busy_case, leave_out=("capture", capture.pk)) == before


def _refused_message(h: Hostile, message: str) -> None:
    assert h.name in message, message


def test_plainly_binary_captures_are_refused_by_the_form_and_nothing_is_stored(
    client, engineer, revision, busy_case
):
    client.force_login(engineer)
    before = snapshot(busy_case)
    for h in (BY_NAME[name] for name in REFUSED):
        response = client.post(
            reverse("capture_new", args=[busy_case.pk]),
            _capture_form(revision, h.name, h.content, h.domain),
        )
        assert response.status_code == 200, (
            h.name
        )  # the form again, the message beside the file field
        [message] = response.context["form"].errors["file"]
        _refused_message(h, message)
        assert escape(message) in response.content.decode()
        assert snapshot(busy_case) == before, h.name
    _assert_pages_work(client, busy_case)


SCAN_FIELDS = {
    "emission_kind": "radiated",
    "limit_id": "cispr32-b-rad-10m",
    "detector": "quasi-peak",
    "distance_m": "10",
    "polarisation": "vertical",
    "setting": "pre",
    "lab": "Bench room",
    "measured_on": "2026-11-03",
}


def _api(user) -> APIClient:
    client = APIClient()
    client.force_authenticate(user)
    return client


@pytest.mark.parametrize(
    "name",
    [
        "ragged-short.csv",
        "nonfinite-9.csv",
        "nonnumber-0.csv",
        "thousands-dot.csv",
        "no-frequency-unit.csv",
        "formula-header.csv",
    ],
)
def test_a_hostile_scan_through_the_api_fails_on_its_item_alone(
    client, engineer, revision, busy_case, name
):
    h = BY_NAME[name]
    api = _api(engineer)
    before = snapshot(busy_case)
    response = api.post(
        "/api/scans/",
        {
            "revision": revision.pk,
            "case": busy_case.pk,
            **SCAN_FIELDS,
            "file": SimpleUploadedFile(h.name, h.content),
        },
        format="multipart",
    )
    assert response.status_code == 201, response.content
    pk = response.json()["id"]
    assert analyse_scan(pk) == "failed"
    scan = m.Scan.objects.get(pk=pk)
    _assert_failed_with(scan, h)
    body = api.get(f"/api/scans/{pk}/").json()
    assert (body["status"], body["error_kind"], body["error_text"]) == (
        "failed",
        "input",
        scan.error_text,
    )
    assert api.get(f"/api/cases/{busy_case.pk}/").status_code == 200
    client.force_login(engineer)
    _assert_pages_work(client, busy_case, scan.error_text)
    assert snapshot(busy_case, leave_out=("scan", pk)) == before


def test_plainly_binary_captures_are_refused_by_the_api_with_a_field_message(engineer, busy_case):
    before = snapshot(busy_case)
    for h in (BY_NAME[name] for name in ["empty.csv", "bomb.csv", "utf16-bom.csv", "jpeg.csv"]):
        response = _api(engineer).post(
            "/api/captures/",
            {
                "case": busy_case.pk,
                "probe_kind": "h_field",
                "tip": "loop 10 mm",
                "location": "U7",
                "file": SimpleUploadedFile(h.name, h.content),
            },
            format="multipart",
        )
        assert response.status_code == 400, h.name
        [message] = response.json()["file"]
        _refused_message(h, message)
        assert snapshot(busy_case) == before, h.name


def test_an_endless_line_through_the_api_is_refused_at_line_1(engineer, busy_case):
    before = snapshot(busy_case)
    response = _api(engineer).post(
        "/api/captures/",
        {
            "case": busy_case.pk,
            "probe_kind": "h_field",
            "tip": "loop 10 mm",
            "location": "U7",
            "file": SimpleUploadedFile("endless.csv", b"7" * ((1 << 20) + 10)),
        },
        format="multipart",
    )
    assert response.status_code == 201
    pk = response.json()["id"]
    assert analyse_capture(pk) == "failed"
    capture = m.Capture.objects.get(pk=pk)
    assert (
        capture.error_text
        == "endless.csv line 1: the line is longer than 1048576 bytes; not a text trace"
    )
    assert snapshot(busy_case, leave_out=("capture", pk)) == before


def test_hostile_traces_given_to_the_search_get_the_engines_words_beside_the_field(
    client, engineer, busy_case
):
    client.force_login(engineer)
    before = snapshot(busy_case)
    for name in [*ANALYSED, *REFUSED]:
        h = BY_NAME[name]
        response = client.post(
            reverse("search:similar"),
            {"tolerance": "", "trace": SimpleUploadedFile(h.name, h.content)},
        )
        assert response.status_code == 200, name
        errors = response.context["form"].errors.get("trace") or response.context[
            "form"
        ].errors.get("__all__")
        assert errors and len(errors) == 1, (name, response.context["form"].errors)
        if name in ANALYSED:
            assert errors[0].startswith(h.prefix) and all(f in errors[0] for f in h.expect), errors[
                0
            ]
        else:
            _refused_message(h, errors[0])
        assert escape(errors[0]) in response.content.decode()
    assert snapshot(busy_case) == before  # a search stores nothing
