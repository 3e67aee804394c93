"""The bench uploader: one capture per file however often it is retried or re-sent, bounded retries,
refusals reported and not retried, a watched folder, and no Django on the bench PC."""

from __future__ import annotations

import ast
import http.client
import socket
import subprocess
import sys
import threading
import time
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from urllib.parse import urlsplit

import pytest
from rest_framework.authtoken.models import Token

from emicase import uploader
from emicase.models import Capture
from tests.conftest import ROOT
from tests.web.traces import receiver_csv

PNG = b"\x89PNG\r\n\x1a\n" + b"\x00" * 64


class _Relay(BaseHTTPRequestHandler):
    """Forwards each request to the real server; the first ``drop`` answers never reach the client."""

    protocol_version = "HTTP/1.1"

    def log_message(self, *args):  # keep the test output quiet
        pass

    def do_GET(self):
        self._relay()

    def do_POST(self):
        self._relay()

    def _relay(self):
        server: Relay = self.server
        body = self.rfile.read(int(self.headers.get("Content-Length", 0)))
        with server.lock:
            server.requests += 1
            n = server.requests
        if server.upstream is None:
            self.send_response(503)
            self.send_header("Content-Length", "0")
            self.end_headers()
            return
        upstream = http.client.HTTPConnection(*server.upstream, timeout=30)
        headers = {k: v for k, v in self.headers.items() if k.lower() not in ("host", "connection")}
        upstream.request(self.command, self.path, body=body, headers=headers)
        answer = upstream.getresponse()
        data = answer.read()
        upstream.close()
        if n <= server.drop:
            # The server did the work; the connection dies before the client hears of it.
            self.close_connection = True
            self.connection.shutdown(socket.SHUT_RDWR)
            return
        self.send_response(answer.status)
        for name, value in answer.getheaders():
            if name.lower() not in ("content-length", "connection", "transfer-encoding"):
                self.send_header(name, value)
        self.send_header("Content-Length", str(len(data)))
        self.end_headers()
        self.wfile.write(data)


class Relay(ThreadingHTTPServer):
    daemon_threads = True

    def __init__(self, upstream_url: str | None, drop: int = 0):
        super().__init__(("127.0.0.1", 0), _Relay)
        self.upstream = (
            None
            if upstream_url is None
            else (urlsplit(upstream_url).hostname, urlsplit(upstream_url).port)
        )
        self.drop = drop
        self.requests = 0
        self.lock = threading.Lock()
        self.thread = threading.Thread(target=self.serve_forever, daemon=True)

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.server_address[1]}"

    def __enter__(self):
        self.thread.start()
        return self

    def __exit__(self, *exc):
        self.shutdown()
        self.server_close()


class Log:
    def __init__(self):
        self.lines: list[str] = []

    def __call__(self, *args, file=None):
        self.lines.append(" ".join(map(str, args)))

    def __str__(self) -> str:
        return "\n".join(self.lines)


@pytest.fixture
def token(engineer, worker) -> str:
    # The suite's worker analyses what these tests upload; asking for it here
    # makes each test wait for those analyses before the database is flushed.
    return Token.objects.create(user=engineer).key


@pytest.fixture
def traces(tmp_path) -> list[Path]:
    out = []
    for n, tone_hz in enumerate((75e6, 125e6)):
        path = tmp_path / f"U4-{n}.csv"
        path.write_bytes(receiver_csv([(tone_hz, 50.0)], unit="dBµV", floor=5.0, seed=n))
        out.append(path)
    return out


def args(url: str, token: str, case, *rest) -> list[str]:
    return [
        "--url",
        url,
        "--token",
        token,
        "--case",
        str(case.pk),
        "--probe",
        "h_field",
        "--tip",
        "loop 10 mm",
        "--location",
        "U4",
        "--x",
        "10",
        "--y",
        "20",
        "--backoff",
        "0.05",
        *map(str, rest),
    ]


def test_a_retry_after_a_dropped_answer_stores_exactly_one_capture(
    live_server, token, case, revision, traces
):
    log = Log()
    with Relay(live_server.url, drop=1) as relay:
        assert uploader.main(args(relay.url, token, case, traces[0]), log=log) == 0
    assert relay.requests == 2, log  # the first attempt, whose answer was lost, and one retry
    [capture] = Capture.objects.all()
    assert (capture.location, capture.x_mm, capture.y_mm, capture.tip) == (
        "U4",
        10.0,
        20.0,
        "loop 10 mm",
    )
    assert capture.idempotency_key == uploader.idempotency_key(traces[0], case.pk)
    assert f"already stored as capture {capture.pk}" in str(log)


def test_sending_the_same_files_again_makes_no_second_capture(
    live_server, token, case, revision, traces
):
    first, again = Log(), Log()
    assert uploader.main(args(live_server.url, token, case, *traces), log=first) == 0
    assert uploader.main(args(live_server.url, token, case, *traces), log=again) == 0
    assert Capture.objects.count() == 2
    assert (
        str(first).count("stored as capture") == 2
        and str(again).count("already stored as capture") == 2
    )


def test_a_refused_file_is_reported_and_not_retried(live_server, token, case, revision, tmp_path):
    photo = tmp_path / "board.png"
    photo.write_bytes(PNG)
    log = Log()
    with Relay(live_server.url) as relay:
        assert uploader.main(args(relay.url, token, case, photo), log=log) == 1
    assert relay.requests == 1
    assert "board.png: refused (400): file: board.png is not a text trace" in str(log)
    assert not Capture.objects.exists()


def test_server_errors_are_retried_a_bounded_number_of_times(tmp_path):
    trace = tmp_path / "t.csv"
    trace.write_bytes(b"1,2\n")
    log = Log()
    with Relay(None) as always_503:
        started = time.monotonic()
        code = uploader.main(
            [
                "--url",
                always_503.url,
                "--token",
                "k",
                "--case",
                "1",
                "--probe",
                "h_field",
                "--tip",
                "t",
                "--location",
                "U1",
                "--retries",
                "2",
                "--backoff",
                "0.05",
                str(trace),
            ],
            log=log,
        )
    assert code == 1 and always_503.requests == 3
    assert "gave up after 3 attempts (server answered 503)" in str(log)
    assert time.monotonic() - started < 5  # pauses of 0.05 s then 0.1 s


def test_an_unreachable_server_is_retried_then_given_up(tmp_path):
    with socket.socket() as s:  # a port nobody listens on
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    trace = tmp_path / "t.csv"
    trace.write_bytes(b"1,2\n")
    log = Log()
    code = uploader.main(
        [
            "--url",
            f"http://127.0.0.1:{port}",
            "--token",
            "k",
            "--case",
            "1",
            "--probe",
            "e_field",
            "--tip",
            "t",
            "--location",
            "U1",
            "--retries",
            "1",
            "--backoff",
            "0.01",
            str(trace),
        ],
        log=log,
    )
    assert code == 1 and "gave up after 2 attempts" in str(log)


def test_watching_a_folder_sends_each_finished_file_once(
    live_server, token, case, revision, tmp_path, traces
):
    folder = tmp_path / "exports"
    folder.mkdir()
    traces[0].rename(folder / traces[0].name)
    (folder / "notes.txt").write_text("not a trace")  # does not match the pattern
    (folder / ".partial.csv").write_bytes(b"1,2\n")  # hidden: the instrument is still writing it
    log = Log()
    watcher = threading.Thread(
        target=lambda: log.lines.append(
            f"exit {uploader.main(args(live_server.url, token, case, '--watch', folder, '--pattern', '*.csv', '--interval', '0.1', '--max-files', '2', '--timeout', '30'), log=log)}"
        )
    )
    watcher.start()
    time.sleep(0.5)
    traces[1].rename(folder / traces[1].name)  # a new export appears while it watches
    watcher.join(timeout=40)
    assert not watcher.is_alive()
    assert log.lines[-1] == "exit 0", log
    assert sorted(Capture.objects.values_list("original_name", flat=True)) == [
        "U4-0.csv",
        "U4-1.csv",
    ]


def test_a_watcher_waits_until_a_file_stops_growing(tmp_path):
    watcher = uploader.Watcher(tmp_path, ["*"])
    growing = tmp_path / "sweep.csv"
    growing.write_bytes(b"1,2\n")
    assert watcher.ready() == []  # first sight: maybe still being written
    with open(growing, "ab") as fh:
        fh.write(b"3,4\n")
    assert watcher.ready() == []  # it grew
    assert watcher.ready() == [growing]
    watcher.remember(growing)
    assert watcher.ready() == []


def test_a_watcher_remembers_across_restarts_with_a_state_file(tmp_path):
    (tmp_path / "a.csv").write_bytes(b"1,2\n")
    state = tmp_path / ".sent.json"
    first = uploader.Watcher(tmp_path, ["*.csv"], state_file=state)
    first.ready()
    [path] = first.ready()
    first.remember(path)
    second = uploader.Watcher(tmp_path, ["*.csv"], state_file=state)
    second.ready()
    assert second.ready() == []


def test_the_key_depends_on_the_file_and_the_case(tmp_path):
    a, b = tmp_path / "a.csv", tmp_path / "b.csv"
    a.write_bytes(b"1,2\n")
    b.write_bytes(b"1,3\n")
    key = uploader.idempotency_key(a, 12)
    assert len(key) == 64 and key == uploader.idempotency_key(a, 12)
    assert key != uploader.idempotency_key(a, 13) and key != uploader.idempotency_key(b, 12)


def test_arguments_are_checked_before_anything_is_sent(tmp_path, monkeypatch):
    monkeypatch.delenv("EMICASE_TOKEN", raising=False)
    base = [
        "--url",
        "http://127.0.0.1:9",
        "--case",
        "1",
        "--probe",
        "h_field",
        "--tip",
        "t",
        "--location",
        "U1",
    ]
    for extra in (
        [str(tmp_path)],
        ["--token", "k"],
        ["--token", "k", "--x", "1", "f.csv"],
        ["--token", "k", "missing.csv"],
    ):
        with pytest.raises(SystemExit) as exit_info:
            uploader.main(base + extra, log=Log())
        assert exit_info.value.code == 2


def test_the_uploader_needs_only_the_standard_library():
    source = Path(uploader.__file__)
    imported = set()
    for node in ast.walk(ast.parse(source.read_text())):
        if isinstance(node, ast.Import):
            imported |= {alias.name.split(".")[0] for alias in node.names}
        elif isinstance(node, ast.ImportFrom) and node.level == 0:
            imported.add(node.module.split(".")[0])
    assert imported and imported <= set(sys.stdlib_module_names) | {"__future__"}, imported
    # And it runs on its own, with Django and the rest made unimportable.
    blocker = (
        "import sys, runpy; [sys.modules.__setitem__(m, None) for m in "
        "('django', 'celery', 'rest_framework', 'emicase', 'numpy')]; "
        f"sys.argv = ['uploader', '--help']; runpy.run_path({str(source)!r}, run_name='__main__')"
    )
    out = subprocess.run(
        [sys.executable, "-c", blocker], cwd=ROOT, capture_output=True, text=True, timeout=30
    )
    assert out.returncode == 0, out.stderr
    assert "--watch FOLDER" in out.stdout and "lethal voltages" in out.stdout
