"""Browser tests: Playwright's sync API driving Debian's Chromium against ``live_server``.

Playwright's own browser download cannot work here, so the tests launch
/usr/bin/chromium; without it (or without Playwright) they skip with the
reason, and fail instead when EMICASE_REQUIRE_SERVICES=1.
"""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from tests.conftest import ROOT, skip_or_fail

CHROMIUM = "/usr/bin/chromium"
LAUNCH_ARGS = [
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-dev-shm-usage",
]
SCREENSHOTS = ROOT / "screenshots"
PASSWORD = "pw-for-tests-only"  # tests/conftest.py make_user


@pytest.fixture(scope="module")
def browser():
    """Chromium for one test module; Playwright stops at the module's end.

    Playwright's sync API keeps an event loop running in this thread while it
    lives, and Django refuses ORM calls then (SynchronousOnlyOperation); so the
    override DJANGO_ALLOW_ASYNC_UNSAFE is set only here, for as long as
    Playwright runs, and never reaches the rest of the suite (where
    ``check --deploy`` rightly refuses it).
    """
    if not os.path.exists(CHROMIUM):
        skip_or_fail(f"needs Debian's Chromium at {CHROMIUM} (apt-get install -y chromium)")
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        skip_or_fail("needs Playwright for Python (pip install -e '.[test]')")
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("DJANGO_ALLOW_ASYNC_UNSAFE", "true")
        pw = sync_playwright().start()
        try:
            b = pw.chromium.launch(executable_path=CHROMIUM, args=LAUNCH_ARGS)
        except (
            Exception
        ) as exc:  # a browser that will not start is an environment problem, said in words
            pw.stop()
            skip_or_fail(f"Chromium at {CHROMIUM} did not start: {exc}")
        yield b
        b.close()
        pw.stop()


@pytest.fixture
def screenshots() -> Path:
    SCREENSHOTS.mkdir(exist_ok=True)
    return SCREENSHOTS


class Session:
    """One signed-in person in their own browser context."""

    def __init__(self, browser, base_url: str, user, width: int = 1280):
        self.context = browser.new_context(
            viewport={"width": width, "height": 900}, base_url=base_url
        )
        self.context.set_default_timeout(30_000)
        self.page = self.context.new_page()
        self.errors: list[str] = []
        self.page.on("pageerror", lambda exc: self.errors.append(str(exc)))
        self.page.on("console", lambda m: self.errors.append(m.text) if m.type == "error" else None)
        self.page.goto("/signin/")
        self.page.fill("#id_username", user.username)
        self.page.fill("#id_password", PASSWORD)
        self.page.click("main button[type=submit]")
        self.page.wait_for_url(f"{base_url}/")

    def close(self) -> None:
        self.context.close()


@pytest.fixture
def sign_in(browser, live_server):
    opened: list[Session] = []

    def make(user, width: int = 1280) -> Session:
        s = Session(browser, live_server.url, user, width=width)
        opened.append(s)
        return s

    yield make
    for s in opened:
        s.close()
