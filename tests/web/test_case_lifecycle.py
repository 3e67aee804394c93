"""Rules that span rows: closing, waiving, verifying, who may do what, and the timeline."""

import pytest
from django.core.exceptions import PermissionDenied, ValidationError

from emicase.models import Case, CaseEvent, Countermeasure, FailingFrequency
from emicase.services import cases as case_svc
from emicase.services import countermeasures as cm_svc


@pytest.fixture
def failing(case):
    return FailingFrequency.objects.create(case=case, frequency_hz=75e6, level=38.5, limit_level=30.0, confirmed=True)


@pytest.fixture
def countermeasure(case, revision, engineer):
    return cm_svc.countermeasure_propose(case=case, by=engineer, kind="ferrite", description="CM choke", revision=revision)


def _verification(cm, engineer, failing, level_after):
    return cm_svc.verification_record_levels(countermeasure=cm, by=engineer, levels_after={failing.pk: level_after})


def test_it_refuses_to_close_as_fixed_without_a_verified_countermeasure(case, lead, countermeasure):
    with pytest.raises(ValidationError, match="verified"):
        case_svc.case_close(case=case, by=lead, closure="fixed", countermeasure=countermeasure)
    case.refresh_from_db()
    assert case.stage == Case.Stage.LOGGED


def test_it_closes_as_fixed_once_verified(case, lead, engineer, countermeasure, failing):
    v = _verification(countermeasure, engineer, failing, level_after=24.0)  # 6 dB margin ≥ 3 dB guard
    cm_svc.countermeasure_verify(countermeasure=countermeasure, verification=v, by=engineer)
    case.refresh_from_db()
    assert case.stage == Case.Stage.PROVEN
    case_svc.case_close(case=case, by=lead, closure="fixed", countermeasure=countermeasure)
    case.refresh_from_db()
    assert (case.stage, case.closure, case.fixed_by_id) == ("closed", "fixed", countermeasure.pk)
    failing.refresh_from_db()
    assert failing.is_open is False


def test_verify_refuses_a_margin_inside_the_guard_band_without_a_reason(countermeasure, engineer, failing):
    v = _verification(countermeasure, engineer, failing, level_after=28.5)  # 1.5 dB margin < 3 dB guard
    with pytest.raises(ValidationError, match="guard band"):
        cm_svc.countermeasure_verify(countermeasure=countermeasure, verification=v, by=engineer)
    countermeasure.refresh_from_db()
    assert countermeasure.status == Countermeasure.Status.PROPOSED
    cm_svc.countermeasure_verify(countermeasure=countermeasure, verification=v, by=engineer,
                                 reason="Test house has 4 dB more margin at this frequency")
    countermeasure.refresh_from_db()
    assert countermeasure.status == Countermeasure.Status.VERIFIED
    assert countermeasure.verified_reason.startswith("Test house")


def test_a_waiver_needs_a_reason_and_a_lead(case, lead, engineer):
    with pytest.raises(ValidationError, match="why"):
        case_svc.case_close(case=case, by=lead, closure="waived", reason="  ")
    with pytest.raises(PermissionDenied):
        case_svc.case_close(case=case, by=engineer, closure="waived", reason="Marginal, accepted by QA")
    case_svc.case_close(case=case, by=lead, closure="waived", reason="Marginal, accepted by QA")
    case.refresh_from_db()
    assert case.closure == "waived" and case.closed_at is not None


def test_a_countermeasure_of_another_case_cannot_close_this_one(case, lead, engineer, product, revision, failing):
    other = case_svc.case_open(product=product, title="Other", by=engineer)
    cm = cm_svc.countermeasure_propose(case=other, by=engineer, kind="layout", description="x", revision=revision)
    with pytest.raises(ValidationError, match="another case"):
        case_svc.case_close(case=case, by=lead, closure="fixed", countermeasure=cm)


def test_manual_moves_follow_the_allowed_paths(case, engineer):
    case_svc.case_move(case=case, to=Case.Stage.HUNTING, by=engineer)
    with pytest.raises(ValidationError, match="cannot move"):
        case_svc.case_move(case=case, to=Case.Stage.PROVEN, by=engineer)
    with pytest.raises(ValidationError, match="cannot move"):
        case_svc.case_move(case=case, to=Case.Stage.CLOSED, by=engineer)


def test_viewers_and_outsiders_change_nothing(case, viewer, outsider):
    for who in (viewer, outsider):
        with pytest.raises(PermissionDenied):
            case_svc.comment_add(case=case, by=who, text="hello")
        with pytest.raises(PermissionDenied):
            case_svc.case_move(case=case, to=Case.Stage.HUNTING, by=who)
    assert not case.events.filter(kind=CaseEvent.Kind.COMMENT).exists()


def test_the_timeline_records_who_did_what_in_order(case, engineer, lead):
    case_svc.case_move(case=case, to=Case.Stage.HUNTING, by=engineer, note="probing")
    case_svc.comment_add(case=case, by=lead, text="Try the jack first")
    events = list(case.events.values_list("kind", "actor__username"))
    assert events == [("opened", "engineer"), ("stage", "engineer"), ("comment", "lead")]
    stage = case.events.get(kind="stage")
    assert stage.data == {"from": "logged", "to": "hunting"} and stage.at is not None


def test_a_closed_case_reopens_only_with_a_reason(case, lead):
    case_svc.case_close(case=case, by=lead, closure="waived", reason="accepted")
    with pytest.raises(ValidationError):
        case_svc.case_reopen(case=case, by=lead, reason="")
    case_svc.case_reopen(case=case, by=lead, reason="Test house disagrees")
    case.refresh_from_db()
    assert case.stage == Case.Stage.HUNTING and case.closure == "" and case.closed_at is None
