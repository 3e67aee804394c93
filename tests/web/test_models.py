"""Rules within one row are database constraints: no code path can break them."""

import datetime as dt

import pytest
from django.db import IntegrityError, transaction
from django.utils import timezone

from emicase.models import (
    Capture,
    Case,
    Countermeasure,
    FailingFrequency,
    Scan,
    Team,
    VerificationResult,
)


def _violates(fn):
    with pytest.raises(IntegrityError), transaction.atomic():
        fn()


def test_margin_is_limit_minus_level_negative_when_over(case):
    over = FailingFrequency.objects.create(case=case, frequency_hz=75e6, level=38.5, limit_level=30.0)
    under = FailingFrequency.objects.create(case=case, frequency_hz=48e6, level=24.0, limit_level=30.0)
    assert over.margin_db == pytest.approx(-8.5)
    assert under.margin_db == pytest.approx(6.0)


def test_worst_margin_is_derived_in_the_database(case, engineer):
    from emicase.selectors import cases_visible_to

    FailingFrequency.objects.create(case=case, frequency_hz=75e6, level=38.5, limit_level=30.0)
    FailingFrequency.objects.create(case=case, frequency_hz=125e6, level=33.0, limit_level=30.0)
    assert cases_visible_to(engineer).get(pk=case.pk).worst_margin_db == pytest.approx(-8.5)


def test_a_case_cannot_be_closed_without_an_outcome(case):
    _violates(lambda: Case.objects.filter(pk=case.pk).update(stage="closed", closed_at=timezone.now()))


def test_an_open_case_cannot_carry_an_outcome(case):
    _violates(lambda: Case.objects.filter(pk=case.pk).update(closure="waived", closure_reason="x"))


def test_fixed_needs_a_countermeasure(case):
    _violates(
        lambda: Case.objects.filter(pk=case.pk).update(stage="closed", closure="fixed", closed_at=timezone.now())
    )


def test_waived_needs_a_reason(case):
    _violates(
        lambda: Case.objects.filter(pk=case.pk).update(stage="closed", closure="waived", closed_at=timezone.now())
    )


def test_conducted_scans_have_no_distance_or_polarisation(revision, engineer):
    def make():
        Scan.objects.create(
            revision=revision, file="x.csv", original_name="x.csv", uploaded_by=engineer,
            emission_kind="conducted", limit_id="cispr32-b-cond-qp", distance_m=3.0, measured_on=dt.date.today(),
        )

    _violates(make)


def test_radiated_scans_have_no_mains_line(revision, engineer):
    def make():
        Scan.objects.create(
            revision=revision, file="x.csv", original_name="x.csv", uploaded_by=engineer,
            emission_kind="radiated", limit_id="cispr32-b-rad-10m", mains_line="N", measured_on=dt.date.today(),
        )

    _violates(make)


def test_a_capture_position_has_both_coordinates_or_none(case, revision, engineer):
    def make():
        Capture.objects.create(
            case=case, revision=revision, file="x.csv", original_name="x.csv", uploaded_by=engineer,
            probe_kind="h_field", tip="loop 10 mm", location="U4", x_mm=12.0,
        )

    _violates(make)


def test_guard_band_cannot_be_negative(db):
    _violates(lambda: Team.objects.create(name="t", slug="t", guard_band_db=-1))


def test_verification_result_derives_change_and_new_margin(case, revision, engineer):
    from emicase.models import Verification

    ff = FailingFrequency.objects.create(case=case, frequency_hz=75e6, level=38.5, limit_level=30.0)
    cm = Countermeasure.objects.create(case=case, revision=revision, kind="ferrite", description="choke",
                                       proposed_by=engineer)
    v = Verification.objects.create(countermeasure=cm, recorded_by=engineer)
    r = VerificationResult.objects.create(verification=v, failing_frequency=ff, level_after=24.0)
    assert r.change_db == pytest.approx(-14.5)  # quieter by 14.5 dB
    assert r.new_margin_db == pytest.approx(6.0)
