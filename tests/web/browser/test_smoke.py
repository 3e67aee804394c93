"""Playwright and Debian's Chromium work together: a chart page draws, at desk and tablet widths."""

from __future__ import annotations

import pytest

from tests.web.pages_data import analysed_scan

pytestmark = pytest.mark.django_db(transaction=True)


@pytest.fixture(autouse=True)
def _media(settings, tmp_path):
    settings.MEDIA_ROOT = tmp_path


def test_the_case_page_draws_its_chart_at_desk_and_tablet_width(sign_in, engineer, revision):
    # CISPR 32 Table A.4 (class B, 10 m) via DOMAIN.md: 36 dBµV/m at 75 MHz is 6 dB over.
    scan = analysed_scan(revision, engineer, [(75e6, 36.0)], title="Smoke")
    for width in (1280, 800):
        s = sign_in(engineer, width=width)
        s.page.goto(f"/cases/{scan.case_id}/")
        s.page.wait_for_selector("#scan-chart-box[data-drawn='1']")
        # Drawn as SVG (no WebGL): the trace, the limit line and the failing-frequency marker.
        assert s.page.locator("#scan-chart-box .scatterlayer .trace").count() >= 4
        drawn = s.page.evaluate(
            "document.getElementById('scan-chart-box')._fullData.find(t => t.name === 'Trace').x.length"
        )
        assert drawn == len(scan.envelope["frequency_hz"])  # the stored envelope, every point of it
        # Nothing wider than the window: usable on a tablet.
        assert s.page.evaluate("document.documentElement.scrollWidth") <= width + 1
        # Every action is a real link or button, reachable by keyboard.
        s.page.keyboard.press("Tab")
        assert s.page.evaluate("document.activeElement.tagName") == "A"
        assert not s.errors, s.errors
