"""Rebuild the signature search index from the stored analysis results.

    python manage.py reindex_signatures             # every case
    python manage.py reindex_signatures --case 12   # one case

The index is derived data: scans and captures keep their signature in their
stored results, and closed cases their failing frequencies, so it can be
rebuilt at any time without reading a trace file again (after a restore, an
upgrade that changes how signatures are indexed, or to repair a copy that
fell out of step, such as a reopened case's outcome). One transaction per
case, so a long run can be stopped and started again.
"""

from django.core.management import BaseCommand, CommandError

from emicase.models import Case
from emicase.services.search import signature_reindex_case


class Command(BaseCommand):
    help = (
        "Rebuild the signature search index from stored analysis results (all cases, or --case ID)."
    )

    def add_arguments(self, parser):
        parser.add_argument("--case", type=int, action="append", help="only this case (repeatable)")

    def handle(self, *args, **opts):
        cases = Case.objects.order_by("pk")
        if opts["case"]:
            cases = cases.filter(pk__in=opts["case"])
            missing = set(opts["case"]) - set(cases.values_list("pk", flat=True))
            if missing:
                raise CommandError(f"no case {', '.join(map(str, sorted(missing)))}")
        n_cases = n_items = 0
        for pk in cases.values_list("pk", flat=True).iterator():
            n_items += signature_reindex_case(case=Case(pk=pk))
            n_cases += 1
        if opts["verbosity"]:
            self.stdout.write(f"{n_cases} cases re-indexed, {n_items} signatures written")
