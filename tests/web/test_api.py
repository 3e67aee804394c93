"""The REST API: each resource is scoped to the user's teams, writes follow roles, errors read field by field.

Personas from tests/conftest.py: ``lead`` and ``engineer`` of one team,
``viewer`` who only reads it, ``outsider`` (a lead elsewhere) who must see
nothing: another team's object is a 404, never a 403.
"""

from __future__ import annotations

import datetime as dt

import pytest
from django.core.files.uploadedfile import SimpleUploadedFile
from django.db import connection
from django.test.utils import CaptureQueriesContext
from rest_framework.test import APIClient

from emicase import models as m
from emicase.services import analysis as analysis_svc
from emicase.services import cases as case_svc
from emicase.services import countermeasures as cm_svc
from emicase.services.uploads import capture_upload, scan_upload
from tests.web.traces import bad_csv, receiver_csv

PNG = b"\x89PNG\r\n\x1a\n" + b"\x00" * 64


def as_user(user) -> APIClient:
    client = APIClient()
    if user is not None:
        client.force_authenticate(user)
    return client


def upload(name: str, content: bytes) -> SimpleUploadedFile:
    return SimpleUploadedFile(name, content, content_type="text/csv")


@pytest.fixture
def world(team, lead, engineer, viewer, outsider, product, revision, case):
    """One of everything in the team, as the services make it."""
    ff = m.FailingFrequency.objects.create(
        case=case, frequency_hz=75e6, level=36.0, limit_level=30.0, confirmed=True
    )
    scan = scan_upload(
        revision=revision,
        file=upload("scan.csv", receiver_csv([(75e6, 36.0)])),
        by=engineer,
        case=case,
        emission_kind="radiated",
        limit_id="cispr32-b-rad-10m",
        distance_m=10.0,
        measured_on=dt.date(2026, 11, 3),
    )
    capture = capture_upload(
        case=case,
        file=upload("nf.csv", receiver_csv([(75.1e6, 52.0)], unit="dBµV", floor=5.0)),
        by=engineer,
        revision=revision,
        probe_kind="h_field",
        tip="loop 10 mm",
        location="U4",
        x_mm=10.0,
        y_mm=20.0,
    )
    cm = cm_svc.countermeasure_propose(
        case=case, by=engineer, kind="ferrite", description="CM choke", revision=revision
    )
    verification = cm_svc.verification_record_levels(
        countermeasure=cm, by=engineer, levels_after={ff.pk: 24.0}
    )
    case_svc.comment_add(case=case, by=engineer, text="Hot spot near the PHY")
    return {
        "teams": team,
        "products": product,
        "revisions": revision,
        "sources": revision.sources.get(),
        "cases": case,
        "failing-frequencies": ff,
        "scans": scan,
        "captures": capture,
        "countermeasures": cm,
        "verifications": verification,
    }


RESOURCES = [
    "teams",
    "products",
    "revisions",
    "sources",
    "cases",
    "failing-frequencies",
    "scans",
    "captures",
    "countermeasures",
    "verifications",
]


def ids(response) -> list[int]:
    assert response.status_code == 200, response.content
    return [row["id"] for row in response.json()["results"]]


# ----------------------------------------------------------------- isolation matrix


@pytest.mark.parametrize("resource", RESOURCES)
def test_members_list_and_read_their_teams_objects(world, engineer, viewer, resource):
    obj = world[resource]
    for user in (engineer, viewer):
        assert obj.pk in ids(as_user(user).get(f"/api/{resource}/"))
        detail = as_user(user).get(f"/api/{resource}/{obj.pk}/")
        assert detail.status_code == 200
        assert detail.json()["id"] == obj.pk


@pytest.mark.parametrize("resource", RESOURCES)
def test_an_outsider_gets_an_empty_list_and_404_not_403(world, outsider, resource):
    client = as_user(outsider)
    # The outsider's list holds their own team and nothing of ours.
    assert ids(client.get(f"/api/{resource}/")) == (
        [outsider.memberships.get().team_id] if resource == "teams" else []
    )
    assert client.get(f"/api/{resource}/{world[resource].pk}/").status_code == 404


@pytest.mark.parametrize("resource", RESOURCES)
def test_anonymous_requests_are_refused_with_401(world, resource):
    response = as_user(None).get(f"/api/{resource}/")
    assert response.status_code == 401
    assert response["WWW-Authenticate"] == "Token"
    assert as_user(None).get(f"/api/{resource}/{world[resource].pk}/").status_code == 401


@pytest.mark.parametrize("path", ["timeline", "comments"])
def test_a_cases_timeline_and_comments_are_404_to_an_outsider(world, outsider, engineer, path):
    case = world["cases"]
    assert as_user(outsider).get(f"/api/cases/{case.pk}/{path}/").status_code == 404
    assert as_user(engineer).get(f"/api/cases/{case.pk}/{path}/").json()["count"] >= 1


@pytest.mark.parametrize(
    "method, path, body",
    [
        ("post", "/api/cases/{cases}/move/", {"to": "hunting"}),
        ("post", "/api/cases/{cases}/confirm-frequencies/", {"keep": []}),
        ("post", "/api/cases/{cases}/comments/", {"text": "seen"}),
        ("patch", "/api/failing-frequencies/{failing-frequencies}/", {"is_open": False}),
        ("patch", "/api/sources/{sources}/", {"tolerance_hz": 10}),
        ("delete", "/api/sources/{sources}/", None),
        ("post", "/api/countermeasures/{countermeasures}/trial/", None),
        ("post", "/api/countermeasures/{countermeasures}/reject/", {"reason": "no"}),
    ],
)
def test_acting_on_an_object_is_403_for_a_viewer_and_404_for_an_outsider(
    world, viewer, outsider, method, path, body
):
    url = path.format(**{k: v.pk for k, v in world.items()})
    assert getattr(as_user(viewer), method)(url, body, format="json").status_code == 403
    assert getattr(as_user(outsider), method)(url, body, format="json").status_code == 404


@pytest.mark.parametrize(
    "resource, body",
    [
        ("products", lambda w: {"team": w["teams"].pk, "name": "Another"}),
        ("revisions", lambda w: {"product": w["products"].pk, "hardware_label": "B"}),
        (
            "sources",
            lambda w: {
                "revision": w["revisions"].pk,
                "name": "Buck",
                "nominal_frequency_hz": 2.2e6,
                "tolerance_hz": 1e4,
            },
        ),
        ("cases", lambda w: {"product": w["products"].pk, "title": "Conducted fail"}),
        (
            "failing-frequencies",
            lambda w: {
                "case": w["cases"].pk,
                "frequency_hz": 125e6,
                "level": 33,
                "limit_level": 30,
            },
        ),
        (
            "countermeasures",
            lambda w: {
                "case": w["cases"].pk,
                "revision": w["revisions"].pk,
                "kind": "filtering",
                "description": "100 pF at the connector",
            },
        ),
        (
            "verifications",
            lambda w: {
                "countermeasure": w["countermeasures"].pk,
                "levels_after": [
                    {"failing_frequency": w["failing-frequencies"].pk, "level_after": 25}
                ],
            },
        ),
    ],
)
def test_creating_needs_a_writer_of_the_team(world, engineer, viewer, outsider, resource, body):
    data = body(world)
    assert as_user(viewer).post(f"/api/{resource}/", data, format="json").status_code == 403
    # The outsider may write in their own team, but our objects do not exist for them.
    refused = as_user(outsider).post(f"/api/{resource}/", data, format="json")
    assert refused.status_code == 400
    assert "in your teams" in str(refused.json())
    created = as_user(engineer).post(f"/api/{resource}/", data, format="json")
    assert created.status_code == 201, created.content
    assert created["Location"] == created.json()["url"]
    assert as_user(outsider).get(created.json()["url"]).status_code == 404


def test_a_viewer_who_writes_in_another_team_is_still_refused_here(world, viewer, other_team):
    m.Membership.objects.create(team=other_team, user=viewer, role="engineer")
    response = as_user(viewer).post(
        f"/api/cases/{world['cases'].pk}/move/", {"to": "hunting"}, format="json"
    )
    assert response.status_code == 403
    assert response.json() == {"detail": "Your role in this team does not allow this."}


# ----------------------------------------------------------------- cases and their stages


def test_stages_change_by_actions_only(world, engineer, lead):
    case = world["cases"]
    client = as_user(engineer)
    assert (
        client.patch(f"/api/cases/{case.pk}/", {"stage": "closed"}, format="json").status_code
        == 405
    )
    moved = client.post(
        f"/api/cases/{case.pk}/move/", {"to": "hunting", "note": "probing"}, format="json"
    )
    assert moved.status_code == 200 and moved.json()["stage"] == "hunting"
    refused = client.post(f"/api/cases/{case.pk}/move/", {"to": "proven"}, format="json")
    assert refused.status_code == 400
    assert (
        "cannot move from 'Hunting the source' to 'Fix proven' by hand"
        in refused.json()["non_field_errors"][0]
    )
    # Only a lead closes, and a waiver needs its reason.
    assert (
        client.post(
            f"/api/cases/{case.pk}/close/", {"closure": "waived", "reason": "ok"}, format="json"
        ).status_code
        == 403
    )
    no_reason = as_user(lead).post(
        f"/api/cases/{case.pk}/close/", {"closure": "waived"}, format="json"
    )
    assert no_reason.status_code == 400
    assert no_reason.json() == {"reason": ["Say why the remaining emissions are accepted."]}
    closed = as_user(lead).post(
        f"/api/cases/{case.pk}/close/",
        {"closure": "waived", "reason": "Customer accepts"},
        format="json",
    )
    assert closed.json()["stage"] == "closed" and closed.json()["closure"] == "waived"
    reopened = as_user(lead).post(
        f"/api/cases/{case.pk}/reopen/", {"reason": "Test house disagrees"}, format="json"
    )
    assert reopened.json()["stage"] == "hunting"
    timeline = client.get(f"/api/cases/{case.pk}/timeline/?kind=stage").json()["results"]
    assert [(e["data"]["from"], e["data"]["to"]) for e in timeline] == [
        ("logged", "hunting"),
        ("closed", "hunting"),
    ]


def test_closing_as_fixed_names_a_verified_countermeasure(world, engineer, lead):
    case, cm, v = world["cases"], world["countermeasures"], world["verifications"]
    early = as_user(lead).post(
        f"/api/cases/{case.pk}/close/", {"closure": "fixed", "countermeasure": cm.pk}, format="json"
    )
    assert early.status_code == 400
    assert "verify it first" in early.json()["countermeasure"][0]
    verified = as_user(engineer).post(
        f"/api/countermeasures/{cm.pk}/verify/", {"verification": v.pk}, format="json"
    )
    assert verified.json()["status"] == "verified"
    assert as_user(engineer).get(f"/api/cases/{case.pk}/").json()["stage"] == "proven"
    closed = as_user(lead).post(
        f"/api/cases/{case.pk}/close/", {"closure": "fixed", "countermeasure": cm.pk}, format="json"
    )
    assert closed.json()["closure"] == "fixed" and closed.json()["fixed_by"] == cm.pk


def test_a_case_shows_its_failing_frequencies_and_worst_margin(world, engineer):
    data = as_user(engineer).get(f"/api/cases/{world['cases'].pk}/").json()
    assert [ff["frequency_hz"] for ff in data["failing_frequencies"]] == [75e6]
    assert data["worst_margin_db"] == pytest.approx(-6.0)  # limit 30 − level 36
    assert data["timeline_url"].endswith(f"/api/cases/{world['cases'].pk}/timeline/")


def test_a_case_owner_must_belong_to_the_products_team(world, engineer, outsider, lead):
    product = world["products"].pk
    refused = as_user(engineer).post(
        "/api/cases/", {"product": product, "title": "x", "owner": "outsider"}, format="json"
    )
    assert refused.status_code == 400
    assert refused.json() == {"owner": ["outsider is not a member of the product's team."]}
    made = as_user(engineer).post(
        "/api/cases/", {"product": product, "title": "x", "owner": "lead"}, format="json"
    )
    assert made.json()["owner"] == "lead"


def test_confirming_keeps_the_chosen_proposals_and_drops_the_rest(world, engineer):
    case = world["cases"]
    keep = m.FailingFrequency.objects.create(
        case=case, frequency_hz=125e6, level=33, limit_level=30
    )
    drop = m.FailingFrequency.objects.create(
        case=case, frequency_hz=175e6, level=31, limit_level=30
    )
    response = as_user(engineer).post(
        f"/api/cases/{case.pk}/confirm-frequencies/", {"keep": [keep.pk]}, format="json"
    )
    assert response.status_code == 200
    shown = {ff["id"]: ff["confirmed"] for ff in response.json()["failing_frequencies"]}
    assert shown[keep.pk] is True and drop.pk not in shown


def test_comments_are_added_and_listed(world, engineer):
    case = world["cases"]
    made = as_user(engineer).post(
        f"/api/cases/{case.pk}/comments/", {"text": "  Shield can helps  "}, format="json"
    )
    assert made.status_code == 201
    assert made.json()["text"] == "Shield can helps" and made.json()["author"] == "engineer"
    listed = as_user(engineer).get(f"/api/cases/{case.pk}/comments/").json()["results"]
    assert [c["text"] for c in listed] == ["Hot spot near the PHY", "Shield can helps"]
    empty = as_user(engineer).post(f"/api/cases/{case.pk}/comments/", {"text": " "}, format="json")
    assert empty.status_code == 400 and "text" in empty.json()


# ----------------------------------------------------------------- filters, ordering, pages


def test_cases_filter_by_stage_product_and_failing_frequency_range(world, engineer, product):
    other = case_svc.case_open(product=product, title="Conducted fail", by=engineer)
    case_svc.case_move(case=other, to="hunting", by=engineer)
    m.FailingFrequency.objects.create(
        case=other, frequency_hz=2.2e6, level=60, limit_level=56, confirmed=True
    )
    client = as_user(engineer)
    assert ids(client.get("/api/cases/?stage=hunting")) == [other.pk]
    assert sorted(ids(client.get("/api/cases/?stage=hunting&stage=logged"))) == sorted(
        [other.pk, world["cases"].pk]
    )
    assert ids(client.get("/api/cases/?frequency_hz_min=30e6&frequency_hz_max=1e9")) == [
        world["cases"].pk
    ]
    assert ids(client.get("/api/cases/?frequency_hz_max=10e6")) == [other.pk]
    assert ids(client.get(f"/api/cases/?product={product.pk + 1000}")) == []
    # Worst margin first: 60 dBµV against 56 is −4 dB, 36 against 30 is −6 dB.
    assert ids(client.get("/api/cases/?ordering=worst_margin_db")) == [world["cases"].pk, other.pk]
    bad = client.get("/api/cases/?frequency_hz_min=lots")
    assert bad.status_code == 400 and bad.json() == {"frequency_hz_min": ["Enter a number."]}


def test_uploads_and_frequencies_filter_on_their_fields(world, engineer):
    client = as_user(engineer)
    assert ids(client.get("/api/captures/?location=u4")) == [world["captures"].pk]
    assert ids(client.get("/api/captures/?probe_kind=e_field")) == []
    assert ids(client.get("/api/scans/?measured_after=2026-11-03&measured_before=2026-11-03")) == [
        world["scans"].pk
    ]
    assert ids(client.get("/api/scans/?measured_after=2026-11-04")) == []
    assert ids(
        client.get("/api/failing-frequencies/?frequency_hz_min=70e6&frequency_hz_max=80e6")
    ) == [world["failing-frequencies"].pk]
    assert ids(client.get(f"/api/countermeasures/?case={world['cases'].pk}&status=proposed")) == [
        world["countermeasures"].pk
    ]


def test_lists_come_in_pages(world, engineer, product):
    for n in range(3):
        case_svc.case_open(product=product, title=f"Fail {n}", by=engineer)
    page = as_user(engineer).get("/api/cases/?page_size=2").json()
    assert (
        page["count"] == 4
        and len(page["results"]) == 2
        and page["next"].endswith("page=2&page_size=2")
    )
    assert as_user(engineer).get("/api/cases/?page=9").status_code == 404


# ----------------------------------------------------------------- uploads


def test_a_capture_upload_answers_with_its_url_and_status(world, engineer):
    case = world["cases"]
    response = as_user(engineer).post(
        "/api/captures/",
        {
            "case": case.pk,
            "probe_kind": "e_field",
            "tip": "ball 3 mm",
            "location": "PHY area",
            "file": upload("near.csv", receiver_csv([(75e6, 40.0)], unit="dBµV")),
        },
        format="multipart",
    )
    assert response.status_code == 201, response.content
    body = response.json()
    assert (
        body["url"].endswith(f"/api/captures/{body['id']}/") and response["Location"] == body["url"]
    )
    assert (body["status"], body["progress"], body["error_text"], body["results"]) == (
        "queued",
        0.0,
        "",
        None,
    )
    assert body["revision"] == world["revisions"].pk  # the newest revision of the case's product
    assert body["original_name"] == "near.csv" and body["uploaded_by"] == "engineer"


def test_a_repeated_idempotency_key_returns_the_stored_capture(world, engineer):
    case = world["cases"]

    def post():
        return as_user(engineer).post(
            "/api/captures/",
            {
                "case": case.pk,
                "probe_kind": "h_field",
                "tip": "loop 10 mm",
                "location": "U4",
                "file": upload("a.csv", receiver_csv([(75e6, 40.0)], unit="dBµV")),
            },
            format="multipart",
            HTTP_IDEMPOTENCY_KEY="f" * 64,
        )

    first, again = post(), post()
    assert (first.status_code, again.status_code) == (201, 200)
    assert again.json()["id"] == first.json()["id"]
    assert m.Capture.objects.filter(idempotency_key="f" * 64).count() == 1
    bad = as_user(engineer).post(
        "/api/captures/", {"case": case.pk}, format="multipart", HTTP_IDEMPOTENCY_KEY="x" * 65
    )
    assert bad.status_code == 400


@pytest.mark.parametrize(
    "change, field, words",
    [
        (
            {"file": upload("photo.png", PNG)},
            "file",
            "photo.png is not a text trace (it looks like a binary file).",
        ),
        ({"file": upload("empty.csv", b"")}, "file", "empty.csv is empty."),
        ({"x_mm": "10"}, "y_mm", "Give both x_mm and y_mm, or neither."),
        ({"probe_kind": "antenna"}, "probe_kind", '"antenna" is not a valid choice.'),
        ({"tip": ""}, "tip", "This field may not be blank."),
        ({"case": 10**12}, "case", f"No case with id {10**12} in your teams."),
    ],
)
def test_a_refused_capture_says_which_field_and_why(world, engineer, change, field, words):
    data = {
        "case": world["cases"].pk,
        "probe_kind": "h_field",
        "tip": "loop 10 mm",
        "location": "U4",
        "file": upload("a.csv", receiver_csv([(75e6, 40.0)], unit="dBµV")),
        **change,
    }
    response = as_user(engineer).post("/api/captures/", data, format="multipart")
    assert response.status_code == 400
    assert response.json()[field] == [words]
    assert m.Capture.objects.count() == 1  # only the world's


def test_a_finished_capture_shows_peaks_readings_and_its_envelope(world, engineer):
    capture = world["captures"]
    client = as_user(engineer)
    assert client.get(f"/api/captures/{capture.pk}/envelope/").status_code == 409
    # The worker's own service, run here in-process (the worker path is tested end to end).
    assert analysis_svc.analyse_capture(capture.pk) == "done"
    body = client.get(f"/api/captures/{capture.pk}/").json()
    assert body["status"] == "done" and body["progress"] == 1.0
    assert any(abs(p["frequency_hz"] - 75.1e6) < 0.5e6 for p in body["results"]["peaks"])
    assert body["results"]["exceedances"] is None  # captures are not judged against a limit
    [reading] = body["readings"]
    assert reading["failing_frequency"] == world["failing-frequencies"].pk
    assert reading["level"] == pytest.approx(52.0, abs=0.5)  # the tone built into the trace
    envelope = client.get(body["envelope_url"]).json()
    assert len(envelope["frequency_hz"]) == len(envelope["level"]) > 10
    assert max(envelope["level"]) == pytest.approx(52.0, abs=0.5)
    assert "results" not in client.get("/api/captures/").json()["results"][0]  # lists stay light


def test_a_bad_text_trace_is_accepted_and_its_analysis_fails_with_the_engines_words(
    world, engineer
):
    response = as_user(engineer).post(
        "/api/captures/",
        {
            "case": world["cases"].pk,
            "probe_kind": "h_field",
            "tip": "loop 10 mm",
            "location": "U4",
            "file": upload("broken.csv", bad_csv(line_of_error=5)),
        },
        format="multipart",
    )
    assert response.status_code == 201
    pk = response.json()["id"]
    assert analysis_svc.analyse_capture(pk) == "failed"
    body = as_user(engineer).get(f"/api/captures/{pk}/").json()
    stored = m.Capture.objects.get(pk=pk)
    assert (body["status"], body["error_kind"]) == ("failed", "input")
    assert body["error_text"] == stored.error_text  # the very words the pages show
    assert "broken.csv line 5" in body["error_text"] and "abc" in body["error_text"]
    assert body["results"] is None
    refused = as_user(engineer).get(f"/api/captures/{pk}/envelope/")
    assert refused.status_code == 409 and "broken.csv line 5" in refused.json()["detail"]


def test_a_scan_upload_is_checked_against_its_kind_and_limit(world, engineer):
    base = {
        "revision": world["revisions"].pk,
        "emission_kind": "radiated",
        "limit_id": "cispr32-b-rad-10m",
        "measured_on": "2026-11-03",
    }
    client = as_user(engineer)

    def post(**change):
        return client.post(
            "/api/scans/",
            {**base, "file": upload("s.csv", receiver_csv([(75e6, 36.0)])), **change},
            format="multipart",
        )

    assert post(mains_line="L1").json() == {
        "mains_line": ["A radiated scan has no mains line; that is for conducted scans."]
    }
    assert post(limit_id="cispr32-b-cond-qp").json() == {
        "limit_id": ["cispr32-b-cond-qp is a conducted limit; this scan is radiated."]
    }
    assert "limit_id" in post(limit_id="cispr99").json()
    assert post(distance_m="0").json() == {
        "distance_m": ["The antenna distance must be above 0 m."]
    }
    made = post(distance_m="3", opens_case_titled="Radiated fail, rev A")
    assert made.status_code == 201, made.content
    assert (made.json()["status"], made.json()["product"]) == ("queued", world["products"].pk)
    assert as_user(world["scans"].uploaded_by).get(made.json()["envelope_url"]).status_code == 409


def test_a_scan_upload_of_an_outsider_or_viewer_is_refused(world, viewer, outsider):
    data = {
        "revision": world["revisions"].pk,
        "emission_kind": "radiated",
        "limit_id": "cispr32-b-rad-10m",
        "measured_on": "2026-11-03",
        "file": upload("s.csv", b"1,2\n"),
    }
    assert as_user(viewer).post("/api/scans/", data, format="multipart").status_code == 403
    data["file"] = upload("s.csv", b"1,2\n")
    refused = as_user(outsider).post("/api/scans/", data, format="multipart")
    assert refused.status_code == 400 and "revision" in refused.json()


# ----------------------------------------------------------------- products, sources, countermeasures, verifications


def test_revisions_show_their_known_sources_and_can_copy_them(world, engineer):
    client = as_user(engineer)
    rev_a = world["revisions"]
    made = client.post(
        "/api/revisions/",
        {"product": rev_a.product_id, "hardware_label": "B", "copy_sources_from": rev_a.pk},
        format="json",
    )
    assert made.status_code == 201
    assert [(src["name"], src["nominal_frequency_hz"]) for src in made.json()["sources"]] == [
        ("PHY clock", 25e6)
    ]
    again = client.post(
        "/api/revisions/", {"product": rev_a.product_id, "hardware_label": "B"}, format="json"
    )
    assert (
        again.status_code == 400 and "already has revision 'B'" in again.json()["hardware_label"][0]
    )


def test_sources_are_added_changed_and_removed(world, engineer):
    client = as_user(engineer)
    rev = world["revisions"]
    made = client.post(
        "/api/sources/",
        {
            "revision": rev.pk,
            "name": "Buck U7",
            "kind": "switching",
            "nominal_frequency_hz": 2.2e6,
            "tolerance_hz": 2e4,
        },
        format="json",
    )
    assert made.status_code == 201
    pk = made.json()["id"]
    assert (
        client.patch(f"/api/sources/{pk}/", {"tolerance_hz": 5e4}, format="json").json()[
            "tolerance_hz"
        ]
        == 5e4
    )
    assert client.patch(f"/api/sources/{pk}/", {"name": "PHY clock"}, format="json").json() == {
        "name": ["This revision already has a source named 'PHY clock'."]
    }
    assert client.patch(
        f"/api/sources/{pk}/", {"nominal_frequency_hz": 0}, format="json"
    ).json() == {"nominal_frequency_hz": ["A source's frequency must be above 0 Hz."]}
    assert client.delete(f"/api/sources/{pk}/").status_code == 204
    assert not m.EmissionSource.objects.filter(pk=pk).exists()


def test_a_product_name_is_unique_in_its_team(world, engineer):
    response = as_user(engineer).post(
        "/api/products/", {"team": world["teams"].pk, "name": "Test controller"}, format="json"
    )
    assert response.status_code == 400
    assert response.json() == {
        "name": ["Test bench already has a product named 'Test controller'."]
    }


def test_failing_frequencies_are_added_and_edited_with_clear_refusals(world, engineer):
    client = as_user(engineer)
    case = world["cases"]
    refused = client.post(
        "/api/failing-frequencies/",
        {"case": case.pk, "frequency_hz": -1, "level": 1, "limit_level": 0},
        format="json",
    )
    assert refused.json() == {"frequency_hz": ["A frequency must be above 0 Hz."]}
    ff = world["failing-frequencies"]
    edited = client.patch(
        f"/api/failing-frequencies/{ff.pk}/", {"level": 31.0}, format="json"
    ).json()
    assert (edited["level"], edited["margin_db"]) == (31.0, pytest.approx(-1.0))
    assert client.patch(
        f"/api/failing-frequencies/{ff.pk}/", {"level": "high"}, format="json"
    ).json() == {"level": ["A valid number is required."]}


def test_a_countermeasure_goes_on_trial_and_is_rejected(world, engineer):
    client = as_user(engineer)
    cm = world["countermeasures"]
    assert client.post(f"/api/countermeasures/{cm.pk}/trial/").json()["status"] == "trial"
    assert client.get(f"/api/cases/{cm.case_id}/").json()["stage"] == "trial"
    assert client.post(f"/api/countermeasures/{cm.pk}/trial/").json() == {
        "non_field_errors": ["A countermeasure that is on trial cannot go on trial."]
    }
    assert (
        client.post(
            f"/api/countermeasures/{cm.pk}/reject/", {"reason": "no change"}, format="json"
        ).json()["status"]
        == "rejected"
    )


def test_a_verification_shows_the_change_and_new_margin(world, engineer):
    v = as_user(engineer).get(f"/api/verifications/{world['verifications'].pk}/").json()
    [result] = v["results"]
    # 36 dBµV/m before, 24 after, limit 30: 12 dB quieter, 6 dB of margin.
    assert (result["change_db"], result["new_margin_db"]) == (
        pytest.approx(-12.0),
        pytest.approx(6.0),
    )
    assert v["case"] == world["cases"].pk


def test_a_verification_by_hand_refuses_frequencies_of_other_cases(world, engineer, product):
    other = case_svc.case_open(product=product, title="Other", by=engineer)
    stranger = m.FailingFrequency.objects.create(
        case=other, frequency_hz=1e8, level=1, limit_level=2
    )
    response = as_user(engineer).post(
        "/api/verifications/",
        {
            "countermeasure": world["countermeasures"].pk,
            "levels_after": [{"failing_frequency": stranger.pk, "level_after": 1.0}],
        },
        format="json",
    )
    assert response.status_code == 400
    assert response.json() == {
        "levels_after": [f"Not failing frequencies of this case: [{stranger.pk}]"]
    }


def test_an_after_scan_becomes_a_verification(world, engineer):
    response = as_user(engineer).post(
        "/api/verifications/after-scan/",
        {
            "countermeasure": world["countermeasures"].pk,
            "emission_kind": "radiated",
            "limit_id": "cispr32-b-rad-10m",
            "measured_on": "2026-11-20",
            "file": upload("after.csv", receiver_csv([(75e6, 24.0)])),
        },
        format="multipart",
    )
    assert response.status_code == 201, response.content
    scan = m.Scan.objects.get(pk=response.json()["after_scan"])
    assert scan.case_id == world["cases"].pk and scan.revision_id == world["revisions"].pk


def test_teams_show_the_users_role_and_limits_are_listed(world, viewer, engineer):
    [team] = as_user(viewer).get("/api/teams/").json()["results"]
    assert (team["name"], team["role"]) == ("Test bench", "viewer")
    limits = {row["id"]: row for row in as_user(engineer).get("/api/limits/").json()}
    # CISPR 32 Table A.4 via DOMAIN.md: class B radiated at 10 m, quasi-peak.
    assert limits["cispr32-b-rad-10m"]["kind"] == "radiated"
    assert limits["cispr32-b-rad-10m"]["distance_m"] == 10.0


def _add_one(world, engineer, resource: str, n: int) -> None:
    """One more row of ``resource`` in the team, made the way the app makes it."""
    case, revision, ff = world["cases"], world["revisions"], world["failing-frequencies"]
    if resource == "cases":
        case_svc.case_open(product=case.product, title=f"more {n}", by=engineer)
    elif resource == "captures":
        capture_upload(
            case=case,
            file=upload(f"{n}.csv", b"1,2\n"),
            by=engineer,
            probe_kind="h_field",
            tip="t",
            location="U1",
        )
    elif resource == "countermeasures":
        cm_svc.countermeasure_propose(
            case=case, by=engineer, kind="other", description=f"more {n}", revision=revision
        )
    elif resource == "verifications":
        cm_svc.verification_record_levels(
            countermeasure=world["countermeasures"], by=engineer, levels_after={ff.pk: 20.0 + n}
        )
    elif resource == "scans":
        scan_upload(
            revision=revision,
            file=upload(f"{n}.csv", b"1,2\n"),
            by=engineer,
            emission_kind="conducted",
            limit_id="cispr32-b-cond-qp",
            measured_on=dt.date(2026, 11, 4),
        )
    elif resource == "failing-frequencies":
        m.FailingFrequency.objects.create(case=case, frequency_hz=1e8 + n, level=1, limit_level=2)
    elif resource == "sources":
        m.EmissionSource.objects.create(
            revision=revision, name=f"s{n}", nominal_frequency_hz=1e6, tolerance_hz=1
        )
    elif resource == "revisions":
        m.Revision.objects.create(product=revision.product, hardware_label=f"R{n}")
    elif resource == "products":
        m.Product.objects.create(team=case.product.team, name=f"P{n}")
    elif resource == "teams":
        team = m.Team.objects.create(name=f"Team {n}", slug=f"team-{n}")
        m.Membership.objects.create(team=team, user=engineer, role="viewer")


@pytest.mark.parametrize("resource", RESOURCES)
def test_a_list_costs_the_same_queries_for_one_row_or_many(world, engineer, resource):
    client = as_user(engineer)
    with CaptureQueriesContext(connection) as one:
        client.get(f"/api/{resource}/")
    for n in range(3):
        _add_one(world, engineer, resource, n)
    with CaptureQueriesContext(connection) as many:
        response = client.get(f"/api/{resource}/")
    assert response.json()["count"] >= 4
    assert len(many) == len(one), [q["sql"] for q in many.captured_queries]
