"""The demo data set loads and tells its story (invented data: this checks the wiring, not the numbers)."""

import pytest

from emicase.demo import DEMO_USERNAME, load_demo
from emicase.models import AnalysisStatus, Capture, Case, Countermeasure, Scan


@pytest.mark.django_db(transaction=True)
def test_the_demo_opens_cases_from_failing_scans_and_proves_a_fix(settings, tmp_path):
    settings.MEDIA_ROOT = tmp_path
    made = load_demo(analyse_now=True)
    assert made["captures"] == 9
    assert Scan.objects.filter(status=AnalysisStatus.DONE).count() == made["scans"]
    assert not Capture.objects.exclude(status=AnalysisStatus.DONE).exists()
    radiated = Case.objects.get(title__startswith="Radiated")
    # Opened by the analysis of the first failing scan, with its failing frequencies.
    assert {round(ff.frequency_hz / 1e6) for ff in radiated.failing_frequencies.all()} >= {75, 125, 250}
    assert all(ff.margin_db < 3.0 for ff in radiated.failing_frequencies.all())
    assert radiated.stage == Case.Stage.PROVEN
    assert radiated.countermeasures.get().status == Countermeasure.Status.VERIFIED
    # Every capture was read at every failing frequency.
    n_ff = radiated.failing_frequencies.count()
    for cap in radiated.captures.all():
        assert cap.readings.count() == n_ff
    assert Case.objects.filter(title__startswith="Conducted").exists()
    assert radiated.events.filter(actor__username=DEMO_USERNAME, kind="comment").exists()
