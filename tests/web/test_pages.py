"""The team home, logging a failing result, the case page and its live status."""

from __future__ import annotations

import os
import re
import time
from io import StringIO
from pathlib import Path

import pytest
from django.core.files.uploadedfile import SimpleUploadedFile
from django.core.management import call_command
from django.db import connection
from django.test.utils import CaptureQueriesContext
from django.urls import reverse

from emicase.models import AnalysisStatus, Capture, Case, Scan
from emicase.services import countermeasures as cm_svc
from tests.web.pages_data import SCAN_SETUP, analysed_scan, bulk_captures
from tests.web.traces import bad_csv, receiver_csv


@pytest.fixture(autouse=True)
def _media(settings, tmp_path):
    settings.MEDIA_ROOT = tmp_path


def _client(client, user):
    client.force_login(user)
    return client


@pytest.fixture
def failing_case(revision, engineer):
    """A case opened by its first failing scan: 75 MHz 6 dB over, 400 MHz inside the guard band.

    CISPR 32 Table A.4 (class B, 10 m) via DOMAIN.md: 30 dBµV/m below 230 MHz, 37 above.
    """
    scan = analysed_scan(
        revision, engineer, [(75e6, 36.0), (400e6, 35.5), (120e6, 20.0)], title="Radiated fail"
    )
    return Case.objects.get(pk=scan.case_id)


def _log_post(revision, **overrides):
    data = {
        "title": "Radiated fail at 75 MHz",
        "revision": revision.pk,
        **SCAN_SETUP,
        "measured_on": "2026-11-03",
        "file": SimpleUploadedFile("scan.csv", receiver_csv([(75e6, 36.0)])),
    }
    data.update(overrides)
    return {k: v for k, v in data.items() if v is not None}


# ----------------------------------------------------------------- sign-in and home


def test_pages_ask_a_stranger_to_sign_in(client, case):
    for url in (reverse("home"), reverse("case", args=[case.pk]), reverse("log_fail")):
        response = client.get(url)
        assert response.status_code == 302 and response.url.startswith(reverse("login"))


def test_the_sign_in_page_labels_its_inputs(client):
    html = client.get(reverse("login")).content.decode()
    assert '<label for="id_username">' in html and '<label for="id_password">' in html


def test_home_shows_open_cases_by_stage_with_worst_margin_and_who_is_on_it(
    client, engineer, lead, failing_case
):
    from emicase.services.cases import comment_add

    comment_add(case=failing_case, by=lead, text="Probe the jack first")
    html = _client(client, engineer).get(reverse("home")).content.decode()
    assert "Radiated fail" in html and "Logged" in html
    # The worst margin is 75 MHz's −6 dB (CISPR 32 Table A.4 via DOMAIN.md), shown with a true minus sign.
    assert re.search(r"margin over[^>]*>\s*−6\.\d dB", html)
    assert "Lead" in html  # the lead commented: on it too
    assert "Probe the jack first" in html  # what changed lately


def test_home_shows_nothing_of_another_team(client, outsider, failing_case):
    html = _client(client, outsider).get(reverse("home")).content.decode()
    assert "Radiated fail" not in html


# ----------------------------------------------------------------- logging a failing result


def test_logging_a_fail_stores_the_scan_and_follows_its_analysis(client, engineer, revision):
    response = _client(client, engineer).post(reverse("log_fail"), _log_post(revision))
    scan = Scan.objects.get()
    assert (
        response.status_code == 302
        and response.url == reverse("scan", args=[scan.pk]) + "?opening=1"
    )
    assert (
        scan.opens_case_titled == "Radiated fail at 75 MHz" and scan.status == AnalysisStatus.QUEUED
    )
    page = client.get(response.url).content.decode()
    assert f'data-scan-status="{reverse("scan_status", args=[scan.pk])}"' in page
    status = client.get(reverse("scan_status", args=[scan.pk])).json()
    assert status["status"] == "queued" and status["busy"] is True and status["queue"] == 1


def test_a_wrong_file_type_is_refused_beside_the_field_keeping_the_rest(client, engineer, revision):
    data = _log_post(revision, file=SimpleUploadedFile("scan.xlsx", b"PK\x03\x04 spreadsheet"))
    response = _client(client, engineer).post(reverse("log_fail"), data)
    assert response.status_code == 200 and not Scan.objects.exists()
    html = response.content.decode()
    field = html[html.index('id="field-file"') :]
    field = field[: field.index("</div>")]
    assert "scan.xlsx is not a text trace export" in field
    assert 'value="Radiated fail at 75 MHz"' in html  # the title typed stays
    assert 'value="Bench room"' in html


def test_a_binary_file_with_a_csv_name_is_refused_in_words(client, engineer, revision):
    data = _log_post(
        revision, file=SimpleUploadedFile("scan.csv", b"\x89PNG\r\n\x1a\n" + b"\x00" * 50)
    )
    html = _client(client, engineer).post(reverse("log_fail"), data).content.decode()
    assert "not a text trace (it looks like a binary file)" in html


def test_a_missing_limit_line_is_explained_and_the_file_is_kept(client, engineer, revision):
    c = _client(client, engineer)
    response = c.post(reverse("log_fail"), _log_post(revision, limit_id=""))
    html = response.content.decode()
    assert "Choose the limit line the test was judged against." in html
    assert "Kept from your last try: scan.csv" in html
    token = re.search(r'name="kept_file" value="([0-9a-f]{32})"', html).group(1)
    # The second try sends no file at all: the kept one is used.
    data = _log_post(revision, file=None, kept_file=token)
    response = c.post(reverse("log_fail"), data)
    assert response.status_code == 302
    scan = Scan.objects.get()
    assert scan.original_name == "scan.csv" and scan.file.read().startswith(
        b"# built by the test suite"
    )


def test_the_sweep_deletes_kept_files_left_for_a_day_and_the_form_asks_again(
    client, engineer, revision, settings
):
    c = _client(client, engineer)
    tokens = []
    for _ in range(2):
        html = c.post(reverse("log_fail"), _log_post(revision, limit_id="")).content.decode()
        tokens.append(re.search(r'name="kept_file" value="([0-9a-f]{32})"', html).group(1))
    kept = Path(settings.MEDIA_ROOT) / "kept"
    old, fresh = (kept / t for t in tokens)
    two_days_ago = time.time() - 2 * 86400
    os.utime(old, (two_days_ago, two_days_ago))
    out = StringIO()
    call_command("sweep_stuck", stdout=out)
    assert "1 kept form uploads deleted" in out.getvalue()
    assert not old.exists() and fresh.exists()
    # The swept token no longer stands for a file: the form asks for one, nothing is stored.
    html = c.post(reverse("log_fail"), _log_post(revision, file=None, kept_file=tokens[0])).content.decode()
    assert "Choose the trace file exported from the receiver, analyser or scope." in html
    assert not Scan.objects.exists()


def test_a_radiated_scan_needs_its_distance_and_a_matching_limit(client, engineer, revision):
    html = (
        _client(client, engineer)
        .post(reverse("log_fail"), _log_post(revision, distance_m="", limit_id="cispr32-b-cond-qp"))
        .content.decode()
    )
    assert "Give the antenna distance in metres" in html
    assert "is a conducted limit; this scan is radiated." in html


def test_a_viewer_cannot_log_a_fail(client, viewer, revision):
    assert _client(client, viewer).get(reverse("log_fail")).status_code == 403
    assert client.post(reverse("log_fail"), _log_post(revision)).status_code == 403
    assert not Scan.objects.exists()


def test_the_scan_page_sends_an_opened_case_on_to_its_page(client, engineer, failing_case):
    scan = failing_case.scans.get()
    response = _client(client, engineer).get(reverse("scan", args=[scan.pk]) + "?opening=1")
    assert response.status_code == 302 and response.url == reverse("case", args=[failing_case.pk])


def test_a_failed_scan_shows_the_engines_words_with_the_line(client, engineer, revision):
    scan = Scan.objects.create(
        revision=revision,
        file="uploads/scan/x.csv",
        original_name="broken.csv",
        uploaded_by=engineer,
        emission_kind="radiated",
        limit_id="cispr32-b-rad-10m",
        distance_m=10,
        measured_on="2026-11-03",
    )
    from emicase.services.analysis import analyse_scan

    scan.file.save("broken.csv", SimpleUploadedFile("broken.csv", bad_csv(line_of_error=5)))
    analyse_scan(scan.pk)
    html = _client(client, engineer).get(reverse("scan", args=[scan.pk])).content.decode()
    assert "Problem in the file: broken.csv line 5" in html and "abc" in html


# ----------------------------------------------------------------- the case page


def test_the_case_page_tells_the_whole_story(client, engineer, lead, revision, failing_case):
    from emicase.services.cases import case_move, comment_add

    case_move(case=failing_case, to=Case.Stage.HUNTING, by=engineer, note="probing the PHY")
    comment_add(case=failing_case, by=lead, text="Check the jack")
    html = _client(client, engineer).get(reverse("case", args=[failing_case.pk])).content.decode()
    # Failing frequencies with their margins (CISPR 32 Table A.4 via DOMAIN.md): 75 MHz −6, 400 MHz +1.5.
    rows = re.findall(r'<tr class="proposed" data-ff="\d+">(.*?)</tr>', html, re.S)
    assert len(rows) == 2
    mhz = [float(re.search(r'class="num">(\d+\.\d{3}) MHz', row).group(1)) for row in rows]
    assert mhz == [
        pytest.approx(75, rel=5e-3),
        pytest.approx(400, rel=5e-3),
    ]  # within the trace's point spacing
    assert re.search(r"margin over[^>]*>−(5\.[89]|6\.[0-2]) dB", rows[0])
    assert re.search(r"margin guard[^>]*>\+1\.[3-7] dB", rows[1])
    assert (
        "Logged → Hunting the source" in html and "probing the PHY" in html
    )  # stage change, who, why
    assert "Check the jack" in html
    assert (
        'data-chart="scan-chart"' in html
        and '<script type="application/json" id="scan-chart">' in html
    )
    assert "/static/vendor/plotly.min.js" in html


def test_the_scan_chart_sends_the_envelope_on_a_log_axis_with_units(client, engineer, failing_case):
    import json

    html = _client(client, engineer).get(reverse("case", args=[failing_case.pk])).content.decode()
    fig = json.loads(
        re.search(
            r'<script type="application/json" id="scan-chart">(.*?)</script>', html, re.S
        ).group(1)
    )
    assert fig["layout"]["xaxis"]["type"] == "log"
    assert fig["layout"]["xaxis"]["title"]["text"] == "Frequency (MHz)"
    assert fig["layout"]["yaxis"]["title"]["text"] == "Level (dBµV/m)"
    names = [t.get("name") for t in fig["data"]]
    assert {"Trace", "Limit", "Guard band (3 dB)", "Failing frequencies", "Peaks"} <= set(names)
    assert all(t["type"] == "scatter" for t in fig["data"])  # SVG, no WebGL needed
    trace = fig["data"][names.index("Trace")]
    assert trace["x"]["dtype"] == "f4"  # float32 typed arrays


def test_proposals_are_confirmed_or_dropped_from_the_page(client, engineer, failing_case):
    keep = failing_case.failing_frequencies.get(frequency_hz__lt=100e6)
    response = _client(client, engineer).post(
        reverse("frequencies_confirm", args=[failing_case.pk]), {"keep": [keep.pk]}
    )
    assert response.status_code == 302
    assert list(failing_case.failing_frequencies.values_list("pk", "confirmed")) == [
        (keep.pk, True)
    ]


def test_a_frequency_outside_the_trace_is_refused_beside_the_field(client, engineer, failing_case):
    c = _client(client, engineer)
    response = c.post(
        reverse("frequency_add", args=[failing_case.pk]),
        {"frequency_mhz": "1500", "level": "40", "limit_level": "37"},
    )
    html = response.content.decode()
    assert "1500 MHz lies outside the case&#x27;s scans (30–1000 MHz)." in html
    assert 'value="40"' in html and 'value="37"' in html  # nothing entered is lost
    response = c.post(
        reverse("frequency_add", args=[failing_case.pk]),
        {"frequency_mhz": "125", "level": "33", "limit_level": "30"},
    )
    assert response.status_code == 302
    assert failing_case.failing_frequencies.filter(frequency_hz=125e6, confirmed=True).exists()


def test_editing_a_failing_frequency_keeps_it_inside_the_trace(client, engineer, failing_case):
    ff = failing_case.failing_frequencies.order_by("frequency_hz").first()
    c = _client(client, engineer)
    html = c.post(
        reverse("frequency_edit", args=[ff.pk]),
        {"frequency_mhz": "10", "level": "36", "limit_level": "30", "is_open": "on"},
    ).content.decode()
    assert "10 MHz lies outside" in html
    assert (
        c.post(
            reverse("frequency_edit", args=[ff.pk]),
            {"frequency_mhz": "75.2", "level": "36", "limit_level": "30", "is_open": "on"},
        ).status_code
        == 302
    )
    ff.refresh_from_db()
    assert ff.frequency_hz == pytest.approx(75.2e6) and ff.confirmed


def test_an_empty_comment_is_explained_and_a_real_one_lands_on_the_timeline(
    client, engineer, failing_case
):
    c = _client(client, engineer)
    response = c.post(reverse("case_comment", args=[failing_case.pk]), {"text": "  "})
    assert response.status_code == 400 and "A comment needs some text." in response.content.decode()
    assert (
        c.post(reverse("case_comment", args=[failing_case.pk]), {"text": "Shield can?"}).status_code
        == 302
    )
    assert failing_case.events.filter(kind="comment", text="Shield can?").exists()


def test_stage_moves_follow_the_allowed_paths(client, engineer, failing_case):
    c = _client(client, engineer)
    c.post(reverse("case_move", args=[failing_case.pk]), {"to": "hunting"})
    failing_case.refresh_from_db()
    assert failing_case.stage == "hunting"
    response = c.post(reverse("case_move", args=[failing_case.pk]), {"to": "closed"}, follow=True)
    assert "cannot move" in response.content.decode()
    failing_case.refresh_from_db()
    assert failing_case.stage == "hunting"


def test_a_viewer_reads_the_case_without_write_actions_and_is_refused_changes(
    client, viewer, failing_case
):
    html = _client(client, viewer).get(reverse("case", args=[failing_case.pk])).content.decode()
    assert "Radiated fail" in html
    assert reverse("log_fail") not in html  # not even in the menu
    for word in (
        "Add a capture",
        "Propose a countermeasure",
        "Confirm the ticked",
        "Add the comment",
        "Close the case",
    ):
        assert word not in html
    for name, data in (
        ("case_comment", {"text": "hi"}),
        ("case_move", {"to": "hunting"}),
        ("frequencies_confirm", {"keep": []}),
        ("case_close", {"closure": "waived", "reason": "x"}),
    ):
        assert client.post(reverse(name, args=[failing_case.pk]), data).status_code == 403
    assert client.get(reverse("capture_new", args=[failing_case.pk])).status_code == 403
    assert not failing_case.events.filter(kind="comment").exists()


def test_another_teams_case_is_not_found_anywhere(client, outsider, failing_case):
    c = _client(client, outsider)
    ff = failing_case.failing_frequencies.first()
    scan = failing_case.scans.get()
    for url in (
        reverse("case", args=[failing_case.pk]),
        reverse("case_live", args=[failing_case.pk]),
        reverse("locate", args=[failing_case.pk]),
        reverse("case_report", args=[failing_case.pk]),
        reverse("case_report_csv", args=[failing_case.pk]),
        reverse("capture_new", args=[failing_case.pk]),
        reverse("fix_new", args=[failing_case.pk]),
        reverse("case_close", args=[failing_case.pk]),
        reverse("frequency_edit", args=[ff.pk]),
        reverse("scan", args=[scan.pk]),
        reverse("scan_status", args=[scan.pk]),
    ):
        assert c.get(url).status_code == 404, url
    assert c.post(reverse("case_comment", args=[failing_case.pk]), {"text": "x"}).status_code == 404


def test_the_live_endpoint_reports_status_progress_queue_and_errors(
    client, engineer, revision, failing_case
):
    queued = Capture.objects.create(
        case=failing_case,
        revision=revision,
        file="uploads/capture/q.csv",
        original_name="q.csv",
        uploaded_by=engineer,
        probe_kind="h_field",
        tip="loop",
        location="U4",
    )
    running = Capture.objects.create(
        case=failing_case,
        revision=revision,
        file="uploads/capture/r.csv",
        original_name="r.csv",
        uploaded_by=engineer,
        probe_kind="h_field",
        tip="loop",
        location="U5",
        status=AnalysisStatus.RUNNING,
        progress=0.4,
    )
    failed = Capture.objects.create(
        case=failing_case,
        revision=revision,
        file="uploads/capture/f.csv",
        original_name="f.csv",
        uploaded_by=engineer,
        probe_kind="h_field",
        tip="loop",
        location="U6",
        status=AnalysisStatus.FAILED,
        error_kind="input",
        error_text="f.csv line 9: 'x' is not a number in column Level (dBµV)",
    )
    data = _client(client, engineer).get(reverse("case_live", args=[failing_case.pk])).json()
    by_key = {u["key"]: u for u in data["uploads"]}
    assert data["busy"] is True
    assert by_key[f"capture-{queued.pk}"]["queue"] == 1
    assert by_key[f"capture-{running.pk}"]["progress"] == 0.4
    assert "line 9" in by_key[f"capture-{failed.pk}"]["error"]
    html = client.get(reverse("case", args=[failing_case.pk])).content.decode()
    assert 'data-busy="1"' in html and "Problem in the file: f.csv line 9" in html
    assert "place 1 in the queue" in html


def _case_page_queries(client, case) -> int:
    with CaptureQueriesContext(connection) as ctx:
        response = client.get(reverse("case", args=[case.pk]))
    assert response.status_code == 200
    return len(ctx.captured_queries)


def test_the_case_page_issues_the_same_queries_for_5_and_200_captures(
    client, engineer, lead, revision, failing_case
):
    cm = cm_svc.countermeasure_propose(
        case=failing_case, by=engineer, kind="ferrite", description="choke", revision=revision
    )
    ff = failing_case.failing_frequencies.first()
    cm_svc.verification_record_levels(countermeasure=cm, by=engineer, levels_after={ff.pk: 20.0})
    caps = bulk_captures(failing_case, engineer, revision, 5)
    Capture.objects.filter(pk=caps[0].pk).update(status=AnalysisStatus.QUEUED)
    Capture.objects.filter(pk=caps[1].pk).update(
        status=AnalysisStatus.FAILED, error_text="bad", error_kind="input"
    )
    c = _client(client, engineer)
    few = _case_page_queries(c, failing_case)
    bulk_captures(failing_case, lead, revision, 195, start=5)
    assert failing_case.captures.count() == 200
    many = _case_page_queries(c, failing_case)
    assert many == few
    assert few <= 25  # a fixed, small number


def test_the_case_page_loads_no_capture_envelope(client, engineer, revision, failing_case):
    bulk_captures(failing_case, engineer, revision, 3)
    with CaptureQueriesContext(connection) as ctx:
        _client(client, engineer).get(reverse("case", args=[failing_case.pk]))
    capture_selects = [
        q["sql"] for q in ctx.captured_queries if 'FROM "emicase_capture"' in q["sql"]
    ]
    assert capture_selects and all(
        '"emicase_capture"."envelope"' not in sql for sql in capture_selects
    )
