"""Shared fixtures: the three personas, a product to work on, and a real worker.

Personas (after healthchecks' habit): ``lead`` and ``engineer`` share a team,
``viewer`` reads it, ``outsider`` belongs to another team and must see nothing.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


def services_required() -> bool:
    """CI sets EMICASE_REQUIRE_SERVICES=1 on the PostgreSQL/Redis run: there a skip is a failure."""
    return os.environ.get("EMICASE_REQUIRE_SERVICES") == "1"


def skip_or_fail(reason: str) -> None:
    if services_required():
        pytest.fail(f"{reason} — but EMICASE_REQUIRE_SERVICES=1 says it must run here")
    pytest.skip(reason)


@pytest.fixture
def redis_broker(settings):
    if not settings.CELERY_BROKER_URL.startswith("redis://"):
        skip_or_fail("needs Redis: set CELERY_BROKER_URL=redis://127.0.0.1:6379/0")
    return settings.CELERY_BROKER_URL


@pytest.fixture
def postgres(settings):
    if settings.DATABASES["default"]["ENGINE"] != "django.db.backends.postgresql":
        skip_or_fail("needs PostgreSQL: set DATABASE_URL=postgres://postgres@127.0.0.1:5432/test")


# ----------------------------------------------------------------- personas


@pytest.fixture
def make_user(django_user_model):
    def make(username: str, **extra):
        return django_user_model.objects.create_user(username=username, password="pw-for-tests-only", **extra)

    return make


@pytest.fixture
def team(db):
    from emicase.models import Team

    return Team.objects.create(name="Test bench", slug="test-bench", guard_band_db=3.0, frequency_tolerance_pct=0.5)


@pytest.fixture
def other_team(db):
    from emicase.models import Team

    return Team.objects.create(name="Elsewhere", slug="elsewhere")


def _member(make_user, team, username, role):
    from emicase.models import Membership

    user = make_user(username, first_name=username.title())
    Membership.objects.create(team=team, user=user, role=role)
    return user


@pytest.fixture
def lead(make_user, team):
    return _member(make_user, team, "lead", "lead")


@pytest.fixture
def engineer(make_user, team):
    return _member(make_user, team, "engineer", "engineer")


@pytest.fixture
def viewer(make_user, team):
    return _member(make_user, team, "viewer", "viewer")


@pytest.fixture
def outsider(make_user, other_team):
    return _member(make_user, other_team, "outsider", "lead")


@pytest.fixture
def product(team):
    from emicase.models import Product

    return Product.objects.create(team=team, name="Test controller")


@pytest.fixture
def revision(product):
    from emicase.models import EmissionSource, Revision

    rev = Revision.objects.create(product=product, hardware_label="A", firmware_label="1.0")
    EmissionSource.objects.create(revision=rev, name="PHY clock", kind="clock", nominal_frequency_hz=25e6,
                                  tolerance_hz=1250)
    return rev


@pytest.fixture
def case(product, engineer):
    from emicase.services.cases import case_open

    return case_open(product=product, title="Radiated fail at 75 MHz", by=engineer)


# ----------------------------------------------------------------- a real worker


def _clear_broker(settings) -> None:
    if settings.CELERY_BROKER_URL.startswith("filesystem://"):
        folder = Path(settings.CELERY_BROKER_TRANSPORT_OPTIONS["data_folder_in"])
        shutil.rmtree(folder, ignore_errors=True)
        folder.mkdir(parents=True, exist_ok=True)
    else:
        from emicase.celery import app

        with app.connection_for_write() as conn:
            for queue in ("analysis", "default"):
                try:
                    conn.default_channel.queue_purge(queue)
                except Exception:  # the queue may not exist yet
                    pass


class Worker:
    """A real ``celery worker`` process on the configured broker and the suite's database."""

    def __init__(self, log_path: Path, concurrency: int = 1):
        from django.conf import settings
        from django.db import connection

        self.log_path = log_path
        self.env = dict(os.environ)
        self.env.update(
            DJANGO_SETTINGS_MODULE="tests.django_settings",
            EMICASE_DATABASE_NAME=str(connection.settings_dict["NAME"]),
            EMICASE_VAR_DIR=str(settings.VAR_DIR),
            # Fail fast on a held lock so the reliability tests can make the
            # database "briefly unavailable" (the task then retries).
            EMICASE_SQLITE_TIMEOUT="1",
            EMICASE_DB_LOCK_TIMEOUT_MS="1000",
        )
        self.concurrency = concurrency
        self.process: subprocess.Popen | None = None

    def start(self) -> Worker:
        log = open(self.log_path, "ab")
        self.process = subprocess.Popen(
            [sys.executable, "-m", "celery", "-A", "emicase", "worker", "--loglevel", "INFO",
             "--queues", "analysis,default", "--concurrency", str(self.concurrency),
             "--without-mingle", "--without-gossip", "--hostname", f"suite-{os.getpid()}-{time.time_ns()}@%h"],
            cwd=ROOT, env=self.env, stdout=log, stderr=subprocess.STDOUT,
        )
        self.wait_ready()
        return self

    def wait_ready(self, timeout: float = 90.0) -> None:
        from emicase.tasks import ping

        deadline = time.monotonic() + timeout
        result = ping.delay("ready")
        while time.monotonic() < deadline:
            if self.process.poll() is not None:
                raise RuntimeError(f"worker exited with {self.process.returncode}; log: {self.log_path}")
            if result.ready():
                assert result.get() == "ready"
                return
            time.sleep(0.2)
        raise RuntimeError(f"worker did not answer within {timeout:.0f} s; log: {self.log_path}")

    def stop(self) -> None:
        if self.process and self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(timeout=30)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait()

    def kill(self) -> None:
        """SIGKILL the whole worker (main process and its pool children)."""
        import signal

        if self.process and self.process.poll() is None:
            children = subprocess.run(["pgrep", "-P", str(self.process.pid)], capture_output=True, text=True).stdout.split()
            os.kill(self.process.pid, signal.SIGKILL)
            for pid in children:
                try:
                    os.kill(int(pid), signal.SIGKILL)
                except ProcessLookupError:
                    pass
            self.process.wait()


@pytest.fixture(scope="session")
def _suite_worker(django_db_setup, django_db_blocker, tmp_path_factory):
    from django.conf import settings

    _clear_broker(settings)
    holder = {"worker": None, "log": tmp_path_factory.mktemp("worker") / "worker.log"}
    yield holder
    if holder["worker"] is not None:
        holder["worker"].stop()


@pytest.fixture
def worker(transactional_db, _suite_worker):
    """A real worker process, shared by the tests that ask for it and restarted if a test killed it.

    Tests that use it see the database through transactional_db, as the worker does.
    """
    w = _suite_worker["worker"]
    if w is None or w.process.poll() is not None:
        w = _suite_worker["worker"] = Worker(_suite_worker["log"]).start()
    yield w
    # Let the worker finish what the test queued before the database is
    # flushed: a TRUNCATE racing the worker's store transaction deadlocks on
    # PostgreSQL.
    if w.process.poll() is None:
        _wait_idle()


def _wait_idle(timeout: float = 60.0) -> None:
    from emicase.models import AnalysisStatus, Capture, Scan

    busy = (AnalysisStatus.QUEUED, AnalysisStatus.RUNNING)
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if not (Scan.objects.filter(status__in=busy).exists() or Capture.objects.filter(status__in=busy).exists()):
            time.sleep(0.3)  # a re-read queued by the last store may still be running
            return
        time.sleep(0.1)


def wait_until(predicate, timeout: float = 60.0, interval: float = 0.2, what: str = "condition"):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = predicate()
        if value:
            return value
        time.sleep(interval)
    raise AssertionError(f"timed out after {timeout:.0f} s waiting for {what}")


# ----------------------------------------------------------------- the run's own folder


def pytest_sessionstart(session):
    """Prune the folders of earlier runs that are gone (see tests/django_settings.py)."""
    own = os.environ.get("EMICASE_TEST_RUN")
    for folder in (ROOT / "var" / "test").glob("run-*"):
        run = folder.name.removeprefix("run-")
        if run != own and time.time() - folder.stat().st_mtime > 6 * 3600:
            shutil.rmtree(folder, ignore_errors=True)


def pytest_sessionfinish(session, exitstatus):
    """A run that passed leaves nothing behind; a failed one keeps its worker logs and files."""
    from django.conf import settings

    var = Path(settings.VAR_DIR)
    if exitstatus == 0 and var.parent == ROOT / "var" / "test" and var.name.startswith("run-"):
        shutil.rmtree(var, ignore_errors=True)
