"""One command for a laptop: database, demo data, a worker and the web server.

    python manage.py launch            # http://127.0.0.1:8000/, demo / see output

It supervises two child processes (a Celery worker on the configured broker,
the filesystem one by default, and Django's development server) and stops
both on Ctrl-C. Every minute it also runs the sweeper, which re-queues uploads
a dead worker left behind. Not for production: see README, "Production".
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
import urllib.request

from django.conf import settings
from django.core.management import BaseCommand, call_command

from emicase.demo import DEMO_PASSWORD, DEMO_USERNAME


class Command(BaseCommand):
    help = "Migrate, load the demo data, start a Celery worker and the web server."

    def add_arguments(self, parser):
        parser.add_argument("--host", default="127.0.0.1")
        parser.add_argument("--port", type=int, default=8000)
        parser.add_argument("--concurrency", type=int, default=2, help="worker processes (default 2)")
        parser.add_argument("--no-demo", action="store_true", help="do not load the demo data")
        parser.add_argument("--sweep-every", type=float, default=60.0, help="seconds between sweeps")

    def handle(self, *args, **opts):
        call_command("migrate", interactive=False, verbosity=0)
        if not opts["no_demo"]:
            call_command("load_demo", verbosity=1)
        env = dict(os.environ)
        children = [
            subprocess.Popen(
                [
                    sys.executable, "-m", "celery", "-A", "emicase", "worker",
                    "--loglevel", "INFO", "--queues", "analysis,default",
                    "--concurrency", str(opts["concurrency"]), "--hostname", "emicase-local@%h",
                ],
                env=env,
            ),
            subprocess.Popen(
                [sys.executable, str(settings.BASE_DIR / "manage.py"), "runserver", "--noreload",
                 f"{opts['host']}:{opts['port']}"],
                env=env,
            ),
        ]
        address = f"http://{opts['host']}:{opts['port']}/"
        stop = {"now": False}

        def on_signal(signum, frame):
            stop["now"] = True

        signal.signal(signal.SIGINT, on_signal)
        signal.signal(signal.SIGTERM, on_signal)
        try:
            if self._wait_for(address + "health/", children, stop):
                self.stdout.write(self.style.SUCCESS(f"emicase is running at {address}"))
                if not opts["no_demo"]:
                    self.stdout.write(f"Demo sign-in: user '{DEMO_USERNAME}', password '{DEMO_PASSWORD}'")
                self.stdout.write("Worker and web server running; press Ctrl-C to stop both.")
            next_sweep = time.monotonic()
            while not stop["now"] and all(c.poll() is None for c in children):
                if time.monotonic() >= next_sweep:
                    try:
                        call_command("sweep_stuck", verbosity=0)
                    except Exception as exc:  # the database or broker is away: sweep next time
                        self.stderr.write(f"sweep skipped ({type(exc).__name__}: {exc}); trying again later")
                    next_sweep = time.monotonic() + opts["sweep_every"]
                time.sleep(0.5)
        finally:
            for child in children:
                if child.poll() is None:
                    child.send_signal(signal.SIGTERM)
            for child in children:
                try:
                    child.wait(timeout=20)
                except subprocess.TimeoutExpired:
                    child.kill()
        dead = [c for c in children if c.returncode not in (0, -signal.SIGTERM, None)]
        if dead and not stop["now"]:
            self.stderr.write("A child process stopped unexpectedly; see its output above.")
            sys.exit(1)

    def _wait_for(self, url: str, children, stop, timeout: float = 60.0) -> bool:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline and not stop["now"]:
            if any(c.poll() is not None for c in children):
                return False
            try:
                with urllib.request.urlopen(url, timeout=2) as response:
                    if response.status == 200:
                        return True
            except OSError:
                pass
            time.sleep(0.3)
        return False
