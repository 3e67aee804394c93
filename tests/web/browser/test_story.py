"""One case told through the browser, with a real worker: from the failing scan to closure.

An engineer logs a failing scan and watches the case open; two engineers
upload captures and see them analysed live; the localisation view ranks the
board; a countermeasure gets an after-scan, is verified, and the lead closes
the case. Screenshots of the main pages land in screenshots/ (git-ignored).
"""

from __future__ import annotations

import re

import pytest

from emicase.models import Membership
from tests.web.traces import receiver_csv

pytestmark = [pytest.mark.worker, pytest.mark.slow]


@pytest.fixture
def engineer2(make_user, team):
    user = make_user("ines", first_name="Ines", last_name="Second")
    Membership.objects.create(team=team, user=user, role="engineer")
    return user


def _file(name: str, content: bytes) -> dict:
    return {"name": name, "mimeType": "text/csv", "buffer": content}


def _upload_capture(
    page, case_id: int, location: str, level: float, xy: tuple[float, float], *, more: bool
):
    page.goto(f"/cases/{case_id}/captures/new/")
    page.set_input_files(
        "#id_file",
        _file(
            f"nf-{location.split()[0]}.csv", receiver_csv([(75e6, level)], unit="dBµV", floor=5.0)
        ),
    )
    page.select_option("#id_probe_kind", "h_field")
    page.fill("#id_tip", "loop 10 mm")
    page.fill("#id_location", location)
    page.fill("#id_x_mm", str(xy[0]))
    page.fill("#id_y_mm", str(xy[1]))
    page.click("main button[name=another]" if more else "main button[type=submit]:not([name])")
    page.wait_for_selector(".messages .success")


def _margins(page) -> list[str]:
    return page.locator("#failing-table tbody tr .margin").all_inner_texts()


def test_a_case_from_the_first_fail_to_closure(
    worker, sign_in, screenshots, engineer, engineer2, lead, revision
):
    eng = sign_in(engineer)
    page = eng.page
    page.screenshot(path=screenshots / "home-empty.png")

    # --- log the failing scan (CISPR 32 Table A.4 via DOMAIN.md: 30 dBµV/m below 230 MHz, 37 above)
    page.goto("/log-a-fail/")
    page.fill("#id_title", "Radiated fail at 75 MHz")
    page.select_option("#id_revision", str(revision.pk))
    page.set_input_files(
        "#id_file",
        _file("rev-a-radiated.csv", receiver_csv([(75e6, 36.0), (400e6, 35.5), (120e6, 20.0)])),
    )
    page.check("input[name=emission_kind][value=radiated]")
    page.select_option("#id_limit_id", "cispr32-b-rad-10m")
    page.fill("#id_distance_m", "10")
    page.select_option("#id_polarisation", "vertical")
    page.fill("#id_lab", "Bench room")
    page.fill("#id_measured_on", "2026-11-03")
    page.screenshot(path=screenshots / "log-a-fail.png", full_page=True)
    page.click("main button[type=submit]")
    # The scan page follows the analysis, then goes on to the case it opened.
    page.wait_for_url(re.compile(r".*/cases/\d+/$"), timeout=60_000)
    case_id = int(re.search(r"/cases/(\d+)/", page.url).group(1))
    page.wait_for_selector("#scan-chart-box[data-drawn='1']")
    # 75 MHz is 6 dB over; 400 MHz 1.5 dB under the limit, inside the 3 dB guard band.
    margins = _margins(page)
    assert len(margins) == 2
    assert re.fullmatch(r"−(5\.[89]|6\.[0-2]) dB", margins[0]) and re.fullmatch(
        r"\+1\.[3-7] dB", margins[1]
    )
    page.click("text=Confirm the ticked frequencies")
    page.wait_for_selector(".messages .success")
    assert "proposed" not in page.locator("#failing-table").inner_text()

    # --- two engineers hunt with the same loop probe
    _upload_capture(page, case_id, "T1 magnetics", 55.0, (86, 14), more=True)
    _upload_capture(page, case_id, "U1 MCU", 34.0, (45, 40), more=False)
    other = sign_in(engineer2)
    _upload_capture(other.page, case_id, "J3 jack", 49.0, (96, 10), more=True)
    _upload_capture(other.page, case_id, "U7 buck", 28.0, (18, 58), more=False)
    # The first engineer's case page follows every capture live, the other's too.
    page.goto(f"/cases/{case_id}/")
    page.wait_for_function(
        "() => { const rows = document.querySelectorAll('[data-upload^=\"capture-\"]');"
        " return rows.length === 4 && [...rows].every(r => r.dataset.state === 'done'); }",
        timeout=60_000,
    )
    people = page.locator("#captures-table tbody td:first-child").all_inner_texts()
    assert {"Engineer", "Ines Second"} <= set(people)
    assert "Done" in page.locator("#captures-table").inner_text()
    page.set_viewport_size({"width": 1280, "height": 1000})
    page.wait_for_selector("#scan-chart-box[data-drawn='1']")
    page.screenshot(path=screenshots / "case-page.png")
    page.screenshot(path=screenshots / "case-page-full.png", full_page=True)

    # --- where is it?
    page.click("text=Where is it?")
    page.wait_for_selector("[data-chart^='map-'][data-drawn='1']")
    page.wait_for_selector("#overlay-box[data-drawn='1']")
    ranked = page.locator("table.rank tbody tr").evaluate_all(
        "rows => rows.map(r => r.dataset.location)"
    )
    assert ranked == ["T1 magnetics", "J3 jack", "U1 MCU", "U7 buck"]
    assert "Strongest at T1 magnetics" in page.locator("#headline").inner_text()
    assert page.evaluate("document.getElementById('overlay-box')._fullData.length") == 4
    page.screenshot(path=screenshots / "locate.png", full_page=True)

    # --- a countermeasure and its after-scan
    page.goto(f"/cases/{case_id}/fixes/new/")
    page.select_option("#id_kind", "ferrite")
    page.fill("#id_description", "Common-mode choke on the Ethernet pairs")
    page.click("main button[type=submit]")
    page.wait_for_url(re.compile(r".*/fixes/\d+/$"))
    fix_url = page.url
    page.click("text=Attach an after-scan")
    assert (
        page.locator("#id_limit_id").input_value() == "cispr32-b-rad-10m"
    )  # the set-up is repeated
    page.set_input_files(
        "#id_file", _file("rev-a-after.csv", receiver_csv([(75e6, 22.0), (400e6, 30.0)], seed=3))
    )
    page.fill("#id_measured_on", "2026-11-10")
    page.click("main button[type=submit]")
    page.wait_for_url(fix_url)
    # The fix page fills in the levels after once the worker is done.
    page.wait_for_selector("table.verification", timeout=60_000)
    page.wait_for_selector("[data-chart^='ba-'][data-drawn='1']")
    text = page.locator("table.verification").inner_text()
    assert text.count("✓ met") == 2
    changes = page.locator("table.verification td[data-change]").all_inner_texts()
    assert all(c.startswith("−") for c in changes)  # quieter at both frequencies
    page.screenshot(path=screenshots / "countermeasure.png", full_page=True)
    page.click("text=Mark verified")
    page.wait_for_url(re.compile(rf".*/cases/{case_id}/$"))
    assert "Fix proven" in page.locator("h1").inner_text()

    # --- the lead closes it
    boss = sign_in(lead)
    boss.page.goto(f"/cases/{case_id}/close/")
    assert boss.page.locator("input[name=closure][value=fixed]").is_checked()
    boss.page.click("main button[type=submit]")
    boss.page.wait_for_selector(".messages .success")
    assert "Closed" in boss.page.locator("h1").inner_text()
    boss.page.wait_for_selector("#scan-chart-box[data-drawn='1']")
    boss.page.screenshot(path=screenshots / "case-closed.png", full_page=True)
    boss.page.goto("/")
    boss.page.screenshot(path=screenshots / "home.png", full_page=True)
    boss.page.goto(f"/cases/{case_id}/report/")
    boss.page.wait_for_selector("[data-chart='scan-chart'][data-drawn='1']")
    boss.page.pdf(path=str(screenshots / "case-report.pdf"))
    boss.page.screenshot(path=screenshots / "report.png", full_page=True)
    assert not (eng.errors or other.errors or boss.errors), eng.errors + other.errors + boss.errors
