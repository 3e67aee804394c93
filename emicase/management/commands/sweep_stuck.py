from django.core.management import BaseCommand

from emicase.services.sweeper import sweep_stuck


class Command(BaseCommand):
    help = "Re-queue uploads stuck in 'queued' or 'running' after a crash (safe to run any time; cron it in production)."

    def handle(self, *args, **opts):
        counts = sweep_stuck()
        if opts["verbosity"]:
            self.stdout.write(", ".join(f"{n} {kind}s re-queued" for kind, n in counts.items()))
