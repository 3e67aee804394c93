"""Property-based requests from the generated OpenAPI schema (schemathesis) find no server error.

Every operation of /api/schema/ is called in-process through the WSGI app
(loopback only, no network) with a seeded lead's token, with valid and with
invalid input: about half of the calls name the seeded objects so they get
past the 404 into the services, the rest use whatever the generator invents.

Bounded: a few examples per operation and mode, derandomised so CI is
repeatable, all in one test so the database is set up and flushed once. Set
EMICASE_FUZZ_EXAMPLES=200 EMICASE_FUZZ_RANDOM=1 for a deeper local run.
"""

from __future__ import annotations

import datetime as dt
import itertools
import os

import pytest
import schemathesis
from django.core.cache import cache
from django.core.files.uploadedfile import SimpleUploadedFile
from hypothesis import HealthCheck, given, settings
from hypothesis.errors import Unsatisfiable
from rest_framework.authtoken.models import Token
from schemathesis import GenerationMode
from schemathesis.checks import not_a_server_error

from emicase import models as m
from emicase import tasks
from emicase.services import countermeasures as cm_svc
from emicase.services.cases import comment_add
from emicase.services.uploads import capture_upload, scan_upload
from emicase.wsgi import application

TRACE = b"Frequency (MHz),Level (dBuV)\n30,20\n31,21\n32,20\n"  # never analysed here
EXAMPLES = int(os.environ.get("EMICASE_FUZZ_EXAMPLES", "8"))

pytestmark = [pytest.mark.slow, pytest.mark.django_db(transaction=True)]

BOUNDS = settings(
    max_examples=EXAMPLES,
    deadline=None,
    derandomize=os.environ.get("EMICASE_FUZZ_RANDOM") != "1",
    database=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much],
)
# Reads first and deletions last, so the seeded objects live as long as possible.
METHOD_ORDER = {"GET": 0, "POST": 1, "PATCH": 1, "PUT": 1, "DELETE": 2}


@pytest.fixture
def seeded(monkeypatch, settings, lead, engineer, viewer, outsider, revision, case):
    """One of each object in the team of a lead whose token the calls use; no analysis is queued."""
    # Uploads and edits would queue analyses for a worker that is not running
    # here; the rows vanish with this test, so keep the messages off the broker.
    for task in (tasks.analyse_scan, tasks.analyse_capture, tasks.reread_case):
        monkeypatch.setattr(task, "delay", lambda *args, **kwargs: None)
    settings.REST_FRAMEWORK = {**settings.REST_FRAMEWORK, "DEFAULT_THROTTLE_RATES": {"token": None}}
    cache.clear()
    ff = m.FailingFrequency.objects.create(
        case=case, frequency_hz=75e6, level=36.0, limit_level=30.0, confirmed=True
    )
    scan = scan_upload(
        revision=revision,
        file=SimpleUploadedFile("s.csv", TRACE),
        by=engineer,
        case=case,
        emission_kind="radiated",
        limit_id="cispr32-b-rad-10m",
        measured_on=dt.date(2026, 11, 3),
    )
    capture = capture_upload(
        case=case,
        file=SimpleUploadedFile("c.csv", TRACE),
        by=engineer,
        probe_kind="h_field",
        tip="loop 10 mm",
        location="U4",
    )
    cm = cm_svc.countermeasure_propose(
        case=case, by=engineer, kind="ferrite", description="choke", revision=revision
    )
    verification = cm_svc.verification_record_levels(
        countermeasure=cm, by=engineer, levels_after={ff.pk: 25.0}
    )
    comment_add(case=case, by=engineer, text="seen")
    ids = {
        "teams": case.product.team_id,
        "products": case.product_id,
        "revisions": revision.pk,
        "sources": revision.sources.get().pk,
        "cases": case.pk,
        "failing-frequencies": ff.pk,
        "scans": scan.pk,
        "captures": capture.pk,
        "countermeasures": cm.pk,
        "verifications": verification.pk,
    }
    return {"token": Token.objects.create(user=lead).key, "ids": ids, "turn": itertools.count()}


def test_no_request_makes_a_server_error(seeded):
    # The schema exactly as this code serves it, every operation of it.
    schema = schemathesis.openapi.from_wsgi("/api/schema/", application)
    operations = sorted(
        (result.ok() for result in schema.get_all_operations()),
        key=lambda op: (METHOD_ORDER.get(op.method.upper(), 1), op.path),
    )
    assert len(operations) > 30, [op.label for op in operations]
    failures, calls = [], []
    for operation in operations:
        for mode in (GenerationMode.POSITIVE, GenerationMode.NEGATIVE):
            try:
                _fuzz(operation, mode, seeded, calls)
            except Unsatisfiable:
                pass  # an operation without parameters has no invalid input to make
            except Exception as exc:  # collect them all: one report for every operation that failed
                failures.append(f"{operation.label} ({mode.value}): {exc}")
    assert not failures, "\n\n".join(failures)
    # Aimed at the seeded objects, many writes get past validation into the services.
    reached = {label for label, code in calls if code < 300 and not label.startswith("GET")}
    assert {"POST /api/captures/", "POST /api/cases/"} <= reached and len(reached) >= 12, sorted(
        reached
    )


def _fuzz(operation, mode: GenerationMode, seeded: dict, calls: list) -> None:
    """Call ``operation`` with generated input (BOUNDS examples); AssertionError on a server error."""

    @given(case=operation.as_strategy(generation_mode=mode))
    @BOUNDS
    def call(case):
        if next(seeded["turn"]) % 2 == 0:
            _aim_at_seeded_objects(case, seeded["ids"])
        response = case.call_and_validate(
            headers={"Authorization": f"Token {seeded['token']}"}, checks=[not_a_server_error]
        )
        calls.append((operation.label, response.status_code))

    call()


# Body fields that name an object, and the resource they name.
REFERENCES = {
    "team": "teams",
    "product": "products",
    "revision": "revisions",
    "copy_sources_from": "revisions",
    "case": "cases",
    "countermeasure": "countermeasures",
    "verification": "verifications",
}


def _aim_at_seeded_objects(case, ids: dict[str, int]) -> None:
    """Point the generated ids at real objects, so the call gets past 'not found' into the service."""
    resource = case.operation.path.split("/")[2]
    for name in case.path_parameters or {}:
        if resource in ids:
            case.path_parameters[name] = ids[resource]
    if isinstance(case.body, dict):
        for name, target in REFERENCES.items():
            if name in case.body:
                case.body[name] = ids[target]
        if isinstance(case.body.get("levels_after"), list):
            for row in case.body["levels_after"]:
                if isinstance(row, dict):
                    row["failing_frequency"] = ids["failing-frequencies"]
        if "keep" in case.body:
            case.body["keep"] = [ids["failing-frequencies"]]
        if "file" in case.body:
            # A text trace, so the upload reaches the service instead of the binary check.
            case.body["file"] = TRACE
