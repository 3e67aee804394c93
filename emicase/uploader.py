"""Send probe captures from the bench PC to a case in emicase.

    python -m emicase.uploader --url https://emicase.lab --case 12 --probe h_field \\
        --tip "loop 10 mm" --location U4 [--x 10 --y 20] FILE...
    python -m emicase.uploader ... --watch FOLDER [--max-files N] [--timeout S]

The token comes from ``--token`` or, better (it then stays out of the process
list), the environment variable ``EMICASE_TOKEN``; make one on your account
page or with ``manage.py api_token create USERNAME``.

Standard library only, and no Django: the file also runs on its own
(``python uploader.py ...``) on a bench PC that has nothing else installed.

Each file is posted with an ``Idempotency-Key`` (a SHA-256 of the case id and
the file's bytes), so a retry after a dropped connection, or sending the same
folder again, finds the capture already stored instead of making a second
one. Connection errors and server errors (5xx, 429) are retried with a
growing pause, a bounded number of times; a refusal (4xx, e.g. a file that is
not a text trace) is reported and not retried.

Exit status: 0 when every file was stored (and, with ``--wait``, analysed);
1 when some file was refused, gave up or failed its analysis; 2 for bad
arguments.
"""

from __future__ import annotations

import argparse
import fnmatch
import hashlib
import http.client
import io
import json
import os
import sys
import time
import urllib.error
import urllib.parse
import urllib.request
import uuid
from dataclasses import dataclass, field
from pathlib import Path

USER_AGENT = "emicase-uploader/1"
CHUNK = 1 << 20

SAFETY = (
    "Safety at the bench: boards powered from the mains may carry lethal voltages (use an isolation "
    "transformer or a LISN as intended, keep one hand away); a scope's ground clip on a mains-referenced "
    "node is a short; RF set-ups may exceed exposure limits. Probe readings help find a source; they are "
    "not compliance results, which come from an accredited lab."
)


class Refused(Exception):
    """The server refused the upload (4xx); sending it again would not help."""


class GaveUp(Exception):
    """The server could not be reached, or kept failing, through every retry."""


# ----------------------------------------------------------------- the request


def idempotency_key(path: Path, case_id: int) -> str:
    """SHA-256 hex of the case id and the file's bytes: the same file on the same case, the same key."""
    digest = hashlib.sha256(f"emicase capture for case {case_id}\n".encode())
    with open(path, "rb") as fh:
        while chunk := fh.read(CHUNK):
            digest.update(chunk)
    return digest.hexdigest()


class _ChainedReader(io.RawIOBase):
    """Reads a multipart body from its parts in turn, so a large file is never held in memory."""

    def __init__(self, parts: list):
        self._parts = parts

    def readable(self) -> bool:
        return True

    def read(self, size: int = -1) -> bytes:
        out = bytearray()
        while self._parts and (size < 0 or len(out) < size):
            chunk = self._parts[0].read(-1 if size < 0 else size - len(out))
            if chunk:
                out += chunk
            else:
                self._parts.pop(0).close()
        return bytes(out)

    def close(self) -> None:
        for part in self._parts:
            part.close()
        self._parts = []
        super().close()


def _quoted_filename(name: str) -> str:
    ascii_name = name.encode("ascii", "replace").decode().replace("\\", "_").replace('"', "_")
    header = f'filename="{ascii_name}"'
    if ascii_name != name:
        # RFC 2231 form for non-ASCII names; Django prefers it to the fallback.
        header += f"; filename*=UTF-8''{urllib.parse.quote(name)}"
    return header


def multipart_body(
    fields: dict[str, str], file_field: str, path: Path
) -> tuple[str, _ChainedReader, int]:
    """A multipart/form-data body: (content type, reader, length in bytes). The file is read as it is sent."""
    boundary = f"emicase-{uuid.uuid4().hex}"
    head = io.BytesIO()
    for name, value in fields.items():
        head.write(
            f'--{boundary}\r\nContent-Disposition: form-data; name="{name}"\r\n\r\n'.encode()
        )
        head.write(str(value).encode() + b"\r\n")
    head.write(
        f'--{boundary}\r\nContent-Disposition: form-data; name="{file_field}"; {_quoted_filename(path.name)}\r\n'
        "Content-Type: application/octet-stream\r\n\r\n".encode()
    )
    tail = f"\r\n--{boundary}--\r\n".encode()
    length = head.tell() + path.stat().st_size + len(tail)
    head.seek(0)
    reader = _ChainedReader([head, open(path, "rb"), io.BytesIO(tail)])
    return f"multipart/form-data; boundary={boundary}", reader, length


@dataclass
class Options:
    url: str
    token: str
    case: int
    probe: str
    tip: str
    location: str
    side: str = "top"
    x: float | None = None
    y: float | None = None
    notes: str = ""
    revision: int | None = None
    countermeasure: int | None = None
    domain: str = "auto"
    retries: int = 5
    backoff: float = 1.0
    request_timeout: float = 120.0
    wait: bool = False
    wait_timeout: float = 600.0

    def fields(self) -> dict[str, str]:
        out = {
            "case": str(self.case),
            "probe_kind": self.probe,
            "tip": self.tip,
            "location": self.location,
            "board_side": self.side,
            "declared_domain": self.domain,
        }
        if self.x is not None and self.y is not None:
            out["x_mm"], out["y_mm"] = repr(self.x), repr(self.y)
        if self.notes:
            out["notes"] = self.notes
        if self.revision is not None:
            out["revision"] = str(self.revision)
        if self.countermeasure is not None:
            out["countermeasure"] = str(self.countermeasure)
        return out


# Worth another try: the network or the server briefly away.
RETRY_STATUS = {408, 429, 500, 502, 503, 504}
RETRY_ERRORS = (
    urllib.error.URLError,
    http.client.HTTPException,
    ConnectionError,
    TimeoutError,
    OSError,
)


def _pause(attempt: int, opts: Options, retry_after: str | None = None) -> float:
    pause = opts.backoff * 2**attempt
    if retry_after and retry_after.strip().isdigit():
        pause = max(pause, float(retry_after))
    return min(pause, 60.0)


def _words(body: bytes) -> str:
    """A refusal's JSON errors as one line: 'file: x.png is not a text trace ...; tip: ...'."""
    try:
        data = json.loads(body)
    except ValueError:
        return body[:300].decode("utf-8", "replace").strip()
    if isinstance(data, dict):
        parts = []
        for name, value in data.items():
            text = "; ".join(map(str, value)) if isinstance(value, list) else str(value)
            parts.append(text if name in ("detail", "non_field_errors") else f"{name}: {text}")
        return "; ".join(parts)
    return str(data)


def request_json(
    opts: Options,
    url: str,
    *,
    method: str = "GET",
    make_body=None,
    headers: dict | None = None,
    log=print,
) -> tuple[int, dict]:
    """Send a request, retrying what retrying can fix. Returns (status, JSON body).

    ``make_body`` returns (content type, reader, length) afresh for each
    attempt. Raises Refused for a 4xx answer, GaveUp after the last retry.
    """
    last, retry_after = "", None
    for attempt in range(opts.retries + 1):
        if attempt:
            time.sleep(_pause(attempt - 1, opts, retry_after))
            retry_after = None
        all_headers = {
            "Authorization": f"Token {opts.token}",
            "Accept": "application/json",
            "User-Agent": USER_AGENT,
            **(headers or {}),
        }
        body = None
        if make_body is not None:
            content_type, body, length = make_body()
            all_headers.update({"Content-Type": content_type, "Content-Length": str(length)})
        request = urllib.request.Request(url, data=body, headers=all_headers, method=method)
        try:
            with urllib.request.urlopen(request, timeout=opts.request_timeout) as response:
                return response.status, json.loads(response.read() or b"{}")
        except urllib.error.HTTPError as exc:
            payload = exc.read()
            if exc.code not in RETRY_STATUS:
                raise Refused(f"refused ({exc.code}): {_words(payload)}") from None
            retry_after = exc.headers.get("Retry-After")
            last = f"server answered {exc.code}"
        except RETRY_ERRORS as exc:
            last = f"{type(exc).__name__}: {getattr(exc, 'reason', exc)}"
        finally:
            if body is not None:
                body.close()
        if attempt < opts.retries:
            log(f"  {last}; trying again ({attempt + 1} of {opts.retries})", file=sys.stderr)
    raise GaveUp(f"gave up after {opts.retries + 1} attempts ({last})")


def send_capture(opts: Options, path: Path, log=print) -> dict:
    """Post one file as a capture of ``opts.case``. Returns the capture as the API shows it."""
    key = idempotency_key(path, opts.case)
    status, capture = request_json(
        opts,
        f"{opts.url.rstrip('/')}/api/captures/",
        method="POST",
        make_body=lambda: multipart_body(opts.fields(), "file", path),
        headers={"Idempotency-Key": key},
        log=log,
    )
    how = "stored as" if status == 201 else "already stored as"
    log(
        f"{path.name}: {how} capture {capture.get('id')} ({capture.get('status')}) {capture.get('url', '')}"
    )
    return capture


def wait_for_analysis(opts: Options, capture: dict, log=print) -> bool:
    """Poll the capture until its analysis ends. True when done, False when failed or still going at the deadline."""
    deadline = time.monotonic() + opts.wait_timeout
    pause = 0.5
    while capture.get("status") not in ("done", "failed"):
        if time.monotonic() > deadline:
            log(
                f"  capture {capture.get('id')}: still {capture.get('status')} after {opts.wait_timeout:g} s",
                file=sys.stderr,
            )
            return False
        time.sleep(pause)
        pause = min(pause * 1.5, 5.0)
        _, capture = request_json(opts, capture["url"], log=log)
    if capture["status"] == "failed":
        log(
            f"  capture {capture['id']}: analysis failed: {capture.get('error_text')}",
            file=sys.stderr,
        )
        return False
    peaks = len((capture.get("results") or {}).get("peaks", []))
    log(f"  capture {capture['id']}: analysis done, {peaks} peaks")
    return True


def send_files(opts: Options, paths: list[Path], log=print) -> int:
    """Send each file; returns how many were not stored (or, with --wait, not analysed)."""
    failures = 0
    for path in paths:
        try:
            capture = send_capture(opts, path, log=log)
        except (Refused, GaveUp) as exc:
            log(f"{path.name}: {exc}", file=sys.stderr)
            failures += 1
            continue
        if opts.wait and not wait_for_analysis(opts, capture, log=log):
            failures += 1
    return failures


# ----------------------------------------------------------------- watching a folder


@dataclass
class Watcher:
    """New files in a folder, sent once each after they stop growing (the instrument has finished writing)."""

    folder: Path
    patterns: list[str]
    state_file: Path | None = None
    sent: set[str] = field(default_factory=set)
    _last_seen: dict[Path, tuple[int, int]] = field(default_factory=dict)

    def __post_init__(self) -> None:
        if self.state_file and self.state_file.exists():
            self.sent = set(json.loads(self.state_file.read_text() or "[]"))

    @staticmethod
    def _mark(path: Path, stat: os.stat_result) -> str:
        return f"{path.name}\0{stat.st_size}\0{stat.st_mtime_ns}"

    def ready(self) -> list[Path]:
        """Files not sent yet whose size and time did not change since the previous look."""
        out = []
        for path in sorted(self.folder.iterdir()):
            if path.name.startswith(".") or not path.is_file():
                continue
            if not any(fnmatch.fnmatch(path.name, p) for p in self.patterns):
                continue
            stat = path.stat()
            if self._mark(path, stat) in self.sent:
                continue
            now = (stat.st_size, stat.st_mtime_ns)
            if self._last_seen.get(path) == now and stat.st_size > 0:
                out.append(path)
            self._last_seen[path] = now
        return out

    def remember(self, path: Path) -> None:
        self.sent.add(self._mark(path, path.stat()))
        if self.state_file:
            self.state_file.write_text(json.dumps(sorted(self.sent)))


def watch(
    opts: Options,
    watcher: Watcher,
    *,
    interval: float,
    max_files: int | None,
    timeout: float | None,
    log=print,
) -> int:
    """Send files as they appear until ``max_files`` were handled or ``timeout`` seconds passed. Returns failures."""
    deadline = None if timeout is None else time.monotonic() + timeout
    handled = failures = 0
    log(f"watching {watcher.folder} ({', '.join(watcher.patterns)}); stop with Ctrl-C")
    try:
        while max_files is None or handled < max_files:
            for path in watcher.ready():
                failures += send_files(opts, [path], log=log)
                # A refused file is remembered too: sending it again would be refused again.
                watcher.remember(path)
                handled += 1
                if max_files is not None and handled >= max_files:
                    break
            else:
                if deadline is not None and time.monotonic() >= deadline:
                    break
                time.sleep(interval)
    except KeyboardInterrupt:
        log("stopped")
    return failures


# ----------------------------------------------------------------- command line


def parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="python -m emicase.uploader",
        description="Send near-field probe captures (trace files) to a case in emicase.",
        epilog=SAFETY,
    )
    p.add_argument("files", nargs="*", type=Path, help="trace files to send")
    p.add_argument(
        "--watch",
        type=Path,
        metavar="FOLDER",
        help="send new files from this folder as they appear",
    )
    p.add_argument("--url", required=True, help="the emicase site, e.g. https://emicase.lab")
    p.add_argument(
        "--token",
        default=os.environ.get("EMICASE_TOKEN"),
        help="API token (default: the EMICASE_TOKEN environment variable)",
    )
    p.add_argument("--case", type=int, required=True, help="the case id")
    p.add_argument(
        "--probe",
        required=True,
        choices=["e_field", "h_field", "current", "other"],
        help="probe kind",
    )
    p.add_argument("--tip", required=True, help="tip size or shape, e.g. 'loop 10 mm'")
    p.add_argument("--location", required=True, help="zone or reference designator, e.g. U4")
    p.add_argument(
        "--side", default="top", choices=["top", "bottom", "edge"], help="board side (default top)"
    )
    p.add_argument("--x", type=float, help="x position on the board (mm); give --y too")
    p.add_argument("--y", type=float, help="y position on the board (mm)")
    p.add_argument("--notes", default="")
    p.add_argument(
        "--revision", type=int, help="revision id (default: the newest of the case's product)"
    )
    p.add_argument(
        "--countermeasure", type=int, help="countermeasure id, when re-measuring after a change"
    )
    p.add_argument(
        "--domain",
        default="auto",
        choices=["auto", "spectrum", "time"],
        help="what the files hold (default: decide from each file)",
    )
    p.add_argument(
        "--retries", type=int, default=5, help="retries per request on network or server errors"
    )
    p.add_argument(
        "--backoff", type=float, default=1.0, help="first pause between retries (s), doubling"
    )
    p.add_argument(
        "--wait", action="store_true", help="wait for each analysis and print its outcome"
    )
    p.add_argument(
        "--wait-timeout", type=float, default=600.0, help="longest wait per analysis (s)"
    )
    p.add_argument(
        "--pattern", action="append", help="--watch: file name pattern (repeatable; default *)"
    )
    p.add_argument(
        "--interval", type=float, default=2.0, help="--watch: seconds between looks at the folder"
    )
    p.add_argument("--max-files", type=int, help="--watch: stop after this many files")
    p.add_argument("--timeout", type=float, help="--watch: stop after this many seconds")
    p.add_argument(
        "--state", type=Path, help="--watch: remember sent files in this JSON file across restarts"
    )
    return p


def main(argv: list[str] | None = None, log=print) -> int:
    p = parser()
    args = p.parse_args(argv)
    if not args.token:
        p.error("no token: pass --token or set EMICASE_TOKEN")
    if (args.x is None) != (args.y is None):
        p.error("give both --x and --y, or neither")
    if bool(args.files) == bool(args.watch):
        p.error("give either FILE... or --watch FOLDER")
    if args.retries < 0:
        p.error("--retries must be 0 or more")
    opts = Options(
        url=args.url,
        token=args.token,
        case=args.case,
        probe=args.probe,
        tip=args.tip,
        location=args.location,
        side=args.side,
        x=args.x,
        y=args.y,
        notes=args.notes,
        revision=args.revision,
        countermeasure=args.countermeasure,
        domain=args.domain,
        retries=args.retries,
        backoff=args.backoff,
        wait=args.wait,
        wait_timeout=args.wait_timeout,
    )
    if args.watch:
        if not args.watch.is_dir():
            p.error(f"{args.watch} is not a folder")
        watcher = Watcher(args.watch, args.pattern or ["*"], state_file=args.state)
        failures = watch(
            opts,
            watcher,
            interval=args.interval,
            max_files=args.max_files,
            timeout=args.timeout,
            log=log,
        )
    else:
        missing = [str(f) for f in args.files if not f.is_file()]
        if missing:
            p.error(f"no such file: {', '.join(missing)}")
        failures = send_files(opts, args.files, log=log)
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
