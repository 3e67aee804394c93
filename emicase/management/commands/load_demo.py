from django.core.management import BaseCommand

from emicase.demo import DEMO_PASSWORD, DEMO_USERNAME, demo_exists, load_demo


class Command(BaseCommand):
    help = "Load the invented demo team, products and cases (once; does nothing if they exist)."

    def add_arguments(self, parser):
        parser.add_argument(
            "--queue-only", action="store_true",
            help="leave the analysis to the worker instead of running it here (the demo cases then stay unverified)",
        )

    def handle(self, *args, **opts):
        if demo_exists():
            if opts["verbosity"]:
                self.stdout.write("Demo data already loaded.")
            return
        made = load_demo(analyse_now=not opts["queue_only"])
        if opts["verbosity"]:
            self.stdout.write(
                f"Demo data loaded: {made['scans']} scans, {made['captures']} captures. "
                f"Sign in as '{DEMO_USERNAME}' / '{DEMO_PASSWORD}'."
            )
