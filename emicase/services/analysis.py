"""Running the engine on a stored upload and keeping what it found.

Called by the Celery tasks with a row's id. The row's ``status`` is the
truth: a worker claims the row with a conditional UPDATE (only one worker can
move it out of ``queued``), works outside any transaction, then stores all the
results in one transaction. Running the same id twice leaves the same rows.
"""

from __future__ import annotations

import logging
import time
import uuid
from collections.abc import Callable
from datetime import timedelta

import numpy as np
from celery.exceptions import SoftTimeLimitExceeded
from django.conf import settings
from django.db import InterfaceError, OperationalError, transaction
from django.db.models import F, Q
from django.utils import timezone

import analysis
from analysis import Peak, Source, TraceError
from analysis.attribution import attribute
from analysis.peaks import readings_at
from analysis.pipeline import analyse_file
from emicase.models import (
    AnalysedUpload,
    AnalysisStatus,
    Capture,
    CaptureReading,
    Case,
    CaseEvent,
    ErrorKind,
    FailingFrequency,
    Scan,
    Verification,
    VerificationResult,
)
from emicase.services.cases import event_add
from emicase.services.search import signature_index_capture, signature_index_scan

log = logging.getLogger("emicase.analysis")

# Failures that retrying can fix: the database or the network briefly away.
TRANSIENT = (OperationalError, InterfaceError, ConnectionError)

# A row 'running' without a sign of life for this long belongs to a dead worker.
STALE_AFTER = timedelta(seconds=getattr(settings, "EMICASE_STALE_RUNNING_SECONDS", 25 * 60))
# A file that kills its worker (out of memory, say) must not loop for ever.
MAX_ATTEMPTS = getattr(settings, "EMICASE_MAX_ATTEMPTS", 3)


def claim(model: type[AnalysedUpload], pk: int, token: str = "") -> bool:
    """Move the row to 'running' if it waits for this caller. True if this caller won.

    Waiting means: queued; or running but silent for STALE_AFTER (its worker
    died); or running under this very ``token`` (a retry of the same task).
    """
    now = timezone.now()
    waiting = Q(status=AnalysisStatus.QUEUED) | Q(
        status=AnalysisStatus.RUNNING, status_changed_at__lt=now - STALE_AFTER
    )
    if token:
        waiting |= Q(status=AnalysisStatus.RUNNING, claim_token=token)
    won = model.objects.filter(waiting, pk=pk).update(
        status=AnalysisStatus.RUNNING,
        status_changed_at=now,
        analysis_started_at=now,
        attempts=F("attempts") + 1,
        progress=0.0,
        claim_token=token,
    )
    return won == 1


def _progress_reporter(model: type[AnalysedUpload], pk: int) -> Callable[[float], None]:
    last = {"at": time.monotonic(), "fraction": 0.0}

    def report(fraction: float) -> None:
        # Each write is a commit of its own: write at most twice a second, which
        # is plenty for a progress bar, keeps short files from paying for it at
        # all, and keeps a long analysis looking alive to the sweeper.
        now = time.monotonic()
        if now - last["at"] >= 0.5 and fraction > last["fraction"]:
            last.update(at=now, fraction=fraction)
            model.objects.filter(pk=pk, status=AnalysisStatus.RUNNING).update(
                progress=min(fraction, 1.0), status_changed_at=timezone.now()
            )

    return report


def _fail(model: type[AnalysedUpload], pk: int, *, kind: str, text: str, error_id: str = "") -> None:
    now = timezone.now()
    model.objects.filter(pk=pk).update(
        status=AnalysisStatus.FAILED,
        status_changed_at=now,
        analysis_finished_at=now,
        error_kind=kind,
        error_text=text,
        error_id=error_id,
        engine_version=analysis.__version__,
    )


def _envelope_json(result) -> dict:
    x, y = result.envelope
    return {
        "frequency_hz": np.round(np.asarray(x, dtype=float), 3).tolist(),
        "level": np.round(np.asarray(y, dtype=float), 2).tolist(),
    }


def _run(model: type[AnalysedUpload], pk: int, build_kwargs, store, token: str) -> str:
    """Claim, analyse, store. Returns what happened, for logs and tests.

    Database errors propagate so the task can retry them; every other failure
    ends on the row as 'failed' with words for the user.
    """
    if not claim(model, pk, token):
        return "not-claimed"
    item = model.objects.select_related(*_related(model)).get(pk=pk)
    if item.attempts > MAX_ATTEMPTS:
        _fail(
            model, pk, kind=ErrorKind.INTERNAL,
            text=f"Gave up after {MAX_ATTEMPTS} attempts: the analysis never finished.",
            error_id=uuid.uuid4().hex[:12],
        )
        return "gave-up"
    try:
        with item.file.open("rb") as fh:
            result = analyse_file(
                fh, name=item.original_name, progress=_progress_reporter(model, pk), **build_kwargs(item)
            )
    except TraceError as exc:
        _fail(model, pk, kind=ErrorKind.INPUT, text=str(exc))
        return "failed"
    except TRANSIENT:
        raise
    except SoftTimeLimitExceeded:
        error_id = uuid.uuid4().hex[:12]
        log.error("analysis of %s %s hit the time limit (error id %s)", model.__name__, pk, error_id)
        _fail(model, pk, kind=ErrorKind.INTERNAL, error_id=error_id,
              text=f"The analysis took longer than {settings.CELERY_TASK_SOFT_TIME_LIMIT} s and was stopped.")
        return "failed"
    except FileNotFoundError:
        _fail(model, pk, kind=ErrorKind.INTERNAL, text="The uploaded file is missing from storage.",
              error_id=uuid.uuid4().hex[:12])
        log.error("file missing for %s %s", model.__name__, pk)
        return "failed"
    except Exception:
        error_id = uuid.uuid4().hex[:12]
        log.exception("analysis of %s %s crashed (error id %s)", model.__name__, pk, error_id)
        _fail(model, pk, kind=ErrorKind.INTERNAL, text="Internal error while analysing this file.", error_id=error_id)
        return "failed"
    with transaction.atomic():
        locked = model.objects.select_for_update().get(pk=pk)
        if locked.status != AnalysisStatus.RUNNING:
            # Someone else finished it meanwhile (a redelivery); theirs stands.
            return "superseded"
        now = timezone.now()
        locked.status = AnalysisStatus.DONE
        locked.status_changed_at = now
        locked.analysis_finished_at = now
        locked.progress = 1.0
        locked.error_kind = ErrorKind.NONE
        locked.error_text = ""
        locked.error_id = ""
        locked.engine_version = analysis.__version__
        locked.domain = result.domain
        locked.unit = result.spectrum.unit
        locked.results = result.to_json()
        locked.envelope = _envelope_json(result)
        locked.save()
        store(locked, result)
    return "done"


def _related(model) -> tuple[str, ...]:
    if model is Scan:
        return ("revision__product__team", "case")
    return ("revision", "case__product__team")


def _sources_of(revision) -> list[Source]:
    return [
        Source(name=s.name, frequency_hz=s.nominal_frequency_hz, tolerance_hz=s.tolerance_hz)
        for s in revision.sources.all()
    ]


# ----------------------------------------------------------------- scans


def _scan_kwargs(scan: Scan) -> dict:
    return {
        "domain": "spectrum",
        "frequency_unit": scan.frequency_unit or None,
        "level_unit": scan.level_unit or None,
        "limit": scan.limit_id,
        "distance_m": scan.distance_m,
        "sources": _sources_of(scan.revision),
        "guard_db": scan.revision.product.team.guard_band_db,
    }


def _store_scan(scan: Scan, result) -> None:
    """Propose failing frequencies; a first failing result opens its case."""
    case = scan.case
    if case is None and scan.opens_case_titled and result.exceedances:
        from emicase.services.cases import case_open_by_system

        case = case_open_by_system(product=scan.revision.product, title=scan.opens_case_titled, by=scan.uploaded_by)
        Scan.objects.filter(pk=scan.pk).update(case=case)
        scan.case = case
        event_add(case=case, kind=CaseEvent.Kind.SCAN, by=scan.uploaded_by, text=scan.original_name,
                  data={"scan": scan.pk})
    signature_index_scan(scan=scan, signature=result.signature)
    if case is None:
        return
    verification = Verification.objects.filter(after_scan=scan).first()
    if verification is not None:
        # An after-scan: read it at the case's failing frequencies instead of
        # proposing new ones.
        verification_results_store(verification, result.spectrum.frequency_hz, result.spectrum.level)
        return
    if case.stage == Case.Stage.CLOSED:
        return
    # Re-analysis replaces this scan's proposals; what an engineer confirmed stays.
    FailingFrequency.objects.filter(case=case, scan=scan, confirmed=False).delete()
    confirmed = list(
        FailingFrequency.objects.filter(case=case, confirmed=True).values_list("frequency_hz", flat=True)
    )
    tol = case.product.team.frequency_tolerance_pct / 100.0
    new = []
    for ex in result.exceedances:
        if any(abs(ex.frequency_hz - f) <= tol * f for f in confirmed):
            continue
        new.append(
            FailingFrequency(
                case=case, scan=scan, frequency_hz=ex.frequency_hz, level=ex.level, limit_level=ex.limit,
                unit=result.spectrum.unit, detector=scan.detector, polarisation=scan.polarisation,
                mains_line=scan.mains_line,
            )
        )
    FailingFrequency.objects.bulk_create(new)
    event_add(
        case=case, kind=CaseEvent.Kind.ANALYSED, by=None,
        text=f"{scan.original_name}: {len(result.peaks)} peaks, {len(result.exceedances)} below the guard band",
        data={"scan": scan.pk, "proposed": len(new)},
    )


def analyse_scan(scan_id: int, token: str = "") -> str:
    return _run(Scan, scan_id, _scan_kwargs, _store_scan, token)


# ----------------------------------------------------------------- captures


def _capture_kwargs(capture: Capture) -> dict:
    declared = capture.declared_domain
    return {
        "domain": None if declared == "auto" else declared,
        "sources": _sources_of(capture.revision),
    }


def capture_readings_store(capture: Capture, frequency_hz, level, failing) -> None:
    """Rewrite the capture's readings at the case's failing frequencies. Call inside a transaction."""
    CaptureReading.objects.filter(capture=capture).delete()
    if not failing:
        return
    team = capture.case.product.team
    targets = np.array([ff.frequency_hz for ff in failing])
    levels = readings_at(
        _spectrum_like(frequency_hz, level), targets, targets * team.frequency_tolerance_pct / 100.0
    )
    CaptureReading.objects.bulk_create(
        CaptureReading(capture=capture, failing_frequency=ff, frequency_hz=ff.frequency_hz,
                       level=None if np.isnan(v) else float(v))
        for ff, v in zip(failing, levels, strict=True)
    )


def verification_results_store(verification: Verification, frequency_hz, level) -> None:
    """Rewrite a verification's level-after at each failing frequency of its case. Call inside a transaction."""
    case = verification.countermeasure.case
    failing = list(case.failing_frequencies.all())
    VerificationResult.objects.filter(verification=verification).delete()
    if not failing:
        return
    targets = np.array([ff.frequency_hz for ff in failing])
    tol = targets * case.product.team.frequency_tolerance_pct / 100.0
    levels = readings_at(_spectrum_like(frequency_hz, level), targets, tol)
    VerificationResult.objects.bulk_create(
        VerificationResult(verification=verification, failing_frequency=ff,
                           level_after=None if np.isnan(v) else float(v))
        for ff, v in zip(failing, levels, strict=True)
    )


def _spectrum_like(frequency_hz, level):
    from analysis.types import Spectrum

    return Spectrum(frequency_hz=np.asarray(frequency_hz, float), level=np.asarray(level, float), unit="dBuV")


def _store_capture(capture: Capture, result) -> None:
    signature_index_capture(capture=capture, signature=result.signature)
    failing = list(capture.case.failing_frequencies.filter(is_open=True))
    capture_readings_store(capture, result.spectrum.frequency_hz, result.spectrum.level, failing)
    event_add(
        case=capture.case, kind=CaseEvent.Kind.ANALYSED, by=None,
        text=f"{capture.original_name}: {len(result.peaks)} peaks", data={"capture": capture.pk},
    )


def analyse_capture(capture_id: int, token: str = "") -> str:
    return _run(Capture, capture_id, _capture_kwargs, _store_capture, token)


def _attributions_json(peaks_json: list[dict], sources: list[Source]) -> list[dict]:
    """Attribute stored peaks to the revision's current sources (no need to re-read the file)."""
    if not peaks_json or not sources:
        return []
    peaks = [Peak(p["frequency_hz"], p["level"], p["prominence_db"], p.get("width_hz", 0.0)) for p in peaks_json]
    # The resolution each peak was found with: a coarse receiver trace places a
    # harmonic tens of kHz off, more than a crystal's tolerance times the order.
    resolution = [p.get("resolution_hz", 0.0) for p in peaks_json]
    found = attribute(peaks, sources, resolution_hz=resolution)
    return [
        {"frequency_hz": a.frequency_hz, "terms": [{"source": t.source, "order": t.order} for t in a.terms],
         "error_hz": a.error_hz}
        for a in found
    ]


def case_reread(case_id: int) -> int:
    """Re-read every analysed upload of a case after its inputs changed. Returns how many were re-read.

    Captures are read again at the case's current open failing frequencies
    and the team's tolerance; captures and scans are attributed again to
    their revision's current known sources. Both come from stored results:
    the envelope keeps every bucket's maximum, so the highest level within
    tolerance survives (to within one bucket's width at the window's edges),
    and the peaks are stored as found.
    """
    case = Case.objects.select_related("product__team").get(pk=case_id)
    failing = list(case.failing_frequencies.filter(is_open=True))
    sources_by_revision: dict[int, list[Source]] = {}

    def sources(revision) -> list[Source]:
        if revision.pk not in sources_by_revision:
            sources_by_revision[revision.pk] = _sources_of(revision)
        return sources_by_revision[revision.pk]

    n = 0
    with transaction.atomic():
        captures = (
            Capture.objects.select_for_update(of=("self",))
            .filter(case=case, status=AnalysisStatus.DONE)
            .select_related("case__product__team", "revision")
        )
        for capture in captures:
            env = capture.envelope or {}
            if env.get("frequency_hz"):
                capture_readings_store(capture, env["frequency_hz"], env["level"], failing)
            capture.results["attributions"] = _attributions_json(capture.results.get("peaks", []),
                                                                 sources(capture.revision))
            capture.save(update_fields=["results"])
            n += 1
        for scan in Scan.objects.select_for_update(of=("self",)).filter(case=case, status=AnalysisStatus.DONE).select_related("revision"):
            scan.results["attributions"] = _attributions_json(scan.results.get("peaks", []), sources(scan.revision))
            scan.save(update_fields=["results"])
            n += 1
    return n


def reread_enqueue(case_ids) -> None:
    """Queue one re-read per affected case, after the caller's transaction commits."""
    from emicase.tasks import reread_case

    for case_id in sorted(set(case_ids)):
        transaction.on_commit(lambda case_id=case_id: reread_case.delay(case_id))
