"""Storing uploads. The analysis itself runs later, in a worker (tasks.py)."""

from __future__ import annotations

import logging

from django.conf import settings
from django.core.exceptions import ValidationError
from django.core.files.uploadedfile import UploadedFile
from django.db import transaction

from emicase.models import Capture, Case, CaseEvent, Domain, Revision, Scan
from emicase.services.access import require_role
from emicase.services.cases import event_add

log = logging.getLogger("emicase.uploads")

# A peek at the first bytes is enough to refuse what is plainly not a text
# trace (an image, a zip, a spreadsheet); the engine judges everything else.
BINARY_SIGNATURES = (b"PK\x03\x04", b"\x89PNG", b"\xff\xd8\xff", b"%PDF", b"\xd0\xcf\x11\xe0", b"\x1f\x8b", b"GIF8")


def check_trace_file(file: UploadedFile, *, domain: str) -> None:
    """Refuse at once what can never be a trace. Raises ValidationError({'file': ...})."""
    limit = (
        settings.EMICASE_MAX_TIME_RECORD_BYTES
        if domain in (Domain.TIME, Domain.AUTO)
        else settings.EMICASE_MAX_SPECTRUM_BYTES
    )
    if file.size == 0:
        raise ValidationError({"file": f"{file.name} is empty."})
    if file.size > limit:
        raise ValidationError(
            {"file": f"{file.name} is {file.size / 2**20:.0f} MB; the limit is {limit / 2**20:.0f} MB."}
        )
    head = file.read(4096)
    file.seek(0)
    if head.startswith((b"\xff\xfe", b"\xfe\xff")):
        raise ValidationError({"file": f"{file.name} is UTF-16 text; export or save it as UTF-8 (or Latin-1)."})
    if head.startswith(BINARY_SIGNATURES) or b"\x00" in head:
        raise ValidationError({"file": f"{file.name} is not a text trace (it looks like a binary file)."})


def send_analysis(task, pk: int) -> bool:
    """Send ``task(pk)`` to the broker. False (and a warning) if the broker could not take it.

    The stored row is the promise, not the message: a row whose message never left stays
    'queued' and ``sweep_stuck`` sends it again, so an accepted upload is never lost, nor its
    request failed, because Redis was restarting.
    """
    try:
        task.delay(pk)
    except Exception as exc:  # any broker or network error: the row is stored, it just waits
        log.warning("%s %s stored but not queued (%s: %s); the sweeper will queue it",
                    task.name.rsplit(".", 1)[-1], pk, type(exc).__name__, exc)
        return False
    return True


def _enqueue(task_name: str, pk: int) -> None:
    """Queue the analysis once the row is committed; never fail the upload if the broker is away."""
    from emicase import tasks

    task = getattr(tasks, task_name)
    transaction.on_commit(lambda: send_analysis(task, pk))


@transaction.atomic
def scan_upload(
    *,
    revision: Revision,
    file: UploadedFile,
    by,
    case: Case | None = None,
    opens_case_titled: str = "",
    **fields,
) -> Scan:
    """Store a scan of ``revision`` and queue its analysis.

    With ``opens_case_titled`` and no ``case``, the scan is a first failing
    result: the analysis opens a case with its failing frequencies.
    """
    require_role(by, revision.product.team_id)
    if case is not None and case.product_id != revision.product_id:
        raise ValidationError({"revision": "The scan's revision must belong to the case's product."})
    check_trace_file(file, domain=Domain.SPECTRUM)
    scan = Scan(
        revision=revision,
        case=case,
        file=file,
        original_name=file.name[:255],
        file_size=file.size,
        declared_domain=Domain.SPECTRUM,
        uploaded_by=by,
        opens_case_titled=opens_case_titled.strip() if case is None else "",
        **fields,
    )
    scan.full_clean(exclude=["file"])
    scan.save()
    if case is not None:
        event_add(case=case, kind=CaseEvent.Kind.SCAN, by=by, text=scan.original_name, data={"scan": scan.pk})
    _enqueue("analyse_scan", scan.pk)
    return scan


@transaction.atomic
def capture_upload(*, case: Case, file: UploadedFile, by, revision: Revision | None = None, **fields) -> Capture:
    """Store a probe capture on ``case`` and queue its analysis."""
    require_role(by, case.product.team_id)
    if revision is None:
        revision = case.product.revisions.order_by("-created_at", "-id").first()
    if revision is None or revision.product_id != case.product_id:
        raise ValidationError({"revision": "Choose a revision of the case's product."})
    declared = fields.pop("declared_domain", Domain.AUTO)
    check_trace_file(file, domain=declared)
    capture = Capture(
        case=case,
        revision=revision,
        file=file,
        original_name=file.name[:255],
        file_size=file.size,
        declared_domain=declared,
        uploaded_by=by,
        **fields,
    )
    capture.full_clean(exclude=["file"])
    capture.save()
    event_add(
        case=case, kind=CaseEvent.Kind.CAPTURE, by=by, text=f"{capture} ({capture.original_name})",
        data={"capture": capture.pk},
    )
    _enqueue("analyse_capture", capture.pk)
    return capture
