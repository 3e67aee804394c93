"""Faults on a real stack: a worker killed, Redis restarted, PostgreSQL restarted, each during a burst.

The stack is private (``emicase/management/commands/_stack.py``): a PostgreSQL cluster and a
Redis of the test's own on free loopback ports, gunicorn serving the app and a real ``celery
worker`` process; the developers' servers on 5432/6379 are never touched. Clients post
captures over HTTP with an Idempotency-Key, as the bench uploader does, and post again
after a refusal (a 5xx or a failed connection), a bounded number of times.

Afterwards, for every test:

- every upload a client saw accepted (200/201) is stored exactly once under its key, reached
  ``done``, and was stored once (one 'analysed' event, one reading per failing frequency);
- nothing is stored that no client sent;
- every refusal was one a client can act on: a 503 that says to try again, or a failed
  connection — never a 500 or a 4xx;
- no row is left queued or running (the sweeper and the broker's redelivery finish them).

The single-row version of the killed worker, on whichever broker the suite runs, is
``test_worker_reliability.py``; here the kill hits a burst on the production stack.
Runs on CI's PostgreSQL + Redis pass (skipped on the SQLite one).
"""

from __future__ import annotations

import signal
import time
from collections import defaultdict

import pytest
from django.conf import settings

from emicase.management.commands import _stack
from emicase.management.commands._stack import Burst, Stack
from tests.conftest import skip_or_fail
from tests.web.traces import long_time_record_csv, receiver_csv

pytestmark = [pytest.mark.worker, pytest.mark.slow]


def test_private_ports_lie_below_the_range_given_to_outgoing_connections():
    # Linux hands outgoing connections their local port from ip_local_port_range
    # (kernel documentation, ip-sysctl); a port below it cannot be taken that way
    # while Redis or PostgreSQL is down for a restart.
    low = _stack._ephemeral_low()
    ports = {_stack.free_port() for _ in range(20)}
    assert all(1024 < port < low for port in ports), (low, sorted(ports))
    assert len(ports) > 1  # chosen at random, not one fixed port

FILES_PER_CLIENT = 10
SETTLE_S = 90.0


@pytest.fixture(scope="module")
def stack(tmp_path_factory):
    if settings.DATABASES["default"]["ENGINE"] != "django.db.backends.postgresql" or not (
        settings.CELERY_BROKER_URL.startswith("redis://")
    ):
        skip_or_fail("fault tests run on the PostgreSQL + Redis pass (set DATABASE_URL and CELERY_BROKER_URL)")
    reason = _stack.unavailable()
    if reason:
        skip_or_fail(f"needs a private PostgreSQL and Redis: {reason}")
    # DEBUG on spares the minute-long collectstatic of production settings; the errors the
    # clients see are answered the same way either way.
    st = Stack(tmp_path_factory.mktemp("faults"), celery_workers=1, concurrency=2, web_workers=2,
               web_threads=4, debug=True)
    st.start(clients=9)
    yield st
    st.stop()


def _captures(client: int, n: int = FILES_PER_CLIENT) -> list[tuple[str, bytes]]:
    # Small near-field spectra (1,001 points, dBµV) with harmonics of the 25 MHz PHY clock;
    # every file differs (its noise seed), so each has its own Idempotency-Key and row.
    return [
        (f"nf-{client}-{i}.csv",
         receiver_csv([(75e6, 48.0), (25e6 * (2 + i % 5), 40.0)], unit="dBµV", points=1001,
                      seed=1000 * client + i))
        for i in range(n)
    ]


def _settle(stack: Stack, cases: list[int], keys: set[str]) -> dict:
    """Sweep (as cron would, with a short wait) until every key's row is done; the rows by key."""
    deadline = time.monotonic() + SETTLE_S
    while True:
        rows = stack.captures(cases)
        if keys <= set(rows) and all(r["status"] == "done" for key in keys for r in rows[key]):
            return rows
        if time.monotonic() > deadline:
            stuck = {k: [r["status"] for r in rows.get(k, [])] for k in keys
                     if [r["status"] for r in rows.get(k, [])] != ["done"]}
            pytest.fail(f"not done after {SETTLE_S:.0f} s: {stuck}\n{stack.log_text()}")
        stack.sweep(queued_after=3)
        time.sleep(1.0)


def _verdict(stack: Stack, burst: Burst, clients: list[dict]) -> dict:
    """Check the promises in the module's docstring; returns the attempts by key for further checks."""
    assert not burst.errors, burst.errors
    attempts = burst.snapshot()
    by_key = defaultdict(list)
    for a in attempts:
        by_key[a.key].append(a)
    for a in attempts:
        if a.accepted:
            continue
        assert a.status is None or a.status in (502, 503, 504), f"refused with {a.status}: {a.error}"
        if a.status == 503:
            assert "try again" in a.error.lower(), a.error
    accepted = {key: next(a.capture_id for a in tries if a.accepted) for key, tries in by_key.items()
                if any(a.accepted for a in tries)}
    # With retries every upload is accepted in the end: none is given up on.
    assert set(accepted) == set(by_key), f"never accepted: {sorted(set(by_key) - set(accepted))}"
    cases = [c["case"] for c in clients]
    rows = _settle(stack, cases, set(accepted))
    assert set(rows) == set(accepted), f"stored but never accepted: {sorted(set(rows) - set(accepted))}"
    for key, pk in accepted.items():
        assert len(rows[key]) == 1, f"{key} stored {len(rows[key])} times"
        row = rows[key][0]
        assert row["id"] == pk
        assert (row["status"], row["stored"], row["readings"]) == ("done", 1, 1), (key, row)
    return by_key


def test_a_worker_killed_mid_task_during_a_burst_loses_nothing(stack):
    clients = stack.seeded[0:3]
    # The first file is a 2-million-sample record (long enough to be killed in the middle).
    long_fields = {"declared_domain": "time"}
    record = ("record.csv", long_time_record_csv(2_000_000), long_fields)

    def files(i):
        return ([record] if i == 0 else []) + _captures(i)

    burst = Burst(stack.base_url, clients, files, retries=30, retry_pause=0.3).start()
    record_key = f"c{clients[0]['case']}-u{clients[0]['username']}-0"

    def record_running() -> bool:
        return bool(stack.query("SELECT 1 FROM emicase_capture WHERE idempotency_key = %s AND status = 'running'",
                                (record_key,)))

    _stack._wait(record_running, 60, "the long record's analysis to start", interval=0.01)
    stack.kill_workers()
    orphans = {key for (key,) in stack.query("SELECT idempotency_key FROM emicase_capture WHERE status = 'running'")}
    assert record_key in orphans  # killed in the middle: left running, not lost
    # No worker is alive now, so every 'running' row is an orphan and may be re-queued at once.
    stack.sweep(queued_after=0, running_after=0)
    stack.start_worker()
    stack.wait_workers()
    burst.join(120)
    by_key = _verdict(stack, burst, clients)
    rows = stack.captures([c["case"] for c in clients])
    # The engine ran once per row, twice for a row the kill interrupted (its first try and
    # the one that finished): the claim keeps every redelivered or swept message from a rerun.
    assert {key: rows[key][0]["attempts"] for key in by_key} == {
        key: 2 if key in orphans else 1 for key in by_key
    }
    assert all(len(tries) == 1 for tries in by_key.values())  # the web side never refused meanwhile


def test_redis_restarted_during_a_burst_loses_nothing(stack):
    clients = stack.seeded[3:6]
    burst = Burst(stack.base_url, clients, _captures, retries=30, retry_pause=0.3).start()
    burst.wait_for(lambda a: sum(x.accepted for x in a) >= 4, 60, "the first uploads")
    down_at = time.monotonic()
    stack.redis.shutdown_nosave()  # every queued message is gone with it
    burst.wait_for(lambda a: sum(x.started > down_at for x in a) >= 3, 30, "uploads while Redis is down")
    during = [a for a in burst.snapshot() if a.started > down_at]
    stack.redis.start()
    burst.join(120)
    by_key = _verdict(stack, burst, clients)
    # Accepted while the broker was down: stored, queued by the sweeper later, analysed once.
    assert any(a.accepted for a in during), [(a.status, a.error) for a in during]
    rows = stack.captures([c["case"] for c in clients])
    # The engine ran once per row although the sweeper sent some rows twice.
    assert {rows[key][0]["attempts"] for key in by_key} == {1}


def test_postgres_restarted_during_a_burst_loses_nothing(stack):
    clients = stack.seeded[6:9]
    burst = Burst(stack.base_url, clients, _captures, retries=40, retry_pause=0.3).start()
    burst.wait_for(lambda a: sum(x.accepted for x in a) >= 4, 60, "the first uploads")
    down_at = time.monotonic()
    stack.postgres.stop(mode="immediate")  # as a crash: no checkpoint, recovery at the next start
    burst.wait_for(lambda a: any(x.started > down_at and not x.accepted for x in a), 30,
                   "an upload refused while PostgreSQL is down")
    stack.postgres.start()
    burst.join(120)
    by_key = _verdict(stack, burst, clients)
    refused = [a for tries in by_key.values() for a in tries if not a.accepted]
    assert any(a.status == 503 for a in refused), [(a.status, a.error) for a in refused]


def test_a_worker_that_exits_by_itself_is_replaced(stack):
    # As a service manager restarts a worker in production (README, "Production"): Celery 5.7
    # workers can exit on an "Unrecoverable error" when Redis goes away under them.
    live = [w for w in stack.workers if w.alive()]
    assert live
    restarted = stack.restarted
    live[0].signal_group(signal.SIGKILL)  # not through kill_workers: the stack did not mean it
    _stack._wait(lambda: stack.restarted == restarted + 1, 30, "the supervisor to start a worker")
    stack.wait_workers()  # as many live workers as before answer a ping through the broker
    assert sum(w.alive() for w in stack.workers) == len(live)
    assert f"{live[0].name} exited" in (stack.root / "supervisor.log").read_text()
