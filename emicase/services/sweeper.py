"""Re-queue uploads that a crash left behind; delete form uploads nobody came back for.

The serverless broker takes a message off its queue when a worker fetches it,
not when the task finishes, and even Redis can lose a message in a restart;
so the database row is the truth and this sweep puts rows stuck in 'queued'
or 'running' back on the queue. It is safe to run any time: the task claims
its row, so a duplicate message does nothing.

A page form that fails for a reason other than its file keeps the file under
``kept/`` for the next try (``forms.KeepsUpload``). A session holds at most a
handful, but an abandoned session's files would stay forever, so files there
older than ``KEPT_FOR`` are deleted; a later try on such a form asks for the
file again.
"""

from __future__ import annotations

from datetime import timedelta

from django.core.files.storage import default_storage
from django.db import transaction
from django.db.models import Q
from django.utils import timezone

from emicase.models import AnalysisStatus, Capture, Scan

QUEUED_TIMEOUT = timedelta(minutes=5)
KEPT_FOR = timedelta(days=1)
KEPT_DIRECTORY = "kept"


def sweep_stuck(*, queued_after: timedelta = QUEUED_TIMEOUT, running_after: timedelta | None = None) -> dict[str, int]:
    """Re-enqueue rows waiting in 'queued' longer than ``queued_after`` or silent in 'running'.

    Returns how many rows of each kind were re-enqueued.
    """
    from emicase import tasks
    from emicase.services.analysis import STALE_AFTER
    from emicase.services.uploads import send_analysis

    if running_after is None:
        running_after = STALE_AFTER
    now = timezone.now()
    stuck = Q(status=AnalysisStatus.QUEUED, status_changed_at__lt=now - queued_after) | Q(
        status=AnalysisStatus.RUNNING, status_changed_at__lt=now - running_after
    )
    counts = {}
    for model, task in ((Scan, tasks.analyse_scan), (Capture, tasks.analyse_capture)):
        ids = list(model.objects.filter(stuck).values_list("pk", flat=True)[:1000])
        if ids:
            # Restart the clock so the next sweep waits again before re-sending.
            model.objects.filter(pk__in=ids, status=AnalysisStatus.QUEUED).update(status_changed_at=now)
            model.objects.filter(pk__in=ids, status=AnalysisStatus.RUNNING).update(
                status=AnalysisStatus.QUEUED, status_changed_at=now, claim_token=""
            )
            for pk in ids:
                # A broker still away leaves the row queued for the next sweep, and the
                # other rows are still sent.
                transaction.on_commit(lambda pk=pk, task=task: send_analysis(task, pk))
        counts[model.__name__.lower()] = len(ids)
    return counts


def sweep_kept_uploads(*, older_than: timedelta = KEPT_FOR) -> int:
    """Delete kept form uploads last written more than ``older_than`` ago. Returns how many."""
    try:
        _, names = default_storage.listdir(KEPT_DIRECTORY)
    except FileNotFoundError:  # no form has kept a file yet
        return 0
    cutoff = timezone.now() - older_than
    deleted = 0
    for name in names:
        path = f"{KEPT_DIRECTORY}/{name}"
        try:
            if default_storage.get_modified_time(path) < cutoff:
                default_storage.delete(path)
                deleted += 1
        except FileNotFoundError:  # another sweep or the form's own cleanup got there first
            continue
    return deleted


# Used by the admin and pages to show a queue position.
def queue_position(model, item) -> int | None:
    if item.status != AnalysisStatus.QUEUED:
        return None
    return model.objects.filter(status=AnalysisStatus.QUEUED, uploaded_at__lt=item.uploaded_at).count() + 1



