"""A private, throwaway emicase stack on loopback, for the fault tests and ``bench_load``.

    stack = Stack(Path(tempfile.mkdtemp()), celery_workers=2)
    stack.start()        # PostgreSQL, Redis, migrate, gunicorn, Celery workers; waits for each
    ...                  # HTTP at stack.base_url; stack.postgres.stop(); stack.redis.restart() ...
    stack.stop()         # every process it started, by its id; the folders stay for their logs

What it starts, each on a free loopback port chosen at start:

- a PostgreSQL cluster of its own (``initdb`` in a folder under the stack's root, run as the
  ``postgres`` user when this process is root; ``fsync`` and ``full_page_writes`` off, which
  survive a crash of PostgreSQL but not of the machine — so figures measured on it are those
  of a PostgreSQL tuned for tests, not a durable production one);
- a Redis of its own (``--save "" --appendonly no``: a restart loses every message, which is
  what the fault tests want to survive) holding the broker (db 0), the results (db 1) and the
  shared cache the throttle counts in (db 2), as in production;
- gunicorn (gthread) serving ``emicase.wsgi`` and ``celery worker`` processes, each in its own
  process group, with the production settings read from environment variables
  (``DATABASE_URL``, ``CELERY_BROKER_URL``, ``EMICASE_CACHE_URL``, ``EMICASE_VAR_DIR`` ...);
- a supervisor thread that starts a new worker when one exits by itself, as a service manager
  does in production (README, "Production"): Celery 5.7 workers can exit on an "Unrecoverable
  error" when Redis goes away while they hold an unacknowledged message. Workers stopped or
  killed through the stack are not replaced (``kill_workers`` is the test's own fault).

The developers' own PostgreSQL (5432) and Redis (6379) are never touched, let alone restarted.
``Stack(..., machine_postgres_url=..., machine_redis_url=...)`` uses existing servers instead
(``bench_load --use-machine-services``); those cannot be restarted from here.

The clients (``Client``, ``Burst``) use ``http.client`` only, as a bench PC's script would, and
``seed_clients`` (run inside the stack's environment by ``python -m`` this module) makes the team,
users, tokens and cases they upload to. Every wait here has a timeout.
"""

from __future__ import annotations

import contextlib
import glob
import http.client
import json
import os
import secrets
import shutil
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
import uuid
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from urllib.parse import urlencode, urlparse

ROOT = Path(__file__).resolve().parents[3]
LOOPBACK = "127.0.0.1"


class StackError(RuntimeError):
    """A server of the stack did not start, stop or answer in time."""


def _ephemeral_low() -> int:
    """The lowest port the kernel hands to outgoing connections (Linux default 32768)."""
    try:
        return int(Path("/proc/sys/net/ipv4/ip_local_port_range").read_text().split()[0])
    except (OSError, ValueError, IndexError):
        return 32768


def free_port() -> int:
    """A TCP port on loopback that nothing listens on now, below the ephemeral range.

    The kernel's own choice (bind to port 0) comes from the range it also gives to
    outgoing connections; a server restarted on its port in a fault test (Redis,
    PostgreSQL) could then find that port taken as the local end of some client's
    connection — a burst of HTTP uploads opens hundreds. Ports below the range are
    never used that way.
    """
    low = _ephemeral_low()
    if low > 12000:
        for _ in range(50):
            port = 10000 + secrets.randbelow(low - 11000)
            with socket.socket() as s:
                try:
                    s.bind((LOOPBACK, port))
                except OSError:
                    continue
                return port
    with socket.socket() as s:
        s.bind((LOOPBACK, 0))
        return s.getsockname()[1]


def postgres_bindir() -> Path | None:
    """The newest installed PostgreSQL's bin folder (Debian's layout, else pg_config's)."""
    found = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"), key=lambda p: int(Path(p).parts[-3]))
    if found:
        return Path(found[-1]).parent
    if shutil.which("pg_config"):
        out = subprocess.run(["pg_config", "--bindir"], capture_output=True, text=True).stdout.strip()
        if out and (Path(out) / "initdb").exists():
            return Path(out)
    return None


def unavailable() -> str:
    """Why a private stack cannot start here ('' when it can)."""
    if postgres_bindir() is None:
        return "PostgreSQL's initdb/pg_ctl are not installed"
    if shutil.which("redis-server") is None:
        return "redis-server is not installed"
    if os.geteuid() == 0 and shutil.which("runuser") is None:
        return "running as root without runuser (PostgreSQL refuses to run as root)"
    return ""


def _wait(predicate: Callable[[], bool], timeout: float, what: str, interval: float = 0.05) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if predicate():
            return
        time.sleep(interval)
    raise StackError(f"timed out after {timeout:.0f} s waiting for {what}")


def _die_with_parent() -> None:
    """In a child before exec: Linux sends it SIGTERM if this process dies without stopping it."""
    try:
        import ctypes

        ctypes.CDLL("libc.so.6", use_errno=True).prctl(1, signal.SIGTERM)  # PR_SET_PDEATHSIG
    except (OSError, AttributeError):
        pass


class Process:
    """A child in its own process group (so stopping it reaches its own children), logging to a file."""

    def __init__(self, name: str, argv: list[str], env: dict, log_path: Path, cwd: Path = ROOT):
        self.name, self.argv, self.env, self.log_path, self.cwd = name, argv, env, log_path, cwd
        self.popen: subprocess.Popen | None = None

    def start(self) -> Process:
        with open(self.log_path, "ab") as log:
            self.popen = subprocess.Popen(
                self.argv, cwd=self.cwd, env=self.env, stdout=log, stderr=subprocess.STDOUT,
                start_new_session=True, preexec_fn=_die_with_parent,
            )
        return self

    def alive(self) -> bool:
        return self.popen is not None and self.popen.poll() is None

    def check(self) -> None:
        if self.popen is not None and not self.alive():
            raise StackError(f"{self.name} exited with {self.popen.returncode}; log: {self.log_path}")

    def signal_group(self, sig: int) -> None:
        if self.popen is not None:
            with contextlib.suppress(ProcessLookupError, PermissionError):
                # The group this child leads: its id is kept from reuse while any member lives.
                os.killpg(self.popen.pid, sig)

    def kill(self) -> None:
        """SIGKILL the whole group at once, as the kernel's OOM killer or a power cut would."""
        self.signal_group(signal.SIGKILL)
        if self.popen is not None:
            self.popen.wait(timeout=30)

    def stop(self, timeout: float = 20.0) -> None:
        """SIGTERM, then SIGKILL to the group after ``timeout``. Leaves nothing of the group behind."""
        if self.popen is None:
            return
        if self.alive():
            self.popen.terminate()
            try:
                self.popen.wait(timeout=timeout)
            except subprocess.TimeoutExpired:
                pass
        self.signal_group(signal.SIGKILL)
        self.popen.wait(timeout=30)


# ----------------------------------------------------------------- PostgreSQL


class PrivatePostgres:
    """A PostgreSQL cluster of its own on a free loopback port.

    Its folder is a fresh one under the system's temporary folder (the postgres user must be
    able to reach it, which a test's private temporary folder does not allow); ``remove``
    deletes it, after copying the server's log to ``keep_log``.
    """

    def __init__(self, keep_log: Path):
        self.keep_log = keep_log
        self.folder = Path(tempfile.mkdtemp(prefix="emicase-pg-"))
        self.data = self.folder / "data"
        self.log_path = self.folder / "postgres.log"
        self.port = 0
        self.bindir = postgres_bindir()

    def remove(self) -> None:
        with contextlib.suppress(OSError):
            shutil.copyfile(self.log_path, self.keep_log)
        shutil.rmtree(self.folder, ignore_errors=True)

    def _as_owner(self, argv: list[str]) -> list[str]:
        # PostgreSQL refuses to run as root; the stack's cluster belongs to the postgres user.
        return ["runuser", "-u", "postgres", "--", *argv] if os.geteuid() == 0 else argv

    def _run(self, argv: list[str], timeout: float = 60.0) -> None:
        done = subprocess.run(self._as_owner(argv), capture_output=True, text=True, timeout=timeout)
        if done.returncode != 0:
            raise StackError(f"{' '.join(argv[:2])} failed: {done.stderr.strip() or done.stdout.strip()}")

    def init(self) -> None:
        if self.bindir is None:
            raise StackError("PostgreSQL is not installed")
        if os.geteuid() == 0:
            shutil.chown(self.folder, "postgres", "postgres")
        self.port = free_port()
        self._run([str(self.bindir / "initdb"), "-D", str(self.data), "-U", "postgres", "--auth=trust",
                   "-E", "UTF8", "--locale=C", "--no-sync"], timeout=120)
        with open(self.data / "postgresql.conf", "a") as conf:
            conf.write(
                "\n# emicase private stack: loopback only, throwaway data\n"
                f"port = {self.port}\nlisten_addresses = '{LOOPBACK}'\n"
                f"unix_socket_directories = '{self.folder}'\n"
                # Safe against a crash of PostgreSQL (the fault tests' kind), not of the machine.
                # synchronous_commit stays on: off, a crash loses commits already reported to
                # the client, which the fault tests rightly count as lost uploads.
                "fsync = off\nfull_page_writes = off\n"
                "max_connections = 200\n"
            )

    def start(self, timeout: float = 60.0) -> None:
        self._run([str(self.bindir / "pg_ctl"), "-D", str(self.data), "-l", str(self.log_path),
                   "-w", "-t", str(int(timeout)), "start"], timeout=timeout + 10)

    def stop(self, mode: str = "fast", timeout: float = 60.0) -> None:
        """``mode``: 'fast' (sessions ended, clean checkpoint) or 'immediate' (as a crash: recovery at start)."""
        self._run([str(self.bindir / "pg_ctl"), "-D", str(self.data), "-m", mode, "-w", "-t",
                   str(int(timeout)), "stop"], timeout=timeout + 10)

    def running(self) -> bool:
        return (self.data / "postmaster.pid").exists()

    def url(self, database: str) -> str:
        return f"postgres://postgres@{LOOPBACK}:{self.port}/{database}"


def create_database(url: str, *, empty: bool = False) -> None:
    """Create the database ``url`` names if missing (``empty``: drop and create it)."""
    import psycopg
    from psycopg import sql

    parsed = urlparse(url)
    name = parsed.path.lstrip("/")
    admin = parsed._replace(path="/postgres").geturl()
    with psycopg.connect(admin, autocommit=True, connect_timeout=5) as conn:
        if empty:
            conn.execute(sql.SQL("DROP DATABASE IF EXISTS {} WITH (FORCE)").format(sql.Identifier(name)))
        if conn.execute("SELECT 1 FROM pg_database WHERE datname = %s", (name,)).fetchone() is None:
            conn.execute(sql.SQL("CREATE DATABASE {}").format(sql.Identifier(name)))


# ----------------------------------------------------------------- Redis


class PrivateRedis:
    """A redis-server of its own on a free loopback port, with no persistence at all."""

    def __init__(self, folder: Path):
        self.folder = folder
        self.port = 0
        self.process: Process | None = None

    def start(self, timeout: float = 20.0) -> None:
        self.folder.mkdir(parents=True, exist_ok=True)
        self.port = self.port or free_port()  # a restart comes back on the same port
        argv = ["redis-server", "--port", str(self.port), "--bind", LOOPBACK, "--save", "",
                "--appendonly", "no", "--dir", str(self.folder), "--daemonize", "no"]
        self.process = Process("redis-server", argv, dict(os.environ), self.folder / "redis.log").start()
        _wait(lambda: self._ping() or (self.process.check() or False), timeout, "Redis to answer")

    def _ping(self) -> bool:
        import redis

        try:
            return bool(redis.Redis(host=LOOPBACK, port=self.port, socket_timeout=1).ping())
        except redis.RedisError:
            return False

    def shutdown_nosave(self, timeout: float = 20.0) -> None:
        """SHUTDOWN NOSAVE: the server exits and every message it held is gone."""
        import redis

        with contextlib.suppress(redis.ConnectionError):
            redis.Redis(host=LOOPBACK, port=self.port, socket_timeout=5).shutdown(nosave=True)
        self.process.popen.wait(timeout=timeout)

    def stop(self) -> None:
        if self.process is not None:
            self.process.stop(timeout=5)

    def url(self, db: int) -> str:
        return f"redis://{LOOPBACK}:{self.port}/{db}"


# ----------------------------------------------------------------- the stack


@dataclass
class Stack:
    """PostgreSQL + Redis + gunicorn + Celery workers, private to ``root`` unless machine URLs are given."""

    root: Path
    celery_workers: int = 1
    concurrency: int = 1
    web_workers: int = 2
    web_threads: int = 4
    debug: bool = False
    machine_postgres_url: str = ""
    machine_redis_url: str = ""
    database: str = "emicase"
    extra_env: dict = field(default_factory=dict)
    # Replace a worker that exits by itself, at most this many times in the stack's life (a
    # worker that cannot start at all must not be restarted for ever).
    worker_restarts: int = 10

    def __post_init__(self) -> None:
        self.root = Path(self.root)
        self.postgres = None if self.machine_postgres_url else PrivatePostgres(self.root / "postgres.log")
        self.redis = None if self.machine_redis_url else PrivateRedis(self.root / "redis")
        self.web: Process | None = None
        self.workers: list[Process] = []
        # The workers the supervisor replaces when they exit (not those stopped on purpose).
        self._supervised: set[Process] = set()
        self._workers_lock = threading.RLock()
        self._stopping = threading.Event()
        self._supervisor: threading.Thread | None = None
        self.restarted = 0
        self.web_port = 0
        self.env: dict = {}
        self._worker_serial = 0
        self.seeded: list[dict] = []

    # -- addresses

    @property
    def base_url(self) -> str:
        return f"http://{LOOPBACK}:{self.web_port}"

    @property
    def database_url(self) -> str:
        if self.machine_postgres_url:
            return self.machine_postgres_url
        return self.postgres.url(self.database)

    def _redis_url(self, db: int) -> str:
        if self.machine_redis_url:
            return urlparse(self.machine_redis_url)._replace(path=f"/{db}").geturl()
        return self.redis.url(db)

    @property
    def private(self) -> bool:
        return self.postgres is not None

    # -- life cycle

    def start(self, clients: int = 0) -> Stack:
        """Start everything and wait until it answers; ``clients``: seed that many (``self.seeded``)."""
        try:
            self._start(clients)
        except BaseException:
            self.stop()
            raise
        return self

    def _start(self, clients: int) -> None:
        self.root.mkdir(parents=True, exist_ok=True)
        if self.postgres is not None:
            self.postgres.init()
            self.postgres.start()
        if self.redis is not None:
            self.redis.start()
        broker_db = int(urlparse(self.machine_redis_url).path.lstrip("/") or 0) if self.machine_redis_url else 0
        # A private cluster is new; the machine's database is emptied.
        create_database(self.database_url, empty=not self.private)
        self.env = self._environment(broker_db)
        if self.machine_redis_url:
            self._purge_machine_redis(broker_db)
        # Start the servers first and prepare the database meanwhile: each spends its first
        # seconds importing, and neither reads a table before a request or a task comes.
        self.start_web(wait=False)
        for _ in range(self.celery_workers):
            self.start_worker()
        self._supervisor = threading.Thread(target=self._supervise, name="stack-supervisor", daemon=True)
        self._supervisor.start()
        # One Django process migrates, collects the static files (production settings serve
        # hashed names from a manifest), seeds the clients and pings the workers.
        self.seeded = self.module("prepare", str(clients), str(self.celery_workers), "90",
                                  "0" if self.debug else "1", timeout=400)["clients"]
        self.wait_web()

    def _environment(self, broker_db: int) -> dict:
        var = self.root / "var"
        env = {k: v for k, v in os.environ.items()
               if k not in ("EMICASE_DATABASE_NAME", "CELERY_RESULT_BACKEND", "PYTEST_CURRENT_TEST")}
        env.update(
            DJANGO_SETTINGS_MODULE="emicase.settings",
            DATABASE_URL=self.database_url,
            CELERY_BROKER_URL=self._redis_url(broker_db),
            CELERY_RESULT_BACKEND=self._redis_url(broker_db + 1),
            EMICASE_CACHE_URL=self._redis_url(broker_db + 2),
            EMICASE_VAR_DIR=str(var),
            EMICASE_STATIC_ROOT=str(self.root / "static"),
            EMICASE_DEBUG="1" if self.debug else "0",
            EMICASE_SECRET_KEY=secrets.token_urlsafe(40),
            EMICASE_TLS="0",
            EMICASE_ALLOWED_HOSTS=f"{LOOPBACK},localhost",
            EMICASE_LOG_LEVEL="INFO",
            PYTHONUNBUFFERED="1",
        )
        env.update(self.extra_env)
        return env

    def seed(self, clients: int, timeout: float = 120.0) -> dict:
        """Seed ``clients`` users, tokens and cases (``seed_clients``) once every live worker answers a ping."""
        live = sum(1 for w in self.workers if w.alive())
        return self.module("seed", str(clients), str(live), str(int(timeout)), timeout=timeout + 30)

    def _purge_machine_redis(self, broker_db: int) -> None:
        import redis

        for db in (broker_db, broker_db + 1, broker_db + 2):
            parsed = urlparse(self._redis_url(db))
            redis.Redis(host=parsed.hostname, port=parsed.port or 6379, db=db, socket_timeout=5).flushdb()

    def stop(self) -> None:
        """Stop every process this stack started (by id), then its servers."""
        self._stopping.set()
        if self._supervisor is not None:
            self._supervisor.join(timeout=10)
        with self._workers_lock:
            self._supervised.clear()
        children = [*self.workers, *([self.web] if self.web is not None else [])]
        for child in children:  # all at once: each takes its own seconds to shut down warm
            if child.alive():
                child.popen.terminate()
        for child in children:
            with contextlib.suppress(Exception):
                child.stop(timeout=15)
        if self.redis is not None:
            with contextlib.suppress(Exception):
                self.redis.stop()
        if self.postgres is not None:
            if self.postgres.running():
                with contextlib.suppress(Exception):
                    self.postgres.stop(mode="immediate")
            self.postgres.remove()

    # -- processes

    def manage(self, *args: str, timeout: float = 120.0) -> str:
        """Run ``manage.py args`` in the stack's environment. Returns its output; raises on failure."""
        done = subprocess.run([sys.executable, str(ROOT / "manage.py"), *args], cwd=ROOT, env=self.env,
                              capture_output=True, text=True, timeout=timeout)
        if done.returncode != 0:
            raise StackError(f"manage.py {' '.join(args)} failed:\n{done.stderr[-3000:]}")
        return done.stdout

    def module(self, *args: str, timeout: float = 120.0) -> dict:
        """Run this module's command line (``seed``, ``ping``) in the stack's environment; its JSON."""
        done = subprocess.run([sys.executable, "-m", __name__, *args], cwd=ROOT, env=self.env,
                              capture_output=True, text=True, timeout=timeout)
        if done.returncode != 0:
            raise StackError(f"{__name__} {' '.join(args)} failed:\n{done.stderr[-3000:]}")
        return json.loads(done.stdout)

    def start_web(self, wait: bool = True) -> None:
        self.web_port = self.web_port or free_port()
        argv = [sys.executable, "-m", "gunicorn", "emicase.wsgi:application",
                "--bind", f"{LOOPBACK}:{self.web_port}", "--workers", str(self.web_workers),
                "--worker-class", "gthread", "--threads", str(self.web_threads),
                "--timeout", "120", "--graceful-timeout", "5", "--error-logfile", "-"]
        self.web = Process("gunicorn", argv, self.env, self.root / "gunicorn.log").start()
        if wait:
            self.wait_web()

    def wait_web(self, timeout: float = 90.0) -> None:
        client = Client(self.base_url, timeout=5)

        def healthy() -> bool:
            self.web.check()
            for w in self.workers:
                w.check()
            with contextlib.suppress(OSError, http.client.HTTPException):
                return client.request("GET", "/health/").status == 200
            return False

        _wait(healthy, timeout, "gunicorn's /health/", interval=0.2)
        client.close()

    def start_worker(self) -> Process:
        with self._workers_lock:
            self._worker_serial += 1
            n = self._worker_serial
            argv = [sys.executable, "-m", "celery", "-A", "emicase", "worker", "--loglevel", "INFO",
                    "--queues", "analysis,default", "--concurrency", str(self.concurrency),
                    "--without-mingle", "--without-gossip", "--hostname", f"stack{n}-{os.getpid()}@%h"]
            worker = Process(f"celery worker {n}", argv, self.env, self.root / f"worker-{n}.log").start()
            self.workers.append(worker)
            self._supervised.add(worker)
            return worker

    def _supervise(self) -> None:
        """Start a new worker for each supervised one that has exited (see the module docstring)."""
        log = self.root / "supervisor.log"
        while not self._stopping.wait(0.5):
            with self._workers_lock:
                for worker in [w for w in self._supervised if not w.alive()]:
                    self._supervised.discard(worker)
                    if self._stopping.is_set() or self.restarted >= self.worker_restarts:
                        continue
                    self.restarted += 1
                    replacement = self.start_worker()
                    with open(log, "a") as out:
                        out.write(f"{time.strftime('%H:%M:%S')} {worker.name} exited with "
                                  f"{worker.popen.returncode}; started {replacement.name}\n")

    def wait_workers(self, timeout: float = 90.0) -> None:
        """Until the live workers have answered a ping each through the broker (as many pings as workers)."""
        live = sum(1 for w in self.workers if w.alive())
        self.module("ping", str(live), str(int(timeout)), timeout=timeout + 30)

    def kill_workers(self) -> None:
        """SIGKILL every worker; the supervisor does not replace them (the caller starts new ones)."""
        with self._workers_lock:
            self._supervised.clear()
            for w in self.workers:
                if w.alive():
                    w.kill()

    def log_text(self) -> str:
        """Every log of the stack, for a failing test's message."""
        out = []
        for path in sorted(self.root.glob("*.log")) + sorted(self.root.glob("*/*.log")):
            with contextlib.suppress(OSError):
                out.append(f"----- {path.name}\n{path.read_text(errors='replace')[-4000:]}")
        return "\n".join(out)

    # -- the database, read directly (no Django in the caller's process needed)

    def query(self, sql: str, params: tuple = ()) -> list[tuple]:
        import psycopg

        with psycopg.connect(self.database_url, connect_timeout=5) as conn:
            return conn.execute(sql, params).fetchall()

    def captures(self, case_ids: list[int]) -> dict[str, list[dict]]:
        """Every capture on these cases by idempotency key: id, status, attempts, and how often it was stored.

        ``stored`` counts the case's 'analysed' events for the capture (written once in the
        transaction that stores the results); ``readings`` its readings at failing frequencies.
        """
        rows = self.query(
            """
            SELECT c.id, c.idempotency_key, c.status, c.attempts, c.error_text,
                   (SELECT count(*) FROM emicase_caseevent e
                     WHERE e.case_id = c.case_id AND e.kind = 'analysed'
                       AND (e.data ->> 'capture')::bigint = c.id),
                   (SELECT count(*) FROM emicase_capturereading r WHERE r.capture_id = c.id)
            FROM emicase_capture c WHERE c.case_id = ANY(%s)
            """,
            (list(case_ids),),
        )
        out: dict[str, list[dict]] = {}
        for pk, key, status, attempts, error, stored, readings in rows:
            out.setdefault(key, []).append(
                {"id": pk, "status": status, "attempts": attempts, "error_text": error, "stored": stored,
                 "readings": readings}
            )
        return out

    def sweep(self, queued_after: float, running_after: float | None = None) -> str:
        args = ["sweep_stuck", "--queued-after", str(queued_after)]
        if running_after is not None:
            args += ["--running-after", str(running_after)]
        return self.manage(*args)

    def __enter__(self) -> Stack:
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()


# ----------------------------------------------------------------- clients


@dataclass
class Reply:
    status: int
    body: bytes
    headers: dict
    seconds: float

    def json(self):
        return json.loads(self.body)


class Client:
    """One HTTP/1.1 connection to the stack (reopened after an error), with a session cookie if signed in."""

    def __init__(self, base_url: str, token: str = "", timeout: float = 30.0):
        parsed = urlparse(base_url)
        self.host, self.port = parsed.hostname, parsed.port
        self.token, self.timeout = token, timeout
        self.cookies: dict[str, str] = {}
        self._conn: http.client.HTTPConnection | None = None

    def close(self) -> None:
        if self._conn is not None:
            self._conn.close()
            self._conn = None

    def request(self, method: str, path: str, body: bytes | None = None, headers: dict | None = None,
                token: bool = False) -> Reply:
        """Send one request; raises OSError/HTTPException when the connection fails (the caller may retry)."""
        headers = dict(headers or {})
        if token and self.token:
            headers["Authorization"] = f"Token {self.token}"
        if self.cookies:
            headers["Cookie"] = "; ".join(f"{k}={v}" for k, v in self.cookies.items())
        started = time.perf_counter()
        reused = self._conn is not None
        try:
            response, data = self._send(method, path, body, headers)
        except (http.client.RemoteDisconnected, BrokenPipeError, ConnectionResetError):
            self.close()
            if not reused:
                raise
            # The server closed an idle kept-alive connection (gunicorn after its keep-alive
            # time) before reading this request: send it once more on a new connection.
            started = time.perf_counter()
            response, data = self._send(method, path, body, headers)
        seconds = time.perf_counter() - started
        for value in response.headers.get_all("Set-Cookie") or []:
            name, _, rest = value.partition("=")
            self.cookies[name.strip()] = rest.split(";", 1)[0]
        if response.headers.get("Connection", "").lower() == "close":
            self.close()
        return Reply(response.status, data, dict(response.headers), seconds)

    def _send(self, method, path, body, headers):
        if self._conn is None:
            self._conn = http.client.HTTPConnection(self.host, self.port, timeout=self.timeout)
        try:
            self._conn.request(method, path, body=body, headers=headers)
            response = self._conn.getresponse()
            return response, response.read()
        except (OSError, http.client.HTTPException):
            self.close()
            raise

    def sign_in(self, username: str, password: str) -> None:
        """Sign in through the page form, as a browser does (CSRF cookie and token)."""
        import re

        page = self.request("GET", "/signin/")
        token = re.search(rb'name="csrfmiddlewaretoken" value="([^"]+)"', page.body)
        if page.status != 200 or token is None:
            raise StackError(f"the sign-in page answered {page.status}")
        form = urlencode({"username": username, "password": password,
                          "csrfmiddlewaretoken": token.group(1).decode()}).encode()
        reply = self.request("POST", "/signin/", form, {"Content-Type": "application/x-www-form-urlencoded"})
        if reply.status != 302 or "sessionid" not in self.cookies:
            raise StackError(f"signing in as {username} answered {reply.status}")

    def upload_capture(self, case_id: int, name: str, content: bytes, key: str, **fields) -> Reply:
        """POST /api/captures/ (multipart) with an Idempotency-Key."""
        boundary = f"stack-{uuid.uuid4().hex}"
        values = {"case": case_id, "probe_kind": "h_field", "tip": "loop 10 mm", "location": "U4", **fields}
        parts = [
            f'--{boundary}\r\nContent-Disposition: form-data; name="{k}"\r\n\r\n{v}\r\n'.encode()
            for k, v in values.items()
        ]
        parts.append(
            f'--{boundary}\r\nContent-Disposition: form-data; name="file"; filename="{name}"\r\n'
            "Content-Type: text/csv\r\n\r\n".encode() + content + b"\r\n"
        )
        body = b"".join(parts) + f"--{boundary}--\r\n".encode()
        return self.request(
            "POST", "/api/captures/", body,
            {"Content-Type": f"multipart/form-data; boundary={boundary}", "Idempotency-Key": key,
             "Accept": "application/json"},
            token=True,
        )


@dataclass
class Attempt:
    """One try of one upload, as its client saw it."""

    key: str
    started: float  # time.monotonic()
    ended: float
    status: int | None  # None: the connection failed
    error: str = ""
    capture_id: int | None = None

    @property
    def accepted(self) -> bool:
        return self.status in (200, 201)


class Burst:
    """Concurrent clients, each uploading its files in turn (retrying refusals with the same key if asked).

    ``files(client_index)`` gives each client's list of (name, content[, form fields]). A refusal is a
    5xx, a 429 or a failed connection: the client pauses ``retry_pause`` and posts again with
    the same Idempotency-Key, at most ``retries`` times. Every attempt is recorded.
    """

    def __init__(self, base_url: str, clients: list[dict], files: Callable[[int], list[tuple[str, bytes]]],
                 *, retries: int = 0, retry_pause: float = 0.3, pause: float = 0.0, timeout: float = 30.0,
                 between: Callable[[Client, dict], None] | None = None):
        self.base_url, self.clients, self.files = base_url, clients, files
        self.retries, self.retry_pause, self.pause, self.timeout = retries, retry_pause, pause, timeout
        self.between = between
        self.attempts: list[Attempt] = []
        self.errors: list[str] = []
        self._lock = threading.Lock()
        self._threads: list[threading.Thread] = []
        self.stop_event = threading.Event()

    def _record(self, attempt: Attempt) -> None:
        with self._lock:
            self.attempts.append(attempt)

    def _client(self, index: int) -> None:
        spec = self.clients[index]
        client = Client(self.base_url, token=spec["token"], timeout=self.timeout)
        try:
            for n, (name, content, *extra) in enumerate(self.files(index)):
                if self.stop_event.is_set():
                    return
                key = f"c{spec['case']}-u{spec['username']}-{n}"
                for _ in range(self.retries + 1):
                    started = time.monotonic()
                    try:
                        reply = client.upload_capture(spec["case"], name, content, key, **(extra[0] if extra else {}))
                    except (OSError, http.client.HTTPException) as exc:
                        attempt = Attempt(key, started, time.monotonic(), None, f"{type(exc).__name__}: {exc}")
                    else:
                        pk = reply.json().get("id") if reply.status in (200, 201) else None
                        attempt = Attempt(key, started, time.monotonic(), reply.status,
                                          "" if pk else reply.body[:300].decode(errors="replace"), pk)
                    self._record(attempt)
                    if attempt.accepted or (attempt.status is not None and attempt.status < 500
                                            and attempt.status != 429):
                        break
                    time.sleep(self.retry_pause)
                if self.between is not None:
                    self.between(client, spec)
                if self.pause:
                    time.sleep(self.pause)
        except Exception as exc:  # a client's own crash fails the run, with its reason
            with self._lock:
                self.errors.append(f"client {index}: {type(exc).__name__}: {exc}")
        finally:
            client.close()

    def start(self) -> Burst:
        self._threads = [threading.Thread(target=self._client, args=(i,), daemon=True)
                         for i in range(len(self.clients))]
        for t in self._threads:
            t.start()
        return self

    def join(self, timeout: float) -> None:
        deadline = time.monotonic() + timeout
        for t in self._threads:
            t.join(max(0.0, deadline - time.monotonic()))
        if any(t.is_alive() for t in self._threads):
            self.stop_event.set()
            raise StackError(f"the clients did not finish within {timeout:.0f} s")

    def snapshot(self) -> list[Attempt]:
        with self._lock:
            return list(self.attempts)

    def done(self) -> bool:
        return not any(t.is_alive() for t in self._threads)

    def wait_for(self, predicate: Callable[[list[Attempt]], bool], timeout: float, what: str) -> None:
        """Until ``predicate(attempts so far)``; StackError if the clients finish first or time runs out."""

        def seen() -> bool:
            finished = self.done()  # read before the attempts: a last attempt must not be missed
            if predicate(self.snapshot()):
                return True
            if finished:
                raise StackError(f"the clients finished before {what}")
            return False

        _wait(seen, timeout, what, interval=0.01)


# ----------------------------------------------------------------- inside the stack (python -m)


def seed_clients(n: int, failing_hz: tuple[float, ...] = (75e6,)) -> dict:
    """A team, ``n`` engineers each with a token, a password and a case of their own. Django must be set up.

    Each case has confirmed failing frequencies at ``failing_hz``, so every analysed capture
    stores one reading per frequency (which the checks count).
    """
    from django.contrib.auth import get_user_model
    from rest_framework.authtoken.models import Token

    from emicase.models import EmissionSource, FailingFrequency, Membership, Product, Revision, Team
    from emicase.services.cases import case_open

    stamp = uuid.uuid4().hex[:8]
    team = Team.objects.create(name=f"Stack {stamp}", slug=f"stack-{stamp}", guard_band_db=3.0,
                               frequency_tolerance_pct=0.5)
    product = Product.objects.create(team=team, name="Load controller")
    revision = Revision.objects.create(product=product, hardware_label="A", firmware_label="1.0")
    EmissionSource.objects.create(revision=revision, name="PHY clock", kind="clock", nominal_frequency_hz=25e6,
                                  tolerance_hz=1250)
    clients = []
    for i in range(n):
        password = secrets.token_urlsafe(12)
        user = get_user_model().objects.create_user(username=f"load-{stamp}-{i}", password=password)
        Membership.objects.create(team=team, user=user, role=Membership.Role.ENGINEER)
        case = case_open(product=product, title=f"Radiated fail at 75 MHz ({i + 1})", by=user)
        for f in failing_hz:
            # CISPR 32 class B at 10 m: 30 dBµV/m below 230 MHz (the level is the scan's, 6 dB over).
            FailingFrequency.objects.create(case=case, frequency_hz=f, level=36.0, limit_level=30.0, confirmed=True)
        clients.append({"username": user.username, "password": password,
                        "token": Token.objects.create(user=user).key, "case": case.pk})
    return {"team": team.pk, "revision": revision.pk, "clients": clients}


def _ping(workers: int, timeout: float) -> dict:
    from emicase.tasks import ping

    deadline = time.monotonic() + timeout
    results = [ping.delay(f"ready-{i}") for i in range(max(workers, 1))]
    for i, r in enumerate(results):
        left = deadline - time.monotonic()
        if left <= 0 or r.get(timeout=left) != f"ready-{i}":
            raise StackError("a worker did not answer")
    return {"answered": len(results)}


def main(argv: list[str]) -> None:
    import django

    django.setup()
    if argv[0] == "prepare":
        from django.core.management import call_command

        call_command("migrate", interactive=False, verbosity=0)
        if argv[4] == "1":
            call_command("collectstatic", interactive=False, verbosity=0)
        out = {**seed_clients(int(argv[1])), **_ping(int(argv[2]), float(argv[3]))}
    elif argv[0] == "seed":
        out = {**_ping(int(argv[2]), float(argv[3])), **seed_clients(int(argv[1]))}
    elif argv[0] == "ping":
        out = _ping(int(argv[1]), float(argv[2]))
    else:
        raise SystemExit(f"unknown command {argv[0]!r}: prepare N WORKERS TIMEOUT STATIC | seed N WORKERS TIMEOUT | "
                         "ping WORKERS TIMEOUT")
    print(json.dumps(out))


if __name__ == "__main__":
    main(sys.argv[1:])
