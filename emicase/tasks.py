"""Celery tasks: a thin interface to the services.

Each task takes a row id, calls one service, and retries only what retrying
can fix (the database or broker briefly away), never a bad file: the service
records that on the row.
"""

from __future__ import annotations

import logging

from celery import shared_task

from emicase.services import analysis as analysis_service

log = logging.getLogger("emicase.tasks")

ANALYSIS_OPTIONS = dict(
    bind=True,
    acks_late=True,
    reject_on_worker_lost=True,
    autoretry_for=analysis_service.TRANSIENT,
    max_retries=5,
    retry_backoff=2,
    retry_backoff_max=60,
    retry_jitter=True,
    ignore_result=True,
)


@shared_task(name="emicase.ping")
def ping(token: str = "pong") -> str:
    """Answer at once: proves a worker is alive and reads this broker."""
    return token


@shared_task(name="emicase.analyse_scan", **ANALYSIS_OPTIONS)
def analyse_scan(self, scan_id: int) -> str:
    return _guarded(analysis_service.analyse_scan, scan_id, self.request.id or "")


@shared_task(name="emicase.analyse_capture", **ANALYSIS_OPTIONS)
def analyse_capture(self, capture_id: int) -> str:
    return _guarded(analysis_service.analyse_capture, capture_id, self.request.id or "")


@shared_task(name="emicase.reread_case", **ANALYSIS_OPTIONS)
def reread_case(self, case_id: int) -> int:
    try:
        return analysis_service.case_reread(case_id)
    except analysis_service.Case.DoesNotExist:
        log.info("case %s vanished before its re-read", case_id)
        return 0


def _guarded(run, pk: int, token: str) -> str:
    try:
        return run(pk, token)
    except analysis_service.Scan.DoesNotExist:
        log.info("row %s vanished before its analysis", pk)
        return "vanished"
    except analysis_service.Capture.DoesNotExist:
        log.info("row %s vanished before its analysis", pk)
        return "vanished"
