"""Benchmark of the background analysis with real Celery worker processes.

    python manage.py bench_pipeline                       # filesystem + SQLite, then Redis + PostgreSQL
    python manage.py bench_pipeline --brokers redis --scans 40 --burst 120
    python manage.py bench_pipeline --quick --json        # a few items, machine-readable

For each broker it measures, one upload at a time, the time from calling the
upload service (``scan_upload`` / ``capture_upload``, committed as a web
request commits) to the row's status being ``done``, for a 10,001-point
receiver scan and a 1,000,000-sample oscilloscope record; then the
throughput of one worker for a burst of scans enqueued by one commit, with
``--concurrency 1`` and ``--concurrency 2`` (one worker process whose pool has
one or two processes), in alternating rounds. It prints both against the
targets for a 2-core machine, with the stages each wait went to.

Each configuration runs in a child process of this command (settings are read
at import) with its own var folder under ``var/bench/`` and its own database:
SQLite there for the filesystem broker, the PostgreSQL database
``emicase_bench`` beside Redis (created if missing; nothing else is dropped).
The bench database is flushed at the start of each run. Redis defaults to
logical database 15 so the queues it purges are never a developer's or the
test suite's (they use database 0). Servers must be on the loopback interface.
"""

from __future__ import annotations

import argparse
import datetime as dt
import io
import json
import os
import secrets
import shutil
import signal
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path
from urllib.parse import urlparse, urlunparse

import numpy as np
from django.conf import settings
from django.contrib.auth import get_user_model
from django.core.files.uploadedfile import SimpleUploadedFile
from django.core.management import BaseCommand, CommandError, call_command
from django.db import transaction

from emicase.celery import app
from emicase.models import (
    AnalysisStatus,
    Capture,
    EmissionSource,
    FailingFrequency,
    Membership,
    Product,
    Revision,
    Scan,
    Team,
)
from emicase.services.cases import case_open
from emicase.services.uploads import capture_upload, scan_upload
from emicase.tasks import ping

BROKERS = ("filesystem", "redis")
DEFAULT_REDIS_URL = "redis://127.0.0.1:6379/15"
DEFAULT_POSTGRES_URL = "postgres://postgres@127.0.0.1:5432/emicase_bench"
LOOPBACK = {"127.0.0.1", "localhost", "::1"}

SCAN_POINTS = 10_001
RECORD_SAMPLES = 1_000_000
POLL_S = 0.02
ITEM_TIMEOUT_S = 120.0

COUNTS = {"scans": 20, "records": 5, "burst": 60, "rounds": 3}
QUICK_COUNTS = {"scans": 2, "records": 1, "burst": 4, "rounds": 1}
# Upper bounds keep a run's length and disk use bounded whatever is asked.
MAX_COUNTS = {"scans": 500, "records": 50, "burst": 1000, "rounds": 10}

TARGET_P50_S = 1.0
TARGET_RATIO = 1.7
# More than this much of a core used by unrelated programs makes a burst's figure unreliable.
OTHERS_WARN_CORES = 0.15

# ----------------------------------------------------------------- test files


def spectrum_csv(points: int = SCAN_POINTS) -> bytes:
    """A receiver scan, 30 MHz–1 GHz, log-spaced: a 15 dBµV/m floor and two failing tones.

    Against CISPR 32 class B at 10 m with a 3 dB guard band, 75 MHz at
    36 dBµV/m is over the limit and 400 MHz at 35.5 inside the guard band. Both
    sit where the bench case
    already has confirmed failing frequencies, so every scan proposes nothing
    new and the case stays the same size through the run.
    """
    f = np.geomspace(30e6, 1e9, points)
    power = 10 ** ((15.0 + np.random.default_rng(0).normal(0, 0.3, f.size)) / 10)
    for fc, level in ((75e6, 36.0), (400e6, 35.5)):
        power += 10 ** (level / 10) * np.exp(-(((f - fc) / (fc * 4e-3)) ** 2))
    out = io.StringIO()
    out.write("# emicase bench_pipeline\nFrequency (MHz),Level (dBµV/m)\n")
    np.savetxt(
        out, np.column_stack([f / 1e6, 10 * np.log10(power)]), fmt=["%.6f", "%.3f"], delimiter=","
    )
    return out.getvalue().encode()


def _digits(values: np.ndarray, width: int) -> np.ndarray:
    """Zero-padded decimal digits of non-negative integers as ASCII bytes (n × width)."""
    powers = 10 ** np.arange(width - 1, -1, -1, dtype=np.int64)
    return ((values[:, None] // powers) % 10 + ord("0")).astype(np.uint8)


def time_record_csv(
    samples: int = RECORD_SAMPLES, rate_hz: float = 1e9, tone_hz: float = 25e6
) -> bytes:
    """An oscilloscope record: a 25 MHz, 5 mV sine in a little noise, at 1 GS/s.

    Rows read ``ttttttttttt,±vvv.vvv`` (time in ns, voltage in mV), built as
    a byte matrix so a million rows take about a second, not a Python loop.
    """
    n = np.arange(samples, dtype=np.int64)
    t_ns = np.round(n * (1e9 / rate_hz)).astype(np.int64)
    mv = 5.0 * np.sin(2 * np.pi * tone_hz * n / rate_hz) + np.random.default_rng(1).normal(
        0, 0.05, samples
    )
    uv = np.round(mv * 1000).astype(np.int64)
    sign = np.where(uv < 0, ord("-"), ord("+")).astype(np.uint8)[:, None]
    mag = _digits(np.abs(uv), 6)

    def column(char: str) -> np.ndarray:
        return np.full((samples, 1), ord(char), np.uint8)

    rows = np.hstack(
        [_digits(t_ns, 11), column(","), sign, mag[:, :3], column("."), mag[:, 3:], column("\n")]
    )
    return b"Time (ns),Voltage (mV)\n" + rows.tobytes()


# ----------------------------------------------------------------- small helpers


def _percentiles(values: list[float]) -> dict:
    p50, p95 = np.percentile(np.asarray(values, float), [50, 95])
    return {"n": len(values), "p50_s": round(float(p50), 4), "p95_s": round(float(p95), 4)}


def _check_loopback(url: str, what: str) -> None:
    host = urlparse(url).hostname or ""
    if host not in LOOPBACK:
        raise CommandError(
            f"{what} {url!r} is not on the loopback interface; the bench runs on this machine only"
        )


def _load() -> float:
    """The 1-minute load average: other work on the machine skews every figure here."""
    try:
        return round(os.getloadavg()[0], 2)
    except OSError:
        return float("nan")


def _with_database(url: str, name: str) -> str:
    return urlunparse(urlparse(url)._replace(path=f"/{name}"))


def _die_with_parent() -> None:
    """Run in a worker before exec: Linux sends it SIGTERM if the bench process dies without stopping it."""
    try:
        import ctypes

        ctypes.CDLL("libc.so.6", use_errno=True).prctl(1, signal.SIGTERM)  # 1 = PR_SET_PDEATHSIG
    except (OSError, AttributeError):
        pass


class _Interrupted(KeyboardInterrupt):
    """SIGINT or SIGTERM: unwind through the ``finally`` blocks that stop the workers."""


def _install_interrupt_handlers() -> None:
    # The first signal unwinds; any later one is ignored so it cannot cut the
    # clean-up short (Ctrl-C reaches every process in the terminal's group).
    def on_signal(signum, frame):
        signal.signal(signal.SIGINT, signal.SIG_IGN)
        signal.signal(signal.SIGTERM, signal.SIG_IGN)
        raise _Interrupted(signal.Signals(signum).name)

    signal.signal(signal.SIGINT, on_signal)
    signal.signal(signal.SIGTERM, on_signal)


# ----------------------------------------------------------------- the worker


class BenchWorker:
    """One ``celery worker`` process (prefork, ``concurrency`` children) on this process's settings.

    Started in its own process group so stopping it reaches its pool children
    too, and so a Ctrl-C in the terminal does not hit it twice.
    """

    def __init__(self, concurrency: int, log_path: Path):
        self.concurrency = concurrency
        self.log_path = log_path
        self.process: subprocess.Popen | None = None

    def __enter__(self) -> BenchWorker:
        log = open(self.log_path, "ab")  # handed to the worker, closed here after the fork
        self.process = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "celery",
                "-A",
                "emicase",
                "worker",
                "--loglevel",
                "WARNING",
                "--queues",
                "analysis,default",
                "--concurrency",
                str(self.concurrency),
                "--without-mingle",
                "--without-gossip",
                "--hostname",
                f"bench-{os.getpid()}-{self.concurrency}@%h",
            ],
            cwd=settings.BASE_DIR,
            env=dict(os.environ),
            stdout=log,
            stderr=subprocess.STDOUT,
            start_new_session=True,
            preexec_fn=_die_with_parent,
        )
        log.close()
        try:
            self._wait_ready()
        except BaseException:
            self.stop()
            raise
        return self

    def __exit__(self, *exc) -> None:
        self.stop()

    def alive(self) -> bool:
        return self.process is not None and self.process.poll() is None

    def check_alive(self) -> None:
        if not self.alive():
            raise CommandError(
                f"the worker exited with {self.process.returncode}; see {self.log_path}"
            )

    def _wait_ready(self, timeout: float = 90.0) -> None:
        deadline = time.monotonic() + timeout
        answer = ping.delay("ready")
        while time.monotonic() < deadline:
            self.check_alive()
            if answer.ready():
                if answer.get() != "ready":
                    raise CommandError("the worker answered the ping with something else")
                return
            time.sleep(0.1)
        raise CommandError(f"the worker did not answer within {timeout:.0f} s; see {self.log_path}")

    def stop(self) -> None:
        """Warm shutdown; after 30 s, SIGKILL to the whole group. Leaves no process behind."""
        if self.process is None:
            return
        if self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(timeout=30)
            except subprocess.TimeoutExpired:
                pass
        try:
            # Stragglers of the group this worker leads (pool children), by its id:
            # the kernel keeps a group's id from reuse while any member lives.
            os.killpg(self.process.pid, signal.SIGKILL)
        except (ProcessLookupError, PermissionError):
            pass
        self.process.wait()


def clear_broker() -> None:
    """Drop every message waiting on this configuration's broker."""
    if settings.CELERY_BROKER_URL.startswith("filesystem://"):
        options = settings.CELERY_BROKER_TRANSPORT_OPTIONS
        for key in ("data_folder_in", "control_folder"):
            folder = Path(options[key])
            shutil.rmtree(folder, ignore_errors=True)
            folder.mkdir(parents=True, exist_ok=True)
        return
    with app.connection_for_write() as conn:
        for queue in ("analysis", "default"):
            try:
                conn.default_channel.queue_purge(queue)
            except Exception:  # a queue that does not exist yet is empty
                pass


# ----------------------------------------------------------------- one configuration


class Bench:
    """A throwaway team, engineer, product, revision and open case, and the uploads made for them."""

    def __init__(self) -> None:
        stamp = f"{int(time.time())}-{os.getpid()}"
        self.team = Team.objects.create(
            name=f"Bench {stamp}",
            slug=f"bench-{stamp}",
            guard_band_db=3.0,
            frequency_tolerance_pct=0.5,
        )
        self.user = get_user_model().objects.create_user(username=f"bench-{stamp}", password=None)
        Membership.objects.create(team=self.team, user=self.user, role=Membership.Role.ENGINEER)
        product = Product.objects.create(team=self.team, name="Bench controller")
        self.revision = Revision.objects.create(
            product=product, hardware_label="A", firmware_label="1.0"
        )
        EmissionSource.objects.create(
            revision=self.revision,
            name="PHY clock",
            kind="clock",
            nominal_frequency_hz=25e6,
            tolerance_hz=1250,
        )
        self.case = case_open(product=product, title="Radiated fail at 75 MHz", by=self.user)
        # CISPR 32 class B at 10 m: 30 dBµV/m below 230 MHz, 37 above.
        for frequency_hz, level, limit in ((75e6, 36.0, 30.0), (400e6, 35.5, 37.0)):
            FailingFrequency.objects.create(
                case=self.case,
                frequency_hz=frequency_hz,
                level=level,
                limit_level=limit,
                confirmed=True,
            )
        self.count = 0

    def upload_scan(self, content: bytes):
        self.count += 1
        return scan_upload(
            revision=self.revision,
            file=SimpleUploadedFile(f"scan-{self.count}.csv", content),
            by=self.user,
            case=self.case,
            emission_kind="radiated",
            limit_id="cispr32-b-rad-10m",
            distance_m=10.0,
            polarisation="vertical",
            measured_on=dt.date.today(),
        )

    def upload_record(self, content: bytes):
        self.count += 1
        return capture_upload(
            case=self.case,
            file=SimpleUploadedFile(f"record-{self.count}.csv", content),
            by=self.user,
            revision=self.revision,
            probe_kind="e_field",
            tip="ball 3 mm",
            location="U4",
            declared_domain="time",
        )


def _finished_or_fail(model, pks: list[int], worker: BenchWorker, timeout: float) -> float:
    """Poll the rows every POLL_S until all are finished. Returns the time.time() it was seen.

    Raises CommandError if one failed, the worker died, or time ran out.
    """
    finished = (AnalysisStatus.DONE, AnalysisStatus.FAILED)
    deadline = time.monotonic() + timeout
    while True:
        if model.objects.filter(pk__in=pks, status__in=finished).count() == len(pks):
            seen = time.time()
            break
        worker.check_alive()
        if time.monotonic() > deadline:
            raise CommandError(
                f"{model.__name__} analyses not finished after {timeout:.0f} s; see {worker.log_path}"
            )
        time.sleep(POLL_S)
    failed = model.objects.filter(pk__in=pks).exclude(status=AnalysisStatus.DONE).first()
    if failed is not None:
        raise CommandError(
            f"{model.__name__} {failed.pk} ended {failed.status}: {failed.error_text}"
        )
    return seen


def measure_latency(upload: Callable[[], object], worker: BenchWorker, n: int) -> dict:
    """Upload one file at a time and wait for it. Returns p50/p95 and median time per stage (s)."""
    totals: list[float] = []
    stages: dict[str, list[float]] = {
        "upload": [],
        "queue_to_claim": [],
        "engine": [],
        "store_and_seen": [],
    }
    for _ in range(n):
        t0 = time.time()
        row = upload()  # committed on return; the commit hook has published the task
        t1 = time.time()
        seen = _finished_or_fail(type(row), [row.pk], worker, ITEM_TIMEOUT_S)
        row.refresh_from_db(fields=["analysis_started_at", "analysis_finished_at"])
        started = row.analysis_started_at.timestamp()
        finished = row.analysis_finished_at.timestamp()
        totals.append(seen - t0)
        stages["upload"].append(t1 - t0)
        stages["queue_to_claim"].append(started - t1)
        stages["engine"].append(finished - started)
        stages["store_and_seen"].append(seen - finished)
    out = _percentiles(totals)
    out["stages_median_s"] = {k: round(float(np.median(v)), 4) for k, v in stages.items()}
    return out


def cpu_snapshot(worker_pgid: int) -> dict | None:
    """CPU ticks used so far, from Linux's /proc: the machine's busy total, and per process of
    the worker's group, of this process, and of the database and broker servers. None without /proc.

    A PostgreSQL backend counts as ours when its process title names the bench
    database; its background processes (WAL writer, checkpointer) count too.
    """
    try:
        with open("/proc/stat") as fh:
            fields = [int(x) for x in fh.readline().split()[1:9]]
    except OSError:
        return None
    database = settings.DATABASES["default"]["NAME"]
    me = os.getpid()
    procs: dict[int, tuple[str, int]] = {}
    for entry in os.scandir("/proc"):
        if not entry.name.isdigit():
            continue
        try:
            with open(f"/proc/{entry.name}/stat") as fh:
                stat = fh.read()
            comm = stat[stat.index("(") + 1 : stat.rindex(")")]
            rest = stat[stat.rindex(")") + 2 :].split()
            if comm == "postgres":
                with open(f"/proc/{entry.name}/cmdline", "rb") as fh:
                    title = fh.read().decode(errors="replace")
        except (OSError, ValueError):
            continue  # the process ended meanwhile
        pid, pgrp, ticks = int(entry.name), int(rest[2]), int(rest[11]) + int(rest[12])
        if pgrp == worker_pgid:
            kind = "worker"
        elif pid == me:
            kind = "bench"
        elif comm == "redis-server" or (
            comm == "postgres" and (f" {database} " in title or "(" not in title)
        ):
            kind = "servers"
        else:
            continue
        procs[pid] = (kind, ticks)
    # All but idle and iowait.
    return {"busy": sum(fields) - fields[3] - fields[4], "procs": procs, "at": time.monotonic()}


def cpu_cores(before: dict | None, after: dict | None) -> dict | None:
    """Mean cores in use between two snapshots: worker, bench, servers, and everything else."""
    if before is None or after is None:
        return None
    hz = os.sysconf("SC_CLK_TCK")
    wall = after["at"] - before["at"]
    used = {"worker": 0, "bench": 0, "servers": 0}
    for pid, (kind, ticks) in after["procs"].items():
        # A process born in between used all its ticks in between.
        used[kind] += ticks - before["procs"].get(pid, (kind, 0))[1]
    cores = {kind: ticks / hz / wall for kind, ticks in used.items()}
    cores["others"] = max(0.0, (after["busy"] - before["busy"]) / hz / wall - sum(cores.values()))
    return {kind: round(value, 3) for kind, value in cores.items()}


def measure_burst(bench: Bench, content: bytes, worker: BenchWorker, n: int) -> dict:
    """Store n scans in one transaction, so its commit enqueues them all at once, and wait for all.

    Returns analyses per second (first enqueue to last seen done), the median
    claim-to-finish time of one analysis, the pool's occupancy (the share of
    the pool processes' time spent between a claim and its finish; the rest
    goes to fetching, dispatching, storing and committing), and the cores in
    use meanwhile (see cpu_cores).
    """
    with transaction.atomic():
        pks = [bench.upload_scan(content).pk for _ in range(n)]
        before = cpu_snapshot(worker.process.pid)
        # Clock starts at the commit, whose hooks publish the n messages.
        t0 = time.time()
    seen = _finished_or_fail(Scan, pks, worker, timeout=60.0 + 2.0 * n)
    after = cpu_snapshot(worker.process.pid)
    spans = [
        (finished - started).total_seconds()
        for started, finished in Scan.objects.filter(pk__in=pks).values_list(
            "analysis_started_at", "analysis_finished_at"
        )
    ]
    wall = seen - t0
    cores = cpu_cores(before, after)
    return {
        "per_s": round(n / wall, 3),
        "claim_to_finish_median_s": round(float(np.median(spans)), 4),
        "occupancy": round(sum(spans) / (wall * worker.concurrency), 3),
        "cpu_cores": cores,
        # CPU time is what contention changes least: the cost of one analysis.
        "cpu_ms_per_analysis": None
        if cores is None
        else {k: round(cores[k] * wall / n * 1000, 2) for k in ("worker", "servers")},
    }


def warm_up(bench: Bench, worker: BenchWorker, scan: bytes, record: bytes | None) -> None:
    """Give every pool child a first task of each kind, so lazy imports and connections are not measured."""
    with transaction.atomic():
        scans = [bench.upload_scan(scan).pk for _ in range(2 * worker.concurrency)]
        records = (
            [bench.upload_record(record).pk for _ in range(worker.concurrency)] if record else []
        )
    _finished_or_fail(Scan, scans, worker, ITEM_TIMEOUT_S)
    if records:
        _finished_or_fail(Capture, records, worker, ITEM_TIMEOUT_S)


def run_configuration(config: str, counts: dict, say: Callable[[str], None]) -> dict:
    """Measure one broker configuration in this process's settings. Returns its results."""
    database = settings.DATABASES["default"]["ENGINE"].rsplit(".", 1)[-1]
    broker = settings.CELERY_BROKER_URL
    expected = {"filesystem": ("filesystem://", "sqlite3"), "redis": ("redis://", "postgresql")}[
        config
    ]
    if not broker.startswith(expected[0]) or database != expected[1]:
        raise CommandError(
            f"configuration {config} runs on {broker} and {database}, expected {expected}"
        )

    say(f"{config}: migrating and emptying the bench database")
    call_command("migrate", interactive=False, verbosity=0)
    call_command("flush", interactive=False, verbosity=0)
    uploads = Path(settings.MEDIA_ROOT) / "uploads"
    shutil.rmtree(uploads, ignore_errors=True)
    say(f"{config}: building a {SCAN_POINTS:,}-point scan and a {RECORD_SAMPLES:,}-sample record")
    scan, record = spectrum_csv(), time_record_csv()
    bench = Bench()
    var = Path(settings.VAR_DIR)
    for old_log in var.glob("worker-c*.log"):
        old_log.unlink()
    latency: dict = {}
    bursts: dict[int, list[dict]] = {1: [], 2: []}
    try:
        # Rounds alternate the two worker sizes, so a change in the machine's
        # other load during the run falls on both sides of the ratio.
        for round_no in range(1, counts["rounds"] + 1):
            for concurrency in (1, 2):
                step = f"{config}: round {round_no}/{counts['rounds']}, --concurrency {concurrency}"
                say(f"{step}: starting the worker")
                clear_broker()
                with BenchWorker(concurrency, var / f"worker-c{concurrency}.log") as worker:
                    first_latency_run = concurrency == 2 and not latency
                    warm_up(bench, worker, scan, record if first_latency_run else None)
                    if first_latency_run:
                        say(f"{step}: {counts['scans']} scans, one at a time")
                        latency["scan"] = measure_latency(
                            lambda: bench.upload_scan(scan), worker, counts["scans"]
                        )
                        say(f"{step}: {counts['records']} time records, one at a time")
                        latency["record"] = measure_latency(
                            lambda: bench.upload_record(record), worker, counts["records"]
                        )
                    say(f"{step}: burst of {counts['burst']} scans")
                    load = _load()
                    burst = measure_burst(bench, scan, worker, counts["burst"])
                    burst["load_average_before"] = load
                    bursts[concurrency].append(burst)
    finally:
        # The rows go with the next run's flush; the files (about 20 MB per record) go now.
        shutil.rmtree(uploads, ignore_errors=True)
    return {
        "status": "measured",
        "broker": broker.split("://", 1)[0],
        "database": "sqlite" if database == "sqlite3" else database,
        "debug": settings.DEBUG,
        "worker": "one celery worker (prefork); latency with --concurrency 2",
        "latency": latency,
        "throughput": _throughput(counts, bursts),
    }


def _throughput(counts: dict, bursts: dict[int, list[dict]]) -> dict:
    """Medians over the rounds for each worker size, their ratio, and every round's figures."""

    def median(concurrency: int, key: str) -> float:
        return round(float(np.median([b[key] for b in bursts[concurrency]])), 4)

    one, two = median(1, "per_s"), median(2, "per_s")
    return {
        "burst": counts["burst"],
        "rounds": counts["rounds"],
        "one_process_per_s": one,
        "two_processes_per_s": two,
        "ratio": round(two / one, 3),
        "ratio_per_round": [
            round(b2["per_s"] / b1["per_s"], 3) for b1, b2 in zip(bursts[1], bursts[2], strict=True)
        ],
        "claim_to_finish_median_s": {
            "one_process": median(1, "claim_to_finish_median_s"),
            "two_processes": median(2, "claim_to_finish_median_s"),
        },
        "occupancy": {
            "one_process": median(1, "occupancy"),
            "two_processes": median(2, "occupancy"),
        },
        "load_average_before": [b["load_average_before"] for b in bursts[1] + bursts[2]],
        "cpu_cores": {
            "one_process": _median_of(bursts[1], "cpu_cores"),
            "two_processes": _median_of(bursts[2], "cpu_cores"),
        },
        "cpu_ms_per_analysis": {
            "one_process": _median_of(bursts[1], "cpu_ms_per_analysis"),
            "two_processes": _median_of(bursts[2], "cpu_ms_per_analysis"),
        },
    }


def _median_of(bursts: list[dict], key: str) -> dict | None:
    """Median over the bursts of each entry of a per-burst dict (None without /proc)."""
    if any(b[key] is None for b in bursts):
        return None
    return {k: round(float(np.median([b[key][k] for b in bursts])), 3) for k in bursts[0][key]}


# ----------------------------------------------------------------- the parent: one child per configuration


def _child_env(config: str, var_dir: Path, redis_url: str, postgres_url: str) -> dict:
    env = {
        k: v
        for k, v in os.environ.items()
        if k
        not in (
            "DATABASE_URL",
            "CELERY_BROKER_URL",
            "CELERY_RESULT_BACKEND",
            "EMICASE_DATABASE_NAME",
            "EMICASE_MEDIA_ROOT",
            "EMICASE_STATIC_ROOT",
        )
    }
    env.update(
        DJANGO_SETTINGS_MODULE="emicase.settings",
        EMICASE_VAR_DIR=str(var_dir / config),
        PYTHONUNBUFFERED="1",
    )
    if config == "redis":
        # The production pairing, with production's DEBUG off.
        env.update(
            DATABASE_URL=postgres_url,
            CELERY_BROKER_URL=redis_url,
            EMICASE_DEBUG="0",
            EMICASE_SECRET_KEY=secrets.token_urlsafe(50),
        )
    return env


def _redis_unavailable(url: str) -> str:
    import redis

    try:
        redis.Redis.from_url(url, socket_timeout=2, socket_connect_timeout=2).ping()
    except Exception as exc:  # any failure means: skip this broker
        return f"Redis at {url} does not answer ({exc.__class__.__name__}: {exc})"
    return ""


def _postgres_unavailable(url: str) -> str:
    """Make sure the bench database exists (creating it if missing). Returns why it cannot, or ''."""
    import psycopg
    from psycopg import sql

    name = urlparse(url).path.lstrip("/")
    if not name:
        return f"{url} names no database"
    errors = []
    for admin_db in ("postgres", "test"):
        try:
            with psycopg.connect(
                _with_database(url, admin_db), autocommit=True, connect_timeout=3
            ) as conn:
                if (
                    conn.execute("SELECT 1 FROM pg_database WHERE datname = %s", (name,)).fetchone()
                    is None
                ):
                    conn.execute(sql.SQL("CREATE DATABASE {}").format(sql.Identifier(name)))
            return ""
        except Exception as exc:  # try the next maintenance database, then give up
            errors.append(f"{admin_db}: {exc.__class__.__name__}: {str(exc).strip()}")
    return f"PostgreSQL at {url} is not usable ({'; '.join(errors)})"


def _run_child(argv: list[str], env: dict, result_path: Path) -> dict:
    result_path.unlink(missing_ok=True)
    # The child's own output is progress: it goes to stderr, leaving stdout to the report.
    child = subprocess.Popen(argv, cwd=settings.BASE_DIR, env=env, stdout=sys.stderr.fileno())
    try:
        code = child.wait()
    except KeyboardInterrupt:
        # The child stops its workers itself; give it the time to.
        if child.poll() is None:
            child.send_signal(signal.SIGTERM)
            try:
                child.wait(timeout=90)
            except subprocess.TimeoutExpired:
                child.kill()
                child.wait()
        raise
    if code != 0 or not result_path.exists():
        return {
            "status": "error",
            "reason": f"the benchmark child exited with {code}; see its output above",
        }
    return json.loads(result_path.read_text())


def targets(brokers: dict) -> list[dict]:
    """The targets for a 2-core machine, each with its measured value and met True/False (None: not measured)."""
    out = []
    redis = brokers.get("redis", {})
    p50 = redis["latency"]["scan"]["p50_s"] if redis.get("status") == "measured" else None
    out.append(
        {
            "name": f"p50 upload-to-done of the {SCAN_POINTS:,}-point scan on Redis <= {TARGET_P50_S:g} s",
            "value": p50,
            "unit": "s",
            "met": None if p50 is None else p50 <= TARGET_P50_S,
        }
    )
    for name in BROKERS:
        result = brokers.get(name, {})
        ratio = result["throughput"]["ratio"] if result.get("status") == "measured" else None
        out.append(
            {
                "name": f"throughput with 2 worker processes >= {TARGET_RATIO:g}x that with 1 ({name})",
                "value": ratio,
                "unit": "x",
                "met": None if ratio is None else ratio >= TARGET_RATIO,
            }
        )
    return out


def render(report: dict) -> str:
    """The report as text: one table per broker, then the target lines."""
    lines = []
    for name, result in report["brokers"].items():
        if result["status"] != "measured":
            lines += [f"{name}: {result['status'].upper()} — {result['reason']}", ""]
            continue
        lat, thr = result["latency"], result["throughput"]
        debug = "DEBUG on" if result["debug"] else "DEBUG off"
        lines.append(f"{name} broker + {result['database']} ({debug}) — {result['worker']}")
        lines.append(f"  {'upload to done (s)':<34}{'n':>5}{'p50':>9}{'p95':>9}")
        for key, label in (
            ("scan", f"{SCAN_POINTS:,}-point receiver scan"),
            ("record", f"{RECORD_SAMPLES:,}-sample time record"),
        ):
            lines.append(
                f"  {label:<34}{lat[key]['n']:>5}{lat[key]['p50_s']:>9.3f}{lat[key]['p95_s']:>9.3f}"
            )
        for key in ("scan", "record"):
            st = lat[key]["stages_median_s"]
            lines.append(
                f"  {key} median per stage (s): upload {st['upload']:.3f} | queue to claim "
                f"{st['queue_to_claim']:.3f} | engine {st['engine']:.3f} | store and seen {st['store_and_seen']:.3f}"
            )
        lines.append(
            f"  throughput, burst of {thr['burst']} scans, median of {thr['rounds']} rounds (analyses/s): "
            f"--concurrency 1 {thr['one_process_per_s']:.2f} | --concurrency 2 "
            f"{thr['two_processes_per_s']:.2f} | ratio {thr['ratio']:.2f}"
        )
        c2f, occ = thr["claim_to_finish_median_s"], thr["occupancy"]
        rounds = ", ".join(f"{r:.2f}" for r in thr["ratio_per_round"])
        loads = ", ".join(f"{x:.2f}" for x in thr["load_average_before"])
        lines += [
            f"  ratio per round: {rounds}; 1-min load average before each burst: {loads}",
            f"  in the bursts (c1 | c2): claim to finish, median {c2f['one_process']:.3f} | "
            f"{c2f['two_processes']:.3f} s; pool occupancy {occ['one_process']:.0%} | "
            f"{occ['two_processes']:.0%}",
        ]
        cores = thr["cpu_cores"]
        if cores["one_process"] and cores["two_processes"]:
            c1, c2 = cores["one_process"], cores["two_processes"]
            lines.append(
                f"  cores in use during the bursts (c1 | c2): worker {c1['worker']:.2f} | "
                f"{c2['worker']:.2f}; this bench {c1['bench']:.2f} | {c2['bench']:.2f}; database "
                f"and broker servers {c1['servers']:.2f} | {c2['servers']:.2f}; other programs "
                f"{c1['others']:.2f} | {c2['others']:.2f}"
            )
            m1, m2 = (
                thr["cpu_ms_per_analysis"]["one_process"],
                thr["cpu_ms_per_analysis"]["two_processes"],
            )
            lines.append(
                f"  CPU per analysis, ms (c1 | c2): worker {m1['worker']:.1f} | {m2['worker']:.1f}; "
                f"database and broker servers {m1['servers']:.1f} | {m2['servers']:.1f}"
            )
            if max(c1["others"], c2["others"]) > OTHERS_WARN_CORES:
                lines.append(
                    "  WARNING: other programs were using the CPUs during the bursts; "
                    "the throughput figures are skewed"
                )
        lines.append("")
    lines.append(f"Targets ({report['machine']['cpus']} CPUs here; set for a 2-core machine):")
    for t in report["targets"]:
        verdict = "NOT MEASURED" if t["met"] is None else ("MET" if t["met"] else "NOT MET")
        value = "-" if t["value"] is None else f"{t['value']:.3g} {t['unit']}"
        lines.append(f"  {t['name']}: {value} — {verdict}")
    return "\n".join(lines)


class Command(BaseCommand):
    help = "Benchmark upload-to-done latency and worker throughput on the filesystem broker and on Redis."

    def add_arguments(self, parser):
        parser.add_argument(
            "--brokers", default=",".join(BROKERS), help="comma-separated: filesystem,redis"
        )
        parser.add_argument(
            "--scans", type=int, help=f"scans timed one at a time (default {COUNTS['scans']})"
        )
        parser.add_argument(
            "--records",
            type=int,
            help=f"time records timed one at a time (default {COUNTS['records']})",
        )
        parser.add_argument(
            "--burst", type=int, help=f"scans per throughput burst (default {COUNTS['burst']})"
        )
        parser.add_argument(
            "--rounds",
            type=int,
            help=f"throughput rounds, each a burst on 1 then 2 processes (default {COUNTS['rounds']})",
        )
        parser.add_argument(
            "--quick", action="store_true", help="a few items of each (a smoke run)"
        )
        parser.add_argument("--json", action="store_true", help="print the results as JSON")
        parser.add_argument(
            "--var-dir", type=Path, default=None, help="bench folders (default var/bench)"
        )
        parser.add_argument("--redis-url", default=DEFAULT_REDIS_URL)
        parser.add_argument(
            "--postgres-url",
            default=DEFAULT_POSTGRES_URL,
            help="the bench's own database, created if missing",
        )
        # Internal: the child process that measures one configuration.
        parser.add_argument("--_config", choices=BROKERS, help=argparse.SUPPRESS)
        parser.add_argument("--_result", help=argparse.SUPPRESS)

    def handle(self, *args, **opts):
        counts = self._counts(opts)
        _install_interrupt_handlers()
        try:
            self._handle(counts, opts)
        except _Interrupted as exc:
            # By now every ``finally`` has run: the workers are stopped.
            raise CommandError(f"interrupted ({exc}); workers stopped") from None

    def _handle(self, counts: dict, opts: dict) -> None:
        if opts["_config"]:
            result = run_configuration(
                opts["_config"], counts, lambda text: self.stderr.write(text)
            )
            Path(opts["_result"]).write_text(json.dumps(result))
            return
        wanted = [b.strip() for b in opts["brokers"].split(",") if b.strip()]
        unknown = sorted(set(wanted) - set(BROKERS))
        if unknown or not wanted:
            raise CommandError(
                f"--brokers: choose from {', '.join(BROKERS)} (got {opts['brokers']!r})"
            )
        _check_loopback(opts["redis_url"], "--redis-url")
        _check_loopback(opts["postgres_url"], "--postgres-url")
        var_dir = (opts["var_dir"] or Path(settings.BASE_DIR) / "var" / "bench").resolve()
        brokers = {}
        for config in wanted:
            if config == "redis":
                reason = _redis_unavailable(opts["redis_url"]) or _postgres_unavailable(
                    opts["postgres_url"]
                )
                if reason:
                    self.stderr.write(f"redis: skipped — {reason}")
                    brokers[config] = {"status": "skipped", "reason": reason}
                    continue
            (var_dir / config).mkdir(parents=True, exist_ok=True)
            result_path = var_dir / config / "result.json"
            argv = [
                sys.executable,
                str(Path(settings.BASE_DIR) / "manage.py"),
                "bench_pipeline",
                "--_config",
                config,
                "--_result",
                str(result_path),
                *(f"--{k}={v}" for k, v in counts.items()),
            ]
            env = _child_env(config, var_dir, opts["redis_url"], opts["postgres_url"])
            brokers[config] = _run_child(argv, env, result_path)
        report = {
            "machine": {"cpus": os.cpu_count(), "python": sys.version.split()[0]},
            "counts": counts,
            "brokers": brokers,
            "targets": targets(brokers),
        }
        self.stdout.write(json.dumps(report, indent=2) if opts["json"] else render(report))
        if any(b["status"] == "error" for b in brokers.values()):
            raise CommandError("a configuration failed; see its output above")

    @staticmethod
    def _counts(opts) -> dict:
        base = QUICK_COUNTS if opts["quick"] else COUNTS
        counts = {k: opts[k] if opts[k] is not None else base[k] for k in COUNTS}
        for k, v in counts.items():
            low = 2 if k == "burst" else 1
            if not low <= v <= MAX_COUNTS[k]:
                raise CommandError(f"--{k} must be between {low} and {MAX_COUNTS[k]}")
        return counts
