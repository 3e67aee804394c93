from datetime import timedelta

from django.core.management import BaseCommand

from emicase.services.sweeper import KEPT_FOR, QUEUED_TIMEOUT, sweep_kept_uploads, sweep_stuck


class Command(BaseCommand):
    help = (
        "Re-queue uploads stuck in 'queued' or 'running' after a crash, and delete form uploads "
        f"kept for a retry more than {KEPT_FOR.days} day ago (safe to run any time; cron it in production)."
    )

    def add_arguments(self, parser):
        parser.add_argument(
            "--queued-after", type=float, default=QUEUED_TIMEOUT.total_seconds(),
            help=f"seconds a row may wait in 'queued' before it is sent again (default {QUEUED_TIMEOUT.total_seconds():g})",
        )
        parser.add_argument(
            "--running-after", type=float, default=None,
            help="seconds a row may stay silent in 'running' (default: the analysis's stale limit); "
            "0 only when no worker is alive, or a live worker's row is analysed twice",
        )

    def handle(self, *args, **opts):
        running = opts["running_after"]
        counts = sweep_stuck(
            queued_after=timedelta(seconds=opts["queued_after"]),
            running_after=None if running is None else timedelta(seconds=running),
        )
        kept = sweep_kept_uploads()
        if opts["verbosity"]:
            requeued = ", ".join(f"{n} {kind}s re-queued" for kind, n in counts.items())
            self.stdout.write(f"{requeued}; {kept} kept form uploads deleted")
