"""Load benchmark: concurrent API clients against gunicorn + PostgreSQL + Redis + Celery workers.

    python manage.py bench_load                         # 20 clients × 50 uploads each
    python manage.py bench_load --quick                 # 4 clients × 5 uploads (a smoke run)
    python manage.py bench_load --clients 5 --uploads 10 --json
    python manage.py bench_load --use-machine-services  # this machine's PostgreSQL and Redis

It starts a whole stack on loopback (``_stack.py``): gunicorn (gthread, ``--web-workers``
processes × ``--web-threads`` threads) serving the production settings (DEBUG off, static
files collected), ``--workers`` Celery worker processes (``--concurrency`` each), and by
default a PostgreSQL cluster and a Redis of its own on free ports. That PostgreSQL runs with
``fsync`` and ``full_page_writes`` off, so its figures are those of a server tuned for tests,
not of a durable production one; the report says so. With ``--use-machine-services`` it uses
the servers at ``--postgres-url`` (its database is dropped and created again; default
``emicase_bench_load`` on 5432) and ``--redis-url`` (its logical database and the next two are
flushed; default 12–14 on 6379, used by nothing else here).

It seeds one team and, per client, an engineer with a token and a password and a case of
their own with a confirmed failing frequency at 75 MHz. Each client (a thread using
``http.client``, as a script on a bench PC would) signs in through the sign-in page once,
then, for each of its uploads: posts a small near-field capture (a 1,001-point spectrum in
dBµV, harmonics of a 25 MHz clock; every file differs) to ``POST /api/captures/`` with its
token and an Idempotency-Key, reads its case page (``GET /cases/<id>/``, the HTML page) and
reads the case through the API (``GET /api/cases/<id>/``). A refused upload (any status but
200/201, or a failed connection) is counted, not retried.

When the clients are done it waits (at most ``--timeout`` seconds) for every accepted upload
to be analysed, then reports requests/s over the clients' phase, p50/p95 latency per
endpoint, and the uploads sent, accepted, refused, analysed (done, stored once) and lost (an
accepted upload whose row is missing or never reached done). Lost must be 0: the command
exits with an error otherwise. Bounded: at most 100 clients × 500 uploads, loopback only.
Other programs on the machine skew every figure: the load average is printed before and
after.
"""

from __future__ import annotations

import io
import json
import os
import shutil
import tempfile
import threading
import time
from pathlib import Path
from urllib.parse import urlparse

import numpy as np
from django.conf import settings
from django.core.management import BaseCommand, CommandError

from emicase.management.commands import _stack
from emicase.management.commands._stack import Client, Stack, StackError

DEFAULT_POSTGRES_URL = "postgres://postgres@127.0.0.1:5432/emicase_bench_load"
DEFAULT_REDIS_URL = "redis://127.0.0.1:6379/12"
LOOPBACK = {"127.0.0.1", "localhost", "::1"}

COUNTS = {"clients": 20, "uploads": 50}
QUICK_COUNTS = {"clients": 4, "uploads": 5}
MAX_COUNTS = {"clients": 100, "uploads": 500}
POINTS = 1001
# More than this much of a core used by other programs skews the figures (as in bench_pipeline).
OTHERS_WARN_CORES = 0.15
ENDPOINTS = ("POST /api/captures/", "GET /cases/<id>/", "GET /api/cases/<id>/")


def near_field_capture(seed: int, points: int = POINTS) -> bytes:
    """A spectrum analyser's export of an H-field probe over a board: 30 MHz–1 GHz in dBµV.

    A 10 dBµV floor and the 25 MHz clock's harmonics at falling levels (the 3rd, 75 MHz, is
    the case's failing frequency), each a little different per ``seed``.
    """
    rng = np.random.default_rng(seed)
    f = np.geomspace(30e6, 1e9, points)
    power = 10 ** ((10.0 + rng.normal(0, 0.5, f.size)) / 10)
    for k in range(2, 40):
        level = 55.0 - 0.8 * k + rng.normal(0, 1.0)
        power += 10 ** (level / 10) * np.exp(-(((f - 25e6 * k) / (25e6 * k * 3e-3)) ** 2))
    out = io.StringIO()
    out.write("# emicase bench_load: near-field probe capture\nFrequency (MHz),Level (dBµV)\n")
    np.savetxt(out, np.column_stack([f / 1e6, 10 * np.log10(power)]), fmt=["%.6f", "%.3f"], delimiter=",")
    return out.getvalue().encode()


def _load() -> list[float]:
    try:
        return [round(x, 2) for x in os.getloadavg()]
    except OSError:
        return []


def _busy_ticks() -> tuple[int, int] | None:
    """(busy, total) CPU ticks of the whole machine so far, from /proc/stat; None without it."""
    try:
        with open("/proc/stat") as fh:
            values = [int(v) for v in fh.readline().split()[1:]]
    except (OSError, ValueError):
        return None
    idle = values[3] + (values[4] if len(values) > 4 else 0)
    return sum(values) - idle, sum(values)


def _ticks_by_part(stack: Stack) -> dict[str, int] | None:
    """CPU ticks used so far by each part of the stack and by everything else, from /proc; None without it.

    Parts: the web server's and the workers' process groups, the PostgreSQL server (the
    postmaster and its children; private cluster only), Redis (private only), this
    process (the clients), and 'others' (the rest of the machine's busy time, /proc/stat).
    """
    groups = {"web": {stack.web.popen.pid}, "workers": {w.popen.pid for w in stack.workers}}
    if stack.redis is not None and stack.redis.process is not None:
        groups["redis"] = {stack.redis.process.popen.pid}
    postmaster = None
    if stack.postgres is not None:
        try:
            postmaster = int((stack.postgres.data / "postmaster.pid").read_text().split()[0])
        except (OSError, ValueError, IndexError):
            pass
    # The machine's own servers (--use-machine-services) serve others too: they count as 'others'.
    parts = dict.fromkeys([*groups, *(["postgres"] if postmaster else []), "clients", "others"], 0)
    try:
        with open("/proc/stat") as fh:
            values = [int(v) for v in fh.readline().split()[1:]]
        busy = sum(values) - values[3] - (values[4] if len(values) > 4 else 0)
        for entry in os.scandir("/proc"):
            if not entry.name.isdigit():
                continue
            try:
                with open(f"/proc/{entry.name}/stat") as fh:
                    fields = fh.read().rsplit(")", 1)[1].split()
            except OSError:
                continue  # the process ended meanwhile
            pid, ppid, pgrp = int(entry.name), int(fields[1]), int(fields[2])
            ticks = int(fields[11]) + int(fields[12])  # utime + stime
            part = next((name for name, ids in groups.items() if pgrp in ids), None)
            if part is None and postmaster is not None and postmaster in (pid, ppid):
                part = "postgres"
            if part is None and pid == os.getpid():
                part = "clients"
            if part is not None:
                parts[part] += ticks
        parts["others"] = busy - sum(v for k, v in parts.items() if k != "others")
    except (OSError, ValueError):
        return None
    return parts


def _cores(before: dict | None, after: dict | None, wall: float) -> dict | None:
    if not before or not after or wall <= 0:
        return None
    hz = os.sysconf("SC_CLK_TCK")
    return {k: round(max(after[k] - before[k], 0) / hz / wall, 2) for k in after}


def _cpu_ms(before: dict | None, after: dict | None, done: dict | None, requests: int, analyses: int) -> dict | None:
    """CPU ms of the web server per request (clients' phase) and of the workers per analysis (until the last)."""
    if not before or not after or not done or not requests or not analyses:
        return None
    per_tick_ms = 1000 / os.sysconf("SC_CLK_TCK")
    return {"web_per_request": round((after["web"] - before["web"]) * per_tick_ms / requests, 1),
            "workers_per_analysis": round((done["workers"] - before["workers"]) * per_tick_ms / analyses, 1)}


def _percentiles_ms(values: list[float]) -> dict:
    if not values:
        return {"n": 0, "p50_ms": None, "p95_ms": None, "max_ms": None}
    p50, p95 = np.percentile(np.asarray(values) * 1000, [50, 95])
    return {"n": len(values), "p50_ms": round(float(p50), 1), "p95_ms": round(float(p95), 1),
            "max_ms": round(max(values) * 1000, 1)}


class Recorder:
    """Every timed request of every client: (endpoint, status or None, seconds)."""

    def __init__(self):
        self.rows: list[tuple[str, int | None, float]] = []
        self.uploads: list[dict] = []
        self.errors: list[str] = []
        self.lock = threading.Lock()

    def add(self, endpoint: str, status: int | None, seconds: float) -> None:
        with self.lock:
            self.rows.append((endpoint, status, seconds))


def run_client(base_url: str, spec: dict, files: list[bytes], rec: Recorder, ready: threading.Barrier,
               timeout: float) -> None:
    client = Client(base_url, token=spec["token"], timeout=timeout)
    case = spec["case"]
    try:
        client.sign_in(spec["username"], spec["password"])
        ready.wait()
        for n, content in enumerate(files):
            key = f"bench-load-{case}-{n}"
            started = time.perf_counter()
            try:
                reply = client.upload_capture(case, f"nf-{case}-{n}.csv", content, key)
            except (OSError, _stack.http.client.HTTPException) as exc:
                rec.add(ENDPOINTS[0], None, time.perf_counter() - started)
                with rec.lock:
                    rec.uploads.append({"key": key, "status": None, "id": None, "error": type(exc).__name__})
            else:
                rec.add(ENDPOINTS[0], reply.status, reply.seconds)
                pk = reply.json().get("id") if reply.status in (200, 201) else None
                with rec.lock:
                    rec.uploads.append({"key": key, "status": reply.status, "id": pk,
                                        "error": "" if pk else reply.body[:200].decode(errors="replace")})
            for endpoint, path, token in ((ENDPOINTS[1], f"/cases/{case}/", False),
                                          (ENDPOINTS[2], f"/api/cases/{case}/", True)):
                started = time.perf_counter()
                try:
                    reply = client.request("GET", path, token=token)
                    rec.add(endpoint, reply.status, reply.seconds)
                except (OSError, _stack.http.client.HTTPException):
                    rec.add(endpoint, None, time.perf_counter() - started)
    except Exception as exc:  # the run reports it; one client's crash must not hang the others
        with rec.lock:
            rec.errors.append(f"client {spec['username']}: {type(exc).__name__}: {exc}")
        ready.abort()
    finally:
        client.close()


def measure(stack: Stack, counts: dict, timeout: float, log) -> dict:
    """Seed, run the clients, wait for the analyses; the report's measured part."""
    n_clients, n_uploads = counts["clients"], counts["uploads"]
    log(f"building {n_clients * n_uploads} captures ...")
    files = [[near_field_capture(10_000 * c + u) for u in range(n_uploads)] for c in range(n_clients)]
    seeded = stack.seeded
    rec = Recorder()
    ready = threading.Barrier(n_clients + 1)
    threads = [threading.Thread(target=run_client, args=(stack.base_url, spec, files[i], rec, ready, 60.0),
                                daemon=True) for i, spec in enumerate(seeded)]
    for t in threads:
        t.start()
    try:
        ready.wait(timeout=120)  # every client signed in: the timed phase starts together
    except threading.BrokenBarrierError:
        raise CommandError(f"a client could not start: {rec.errors}") from None
    log(f"{n_clients} clients uploading ...")
    load_before, ticks_before, parts_before = _load(), _busy_ticks(), _ticks_by_part(stack)
    t0 = time.perf_counter()
    first_upload = time.time()
    deadline = time.monotonic() + max(600.0, 2.0 * n_clients * n_uploads)
    for t in threads:
        t.join(max(0.0, deadline - time.monotonic()))
    if any(t.is_alive() for t in threads):
        raise CommandError("the clients did not finish in time")
    wall = time.perf_counter() - t0
    ticks_after, parts_after = _busy_ticks(), _ticks_by_part(stack)
    if rec.errors:
        raise CommandError("; ".join(rec.errors))

    accepted = {u["key"]: u["id"] for u in rec.uploads if u["id"] is not None}
    refused = [u for u in rec.uploads if u["id"] is None]
    cases = [s["case"] for s in seeded]
    log(f"waiting for {len(accepted)} analyses ...")
    wait_deadline = time.monotonic() + timeout
    while True:
        rows = stack.captures(cases)
        pending = [k for k in accepted if not rows.get(k) or rows[k][0]["status"] in ("queued", "running")]
        if not pending or time.monotonic() > wait_deadline:
            break
        for w in stack.workers:
            w.check()
        time.sleep(0.5)
    finished = time.time()
    parts_done = _ticks_by_part(stack)  # the workers' CPU counts until the last analysis
    timings = stack.query(
        "SELECT extract(epoch FROM analysis_finished_at - uploaded_at), extract(epoch FROM analysis_finished_at)"
        " FROM emicase_capture WHERE case_id = ANY(%s) AND status = 'done'", (cases,))
    analysed = sum(1 for k in accepted if rows.get(k) and len(rows[k]) == 1 and rows[k][0]["status"] == "done"
                   and rows[k][0]["stored"] == 1)
    failed = sum(1 for k in accepted if rows.get(k) and rows[k][0]["status"] == "failed")
    duplicated = sum(1 for k in accepted if rows.get(k) and (len(rows[k]) > 1 or rows[k][0]["stored"] > 1))
    lost = sum(1 for k in accepted if not rows.get(k) or rows[k][0]["status"] in ("queued", "running"))
    stored_refused = sum(1 for u in refused if u["key"] in rows)
    last_done = max((float(r[1]) for r in timings), default=finished)

    endpoints = {}
    for name in ENDPOINTS:
        ok = [s for e, st, s in rec.rows if e == name and st is not None and st < 400]
        endpoints[name] = {**_percentiles_ms(ok),
                           "errors": sum(1 for e, st, _ in rec.rows if e == name and (st is None or st >= 400))}
    cores = None
    if ticks_before and ticks_after and ticks_after[1] > ticks_before[1]:
        cores = round((ticks_after[0] - ticks_before[0]) / (ticks_after[1] - ticks_before[1]) * (os.cpu_count() or 1), 2)
    return {
        "wall_s": round(wall, 2),
        "requests": len(rec.rows),
        "requests_per_s": round(len(rec.rows) / wall, 1),
        "endpoints": endpoints,
        "uploads": {"sent": len(rec.uploads), "accepted": len(accepted), "refused": len(refused),
                    "refused_statuses": sorted({str(u["status"]) for u in refused}),
                    "analysed": analysed, "failed": failed, "duplicated": duplicated, "lost": lost,
                    "stored_though_refused": stored_refused},
        "analysis": {
            "upload_to_done": {k.replace("ms", "s"): (None if v is None else round(v / 1000, 3))
                               for k, v in _percentiles_ms([float(r[0]) for r in timings]).items()
                               if k != "n"},
            "all_done_after_s": round(last_done - first_upload, 2),
            "analyses_per_s": round(len(timings) / max(last_done - first_upload, 1e-9), 2),
        },
        "load_average_before": load_before,
        "load_average_after": _load(),
        "machine_cores_busy": cores,
        "cores_by_part": _cores(parts_before, parts_after, wall),
        # CPU time per unit of work: the figure other programs on the machine change least.
        "cpu_ms": _cpu_ms(parts_before, parts_after, parts_done, len(rec.rows), len(timings)),
    }


def render(report: dict) -> str:
    s, m = report["setup"], report["measured"]
    up, an = m["uploads"], m["analysis"]
    lines = [
        f"bench_load: {s['clients']} clients × {s['uploads']} uploads over HTTP on loopback",
        f"  gunicorn {s['web_workers']} processes × {s['web_threads']} threads (gthread), "
        f"{s['workers']} Celery worker processes × concurrency {s['concurrency']}, "
        f"DEBUG {'on' if s['debug'] else 'off'}",
        f"  {s['servers']}",
        f"  {report['machine']['cpus']} CPUs; load average (1/5/15 min) before {m['load_average_before']}, "
        f"after {m['load_average_after']}; cores busy while the clients ran: {m['machine_cores_busy']}",
        "",
        f"  {m['requests']} requests in {m['wall_s']:.1f} s: {m['requests_per_s']:.1f} requests/s",
    ]
    if m["cores_by_part"]:
        lines.append("  cores used meanwhile: " + ", ".join(f"{k} {v:.2f}" for k, v in m["cores_by_part"].items())
                     + (" (other programs were busy: every figure is skewed)"
                        if m["cores_by_part"]["others"] > OTHERS_WARN_CORES else ""))
    if m.get("cpu_ms"):
        lines.append(f"  CPU per request, web server: {m['cpu_ms']['web_per_request']:.1f} ms; per analysis, "
                     f"workers: {m['cpu_ms']['workers_per_analysis']:.1f} ms")
    lines += [
        "",
        f"  {'endpoint':<24}{'n':>7}{'p50 ms':>10}{'p95 ms':>10}{'max ms':>10}{'errors':>8}",
    ]
    for name, e in m["endpoints"].items():
        def fmt(v):
            return f"{v:>10.1f}" if v is not None else f"{'-':>10}"
        lines.append(f"  {name:<24}{e['n']:>7}{fmt(e['p50_ms'])}{fmt(e['p95_ms'])}{fmt(e['max_ms'])}{e['errors']:>8}")
    lines += [
        "",
        f"  uploads: {up['sent']} sent, {up['accepted']} accepted, {up['refused']} refused"
        + (f" ({', '.join(up['refused_statuses'])})" if up["refused"] else "")
        + f", {up['analysed']} analysed, {up['failed']} failed, {up['lost']} lost"
        + (f", {up['duplicated']} stored twice" if up["duplicated"] else "")
        + (f", {up['stored_though_refused']} stored though refused" if up["stored_though_refused"] else ""),
        f"  upload to done: p50 {an['upload_to_done']['p50_s']} s, p95 {an['upload_to_done']['p95_s']} s; "
        f"all done {an['all_done_after_s']} s after the first upload ({an['analyses_per_s']} analyses/s)",
        f"  lost uploads: {up['lost']} — {'MET' if up['lost'] == 0 else 'NOT MET'} (must be 0)",
    ]
    return "\n".join(lines)


class Command(BaseCommand):
    help = "Concurrent API clients against gunicorn + PostgreSQL + Redis + Celery workers; latency, throughput, nothing lost."

    def add_arguments(self, parser):
        parser.add_argument("--clients", type=int, help=f"concurrent clients (default {COUNTS['clients']})")
        parser.add_argument("--uploads", type=int, help=f"uploads per client (default {COUNTS['uploads']})")
        parser.add_argument("--quick", action="store_true",
                            help=f"{QUICK_COUNTS['clients']} clients × {QUICK_COUNTS['uploads']} uploads")
        parser.add_argument("--json", action="store_true", help="print the report as JSON")
        parser.add_argument("--web-workers", type=int, default=2, help="gunicorn processes (default 2)")
        parser.add_argument("--web-threads", type=int, default=4, help="threads per gunicorn process (default 4)")
        parser.add_argument("--workers", type=int, default=2, help="Celery worker processes (default 2)")
        parser.add_argument("--concurrency", type=int, default=1, help="pool size of each worker (default 1)")
        parser.add_argument("--timeout", type=float, default=600.0,
                            help="seconds to wait for the analyses after the clients finish (default 600)")
        parser.add_argument("--var-dir", type=Path, default=None,
                            help="where the stack's folders and logs go (default var/bench-load/)")
        parser.add_argument("--use-machine-services", action="store_true",
                            help="use the PostgreSQL and Redis at --postgres-url/--redis-url instead of private ones")
        parser.add_argument("--postgres-url", default=DEFAULT_POSTGRES_URL)
        parser.add_argument("--redis-url", default=DEFAULT_REDIS_URL)
        parser.add_argument("--debug", action="store_true",
                            help="DEBUG on (skips collectstatic; for the smoke test, not for figures)")

    def handle(self, *args, **opts):
        counts = self._counts(opts)
        machine = opts["use_machine_services"]
        if machine:
            for key in ("postgres_url", "redis_url"):
                if (urlparse(opts[key]).hostname or "") not in LOOPBACK:
                    raise CommandError(f"--{key.replace('_', '-')} must be on loopback")
        else:
            reason = _stack.unavailable()
            if reason:
                raise CommandError(f"cannot start a private PostgreSQL and Redis: {reason} "
                                   "(or use --use-machine-services)")
        base = (opts["var_dir"] or Path(settings.BASE_DIR) / "var" / "bench-load").resolve()
        base.mkdir(parents=True, exist_ok=True)
        root = Path(tempfile.mkdtemp(prefix="run-", dir=base))
        stack = Stack(root, celery_workers=opts["workers"], concurrency=opts["concurrency"],
                      web_workers=opts["web_workers"], web_threads=opts["web_threads"], debug=opts["debug"],
                      machine_postgres_url=opts["postgres_url"] if machine else "",
                      machine_redis_url=opts["redis_url"] if machine else "")

        def log(text):
            self.stderr.write(text)

        log(f"starting the stack under {root} ...")
        try:
            stack.start(clients=counts["clients"])
            pg_version = stack.query("SHOW server_version")[0][0]
            servers = (f"this machine's PostgreSQL {pg_version} ({opts['postgres_url']}) and Redis ({opts['redis_url']})"
                       if machine else
                       f"a private PostgreSQL {pg_version} (fsync and full_page_writes off: tuned for tests, "
                       "not production durability) and a private Redis (no persistence)")
            measured = measure(stack, counts, opts["timeout"], log)
        except StackError as exc:
            raise CommandError(f"{exc}\nlogs under {root}") from None
        finally:
            stack.stop()
            # The uploads and collected static files go; the servers' logs stay beside them.
            for folder in ("var", "static"):
                shutil.rmtree(root / folder, ignore_errors=True)
        report = {
            "machine": {"cpus": os.cpu_count()},
            "setup": {**counts, "web_workers": opts["web_workers"], "web_threads": opts["web_threads"],
                      "workers": opts["workers"], "concurrency": opts["concurrency"], "debug": opts["debug"],
                      "servers": servers, "private_servers": not machine, "logs": str(root)},
            "measured": measured,
        }
        self.stdout.write(json.dumps(report, indent=2) if opts["json"] else render(report))
        if measured["uploads"]["lost"]:
            raise CommandError(f"{measured['uploads']['lost']} accepted uploads were lost")

    @staticmethod
    def _counts(opts) -> dict:
        base = QUICK_COUNTS if opts["quick"] else COUNTS
        counts = {k: opts[k] if opts[k] is not None else base[k] for k in COUNTS}
        for k, v in counts.items():
            if not 1 <= v <= MAX_COUNTS[k]:
                raise CommandError(f"--{k} must be between 1 and {MAX_COUNTS[k]}")
        return counts
