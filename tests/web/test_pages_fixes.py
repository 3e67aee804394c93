"""Countermeasures, their verification, closing a case, and the printable report and CSV."""

from __future__ import annotations

import csv
import io
import math
import re

import pytest
from django.core.files.uploadedfile import SimpleUploadedFile
from django.urls import reverse

from emicase.models import Case, Countermeasure, FailingFrequency, Scan, Verification
from emicase.services import countermeasures as cm_svc
from emicase.services.analysis import analyse_scan
from tests.web.pages_data import SCAN_SETUP, analysed_capture, analysed_scan
from tests.web.traces import receiver_csv


@pytest.fixture(autouse=True)
def _media(settings, tmp_path):
    settings.MEDIA_ROOT = tmp_path


@pytest.fixture
def failing_case(revision, engineer):
    # CISPR 32 Table A.4 (class B, 10 m) via DOMAIN.md: 30 dBµV/m below 230 MHz, 37 above.
    scan = analysed_scan(revision, engineer, [(75e6, 36.0), (400e6, 35.5)], title="Radiated fail")
    case = Case.objects.get(pk=scan.case_id)
    case.failing_frequencies.update(confirmed=True)
    return case


@pytest.fixture
def cm(failing_case, engineer, revision):
    return cm_svc.countermeasure_propose(
        case=failing_case,
        by=engineer,
        kind="ferrite",
        description="Common-mode choke on the Ethernet pairs",
        revision=revision,
    )


def _read(level: float, floor: float = 15.0) -> float:
    """What the built trace reads at a tone: tone and floor add as powers (tests/web/traces.py; worked example)."""
    return 10 * math.log10(10 ** (level / 10) + 10 ** (floor / 10))


def _after_scan(client, cm, tones):
    data = {
        **SCAN_SETUP,
        "measured_on": "2026-11-10",
        "file": SimpleUploadedFile("after.csv", receiver_csv(tones, seed=3)),
    }
    response = client.post(reverse("fix_after_scan", args=[cm.pk]), data)
    assert response.status_code == 302, response.content.decode()[:2000]
    scan = Scan.objects.get(original_name="after.csv")
    assert analyse_scan(scan.pk) == "done"
    return Verification.objects.get(after_scan=scan)


def test_proposing_a_countermeasure_needs_a_description(client, engineer, failing_case, revision):
    client.force_login(engineer)
    url = reverse("fix_new", args=[failing_case.pk])
    html = client.post(
        url, {"kind": "ferrite", "description": "", "revision": revision.pk}
    ).content.decode()
    assert "Describe the change you will try." in html
    response = client.post(
        url, {"kind": "filtering", "description": "100 pF on the clock", "revision": revision.pk}
    )
    cm = Countermeasure.objects.get()
    assert response.url == reverse("fix", args=[cm.pk]) and cm.description == "100 pF on the clock"


def test_the_after_scan_form_repeats_the_first_scans_set_up(client, engineer, cm):
    client.force_login(engineer)
    html = client.get(reverse("fix_after_scan", args=[cm.pk])).content.decode()
    assert '<option value="cispr32-b-rad-10m" selected>' in html
    assert 'value="Bench room"' in html


def test_an_after_scan_shows_before_after_change_and_new_margin(client, engineer, cm, failing_case):
    client.force_login(engineer)
    # After the change: 75 MHz down to 22 dBµV/m (8 dB margin), 400 MHz down to 30 (7 dB margin).
    v = _after_scan(client, cm, [(75e6, 22.0), (400e6, 30.0)])
    html = client.get(reverse("fix", args=[cm.pk])).content.decode()
    table = re.search(rf'data-verification="{v.pk}">(.*?)</table>', html, re.S).group(1)
    changes = [float(x) for x in re.findall(r'data-change="([-\d.]+)"', table)]
    # change = after − before, each read over the 15 dB floor: about −13.2 dB and −5.5 dB.
    assert changes == [
        pytest.approx(_read(22.0) - _read(36.0), abs=0.3),
        pytest.approx(_read(30.0) - _read(35.5), abs=0.3),
    ]
    assert re.findall(r"margin clear[^>]*>\+(\d+\.\d) dB", table) and table.count("✓ met") == 2
    assert f'id="ba-{v.pk}"' in html  # before/after chart
    # Every failing frequency clears the 3 dB guard band: verifying needs no reason.
    response = client.post(
        reverse("fix_verify", args=[cm.pk]), {"verification": v.pk, "reason": ""}
    )
    assert response.url == reverse("case", args=[failing_case.pk])
    cm.refresh_from_db()
    failing_case.refresh_from_db()
    assert cm.status == "verified" and failing_case.stage == Case.Stage.PROVEN


def test_verifying_inside_the_guard_band_needs_a_reason(client, engineer, cm):
    client.force_login(engineer)
    # 400 MHz only 1.5 dB under its 37 dBµV/m limit after the change: inside the 3 dB guard band.
    v = _after_scan(client, cm, [(75e6, 22.0), (400e6, 35.5)])
    response = client.post(
        reverse("fix_verify", args=[cm.pk]), {"verification": v.pk, "reason": ""}, follow=True
    )
    html = response.content.decode()
    assert "stay below the 3 dB guard band" in html and "give a reason" in html
    cm.refresh_from_db()
    assert cm.status == "proposed"
    client.post(
        reverse("fix_verify", args=[cm.pk]),
        {"verification": v.pk, "reason": "Test house reads 4 dB lower"},
    )
    cm.refresh_from_db()
    assert cm.status == "verified" and cm.verified_reason == "Test house reads 4 dB lower"


def test_after_captures_estimate_the_levels_after(
    client, engineer, lead, cm, failing_case, revision
):
    f75 = failing_case.failing_frequencies.get(frequency_hz__lt=100e6)
    f400 = failing_case.failing_frequencies.get(frequency_hz__gt=100e6)
    analysed_capture(
        failing_case,
        engineer,
        revision,
        [(f75.frequency_hz, 50.0), (f400.frequency_hz, 40.0)],
        location="J3 jack",
    )
    analysed_capture(
        failing_case,
        engineer,
        revision,
        [(f75.frequency_hz, 40.0), (f400.frequency_hz, 30.0)],
        location="U1 MCU",
    )
    # The same spot, probe and tip after the change: 12 dB quieter at 75 MHz, 9 dB at 400 MHz.
    analysed_capture(
        failing_case,
        lead,
        revision,
        [(f75.frequency_hz, 38.0), (f400.frequency_hz, 31.0)],
        location="J3 jack",
        countermeasure=cm,
    )
    client.force_login(engineer)
    html = client.get(reverse("fix", args=[cm.pk])).content.decode()
    assert "Estimate the levels after from these captures" in html and 'id="pair-chart"' in html
    client.post(reverse("fix_estimate", args=[cm.pk]), {"note": ""})
    v = Verification.objects.get(countermeasure=cm)
    after = {r.failing_frequency_id: r.level_after for r in v.results.all()}
    # Level after = failing level + change at the loudest spot before (J3): worked example.
    assert after[f75.pk] == pytest.approx(f75.level - 12.0, abs=0.6)
    assert after[f400.pk] == pytest.approx(f400.level - 9.0, abs=0.6)
    assert "A new scan gives the verdict" in v.note


def test_closing_is_for_a_lead_fixed_by_a_verified_countermeasure(
    client, engineer, lead, cm, failing_case
):
    client.force_login(engineer)
    v = _after_scan(client, cm, [(75e6, 22.0), (400e6, 30.0)])
    cm_svc.countermeasure_verify(countermeasure=cm, verification=v, by=engineer)
    assert client.get(reverse("case_close", args=[failing_case.pk])).status_code == 403
    client.force_login(lead)
    html = client.get(reverse("case_close", args=[failing_case.pk])).content.decode()
    assert f'<option value="{cm.pk}" selected>' in html
    response = client.post(
        reverse("case_close", args=[failing_case.pk]), {"closure": "fixed", "countermeasure": cm.pk}
    )
    assert response.status_code == 302
    failing_case.refresh_from_db()
    assert (failing_case.stage, failing_case.closure, failing_case.fixed_by_id) == (
        "closed",
        "fixed",
        cm.pk,
    )
    page = client.get(reverse("case", args=[failing_case.pk])).content.decode()
    assert "Closed" in page and "Reopen the case" in page and "Add a capture" not in page


def test_a_waiver_needs_a_reason_beside_the_field(client, lead, failing_case):
    client.force_login(lead)
    url = reverse("case_close", args=[failing_case.pk])
    html = client.post(url, {"closure": "waived", "reason": " "}).content.decode()
    assert "Say why the remaining emissions are accepted." in html
    html = client.post(url, {"closure": "fixed"}).content.decode()
    assert "Choose the verified countermeasure that fixed it." in html
    client.post(url, {"closure": "waived", "reason": "Accepted by QA for the pilot run"})
    failing_case.refresh_from_db()
    assert failing_case.closure == "waived" and failing_case.closure_reason.startswith("Accepted")
    client.post(reverse("case_reopen", args=[failing_case.pk]), {"reason": "Test house disagrees"})
    failing_case.refresh_from_db()
    assert failing_case.stage == Case.Stage.HUNTING


def test_a_viewer_cannot_touch_a_countermeasure(client, viewer, cm):
    client.force_login(viewer)
    html = client.get(reverse("fix", args=[cm.pk])).content.decode()
    assert (
        reverse("fix_after_scan", args=[cm.pk]) not in html
        and reverse("fix_verify", args=[cm.pk]) not in html
    )
    assert reverse("fix_trial", args=[cm.pk]) not in html
    for name in ("fix_trial", "fix_estimate", "fix_verify", "fix_reject"):
        assert client.post(reverse(name, args=[cm.pk]), {"reason": "x"}).status_code == 403
    assert client.get(reverse("fix_after_scan", args=[cm.pk])).status_code == 403
    cm.refresh_from_db()
    assert cm.status == "proposed"


def test_another_teams_countermeasure_is_not_found(client, outsider, cm):
    client.force_login(outsider)
    for name in ("fix", "fix_after_scan", "fix_after_capture"):
        assert client.get(reverse(name, args=[cm.pk])).status_code == 404


def test_trial_and_rejection_from_the_page(client, engineer, cm, failing_case):
    client.force_login(engineer)
    client.post(reverse("fix_trial", args=[cm.pk]))
    cm.refresh_from_db()
    failing_case.refresh_from_db()
    assert cm.status == "trial" and failing_case.stage == Case.Stage.TRIAL
    client.post(reverse("fix_reject", args=[cm.pk]), {"reason": "No change at 75 MHz"})
    cm.refresh_from_db()
    assert cm.status == "rejected"


def test_the_report_prints_the_story(client, engineer, cm, failing_case):
    client.force_login(engineer)
    _after_scan(client, cm, [(75e6, 22.0), (400e6, 30.0)])
    html = client.get(reverse("case_report", args=[failing_case.pk])).content.decode()
    assert (
        "Failing frequencies" in html
        and "Countermeasures and verifications" in html
        and "Timeline" in html
    )
    assert "Common-mode choke on the Ethernet pairs" in html
    assert "data-print" in html and 'id="scan-chart"' in html
    assert "pre-compliance results, not certification" in html


def test_the_csv_lists_failing_frequencies_and_verifications(client, engineer, cm, failing_case):
    client.force_login(engineer)
    _after_scan(client, cm, [(75e6, 22.0), (400e6, 30.0)])
    response = client.get(reverse("case_report_csv", args=[failing_case.pk]))
    assert response["Content-Type"].startswith("text/csv")
    rows = list(csv.DictReader(io.StringIO(response.content.decode("utf-8-sig"))))
    failing = [r for r in rows if r["section"] == "failing"]
    checks = [r for r in rows if r["section"] == "verification"]
    assert len(failing) == 2 and len(checks) == 2
    assert float(failing[0]["margin_db"]) == pytest.approx(
        -6.0, abs=0.3
    )  # CISPR 32 Table A.4 via DOMAIN.md
    assert float(checks[0]["new_margin_db"]) == pytest.approx(30.0 - _read(22.0), abs=0.3)
    assert checks[0]["meets_guard_band"] == "True"


def test_the_csv_neutralises_formula_looking_labels(client, engineer, product, revision):
    from emicase.services.cases import case_open

    case = case_open(product=product, title='=HYPERLINK("http://x")', by=engineer)
    FailingFrequency.objects.create(
        case=case, frequency_hz=75e6, level=38.5, limit_level=30.0, confirmed=True
    )
    cm_svc.countermeasure_propose(
        case=case, by=engineer, kind="other", description="+cmd|' /C calc'!A0", revision=revision
    )
    v = cm_svc.verification_record_levels(
        countermeasure=case.countermeasures.get(),
        by=engineer,
        levels_after={case.failing_frequencies.get().pk: 20.0},
        note="@SUM(1)",
    )
    assert v.results.count() == 1
    client.force_login(engineer)
    text = client.get(reverse("case_report_csv", args=[case.pk])).content.decode("utf-8-sig")
    rows = list(csv.reader(io.StringIO(text)))
    cells = [c for row in rows[1:] for c in row]
    assert (
        '\'=HYPERLINK("http://x")' in cells
        and "'+cmd|' /C calc'!A0" in cells
        and "'@SUM(1)" in cells
    )
    assert not any(c.startswith(("=", "+", "@")) for c in cells)
    # Numbers stay numbers: a negative margin is not turned into text.
    assert any(c == "-8.5" for c in cells)


def test_csv_safe_prefixes_every_formula_lead():
    from emicase.views import csv_safe

    for lead_char in ("=", "+", "-", "@", "\t", "\r"):
        assert csv_safe(lead_char + "x") == "'" + lead_char + "x"
    assert csv_safe("plain") == "plain" and csv_safe(-3.5) == -3.5
