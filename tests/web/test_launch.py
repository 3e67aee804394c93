"""The one-command start really runs a worker on the serverless broker.

Runs ``manage.py launch`` as a user would (embedded default: SQLite and the
filesystem broker, whatever the suite itself runs on), then sends a task
through the broker's folders from another process and waits for the answer.
"""

import os
import queue
import signal
import socket
import subprocess
import sys
import threading
import time

import pytest

from tests.conftest import ROOT

pytestmark = pytest.mark.worker


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _embedded_env(var_dir) -> dict:
    env = {k: v for k, v in os.environ.items()
           if k not in ("DATABASE_URL", "CELERY_BROKER_URL", "CELERY_RESULT_BACKEND", "EMICASE_DATABASE_NAME")}
    env.update(DJANGO_SETTINGS_MODULE="emicase.settings", EMICASE_VAR_DIR=str(var_dir), PYTHONUNBUFFERED="1")
    return env


def _lines(stream, sink: queue.Queue):
    for line in stream:
        sink.put(line)


def test_launch_starts_web_and_a_worker_that_answers_through_the_filesystem_broker(tmp_path):
    var = tmp_path / "var"
    env = _embedded_env(var)
    port = _free_port()
    proc = subprocess.Popen(
        [sys.executable, "manage.py", "launch", "--no-demo", "--port", str(port), "--concurrency", "1"],
        cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
    )
    out: queue.Queue = queue.Queue()
    threading.Thread(target=_lines, args=(proc.stdout, out), daemon=True).start()
    seen = []
    try:
        deadline = time.monotonic() + 120
        while not any("running at" in line for line in seen):
            assert time.monotonic() < deadline, "launch did not report its address:\n" + "".join(seen)
            assert proc.poll() is None, "launch exited early:\n" + "".join(seen)
            try:
                seen.append(out.get(timeout=1))
            except queue.Empty:
                pass
        assert any(f"http://127.0.0.1:{port}/" in line for line in seen)
        assert (var / "emicase.sqlite3").exists()

        ping = subprocess.run(
            [sys.executable, "-c",
             "from emicase.celery import app\n"
             "print(app.send_task('emicase.ping', args=['through-the-folders']).get(timeout=90))"],
            cwd=ROOT, env=env, capture_output=True, text=True, timeout=120,
        )
        assert ping.returncode == 0, ping.stderr
        assert ping.stdout.strip() == "through-the-folders"
        assert (var / "broker" / "queue").is_dir()  # the message went through the filesystem transport
    finally:
        proc.send_signal(signal.SIGINT)
        try:
            proc.wait(timeout=60)
        except subprocess.TimeoutExpired:
            proc.kill()
            raise
    assert proc.returncode == 0, "".join(seen)
