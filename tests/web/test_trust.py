"""Trust features: the audit log, members, sharing, permission-checked downloads, request size caps.

The full role × object × verb matrix is tests/web/test_access_matrix.py; this
module checks what each feature records and refuses.
"""

from __future__ import annotations

import datetime as dt
import re

import pytest
from django.core.files.uploadedfile import SimpleUploadedFile
from django.test import Client
from django.urls import reverse
from rest_framework.test import APIClient

from emicase import models as m
from emicase.services import cases as case_svc
from emicase.services import products as product_svc
from emicase.services import teams as team_svc
from emicase.services.uploads import scan_upload
from tests.conftest import ROOT
from tests.web.traces import receiver_csv

Verb = m.AuditEvent.Verb


@pytest.fixture(autouse=True)
def _media(settings, tmp_path):
    settings.MEDIA_ROOT = tmp_path


def page_client(user) -> Client:
    client = Client()
    client.force_login(user)
    return client


def api_client(user) -> APIClient:
    client = APIClient()
    client.force_authenticate(user)
    return client


@pytest.fixture
def scan(revision, engineer, case):
    return scan_upload(
        revision=revision,
        file=SimpleUploadedFile("front panel <b>scan</b>.csv", receiver_csv([(75e6, 36.0)])),
        by=engineer,
        case=case,
        emission_kind="radiated",
        limit_id="cispr32-b-rad-10m",
        distance_m=10.0,
        measured_on=dt.date(2026, 11, 3),
    )


# ----------------------------------------------------------------- audit log


def test_signing_in_is_logged_once_per_team_of_the_person(client, lead, team, other_team):
    m.Membership.objects.create(team=other_team, user=lead, role="viewer")
    assert client.post(reverse("login"), {"username": "lead", "password": "pw-for-tests-only"}).status_code == 302
    rows = m.AuditEvent.objects.filter(verb=Verb.SIGNED_IN, actor=lead)
    assert sorted(rows.values_list("team__slug", flat=True)) == ["elsewhere", "test-bench"]
    assert rows.first().remote_addr == "127.0.0.1"  # the test client's REMOTE_ADDR


def test_a_refused_sign_in_is_logged_without_the_password(client, lead):
    client.post(reverse("login"), {"username": "lead", "password": "wrong-guess-123"})
    row = m.AuditEvent.objects.get(verb=Verb.SIGN_IN_FAILED)
    assert row.actor == lead
    assert "wrong-guess-123" not in repr(row.__dict__)


def test_stage_changes_closures_waivers_and_reopenings_are_logged(case, engineer, lead):
    case_svc.case_move(case=case, to="hunting", by=engineer)
    case_svc.case_close(case=case, by=lead, closure="waived", reason="Customer accepts 1 dB at 900 MHz")
    case_svc.case_reopen(case=case, by=lead, reason="Test house measured 3 dB over")
    verbs = list(m.AuditEvent.objects.filter(object_type="case", object_id=case.pk)
                 .order_by("at", "id").values_list("verb", "actor_name"))
    assert verbs == [(Verb.STAGE, "engineer"), (Verb.WAIVED, "lead"), (Verb.REOPENED, "lead")]
    waived = m.AuditEvent.objects.get(verb=Verb.WAIVED)
    assert "Customer accepts 1 dB" in waived.text


def test_deleting_a_source_and_changing_sharing_are_logged(revision, engineer, lead, team):
    source = revision.sources.get()
    product_svc.source_delete(source=source, by=engineer)
    product_svc.team_settings_update(team=team, by=lead, share_closed_cases=True)
    deleted = m.AuditEvent.objects.get(verb=Verb.DELETED)
    assert "PHY clock" in deleted.text and deleted.actor_name == "engineer"
    share = m.AuditEvent.objects.get(verb=Verb.SHARING)
    assert share.data == {"share_closed_cases": True}
    team.refresh_from_db()
    assert team.share_closed_cases is True


def test_only_leads_read_the_audit_log(lead, engineer, viewer, outsider, team, case):
    case_svc.case_move(case=case, to="hunting", by=engineer)
    url = reverse("team_audit", args=[team.slug])
    response = page_client(lead).get(url)
    assert response.status_code == 200
    assert "Stage changed" in response.content.decode()
    assert page_client(engineer).get(url).status_code == 403
    assert page_client(viewer).get(url).status_code == 403
    assert page_client(outsider).get(url).status_code == 404
    # The API lists the lead's team's lines and nothing for anyone else (the page
    # clients' force_login above wrote sign-in lines for all four).
    lines = api_client(lead).get("/api/audit/").json()["results"]
    assert sorted(r["actor"] for r in lines if r["verb"] == "signed_in") == ["engineer", "lead", "viewer"]
    assert [r["verb"] for r in api_client(lead).get("/api/audit/?verb=stage").json()["results"]] == ["stage"]
    assert api_client(engineer).get("/api/audit/").json()["results"] == []
    # The outsider leads its own team: it reads that team's lines only.
    assert {r["team"] for r in api_client(outsider).get("/api/audit/").json()["results"]} == {"elsewhere"}


def test_the_audit_page_takes_a_constant_number_of_queries(lead, team, engineer, case,
                                                          django_assert_max_num_queries):
    for _ in range(30):
        case_svc.comment_add(case=case, by=engineer, text="x")
        case_svc.case_move(case=case, to="hunting", by=engineer)
        case_svc.case_move(case=case, to="logged", by=engineer)
    client = page_client(lead)
    with django_assert_max_num_queries(12):
        assert client.get(reverse("team_audit", args=[team.slug])).status_code == 200


# ----------------------------------------------------------------- members


def test_a_lead_adds_changes_and_removes_a_member_with_confirmation(lead, team, make_user):
    make_user("newcomer")
    client = page_client(lead)
    url = reverse("team_members", args=[team.slug])
    assert client.post(url, {"action": "add", "username": "newcomer", "role": "viewer"}).status_code == 302
    membership = m.Membership.objects.get(user__username="newcomer", team=team)
    assert membership.role == "viewer"
    client.post(url, {"action": "role", "membership": membership.pk, "role": "engineer"})
    membership.refresh_from_db()
    assert membership.role == "engineer"
    # Removing asks first; nothing changes until it is confirmed.
    ask = client.post(url, {"action": "remove", "membership": membership.pk})
    assert ask.status_code == 200 and "Remove from the team" in ask.content.decode()
    assert m.Membership.objects.filter(pk=membership.pk).exists()
    client.post(url, {"action": "remove", "membership": membership.pk, "confirmed": "yes"})
    assert not m.Membership.objects.filter(pk=membership.pk).exists()
    assert list(m.AuditEvent.objects.filter(team=team, object_type="membership").order_by("id")
                .values_list("verb", flat=True)) == [
        Verb.MEMBER_ADDED, Verb.MEMBER_ROLE, Verb.MEMBER_REMOVED]


def test_the_last_lead_cannot_be_removed_or_demoted(lead, team):
    own = m.Membership.objects.get(user=lead, team=team)
    with pytest.raises(Exception, match="at least one lead"):
        team_svc.member_remove(membership=own, by=lead)
    with pytest.raises(Exception, match="at least one lead"):
        team_svc.member_role_set(membership=own, by=lead, role="engineer")
    own.refresh_from_db()
    assert own.role == "lead"


def test_adding_an_unknown_account_says_so_beside_the_field(lead, team):
    response = page_client(lead).post(reverse("team_members", args=[team.slug]),
                                      {"action": "add", "username": "nobody-here", "role": "engineer"})
    assert response.status_code == 200
    assert "No active account is called" in response.content.decode()
    assert team.memberships.count() == 1


@pytest.mark.parametrize("who", ["engineer", "viewer"])
def test_members_are_managed_by_leads_only(request, who, team, make_user):
    user = request.getfixturevalue(who)
    make_user("newcomer")
    response = page_client(user).post(reverse("team_members", args=[team.slug]),
                                      {"action": "add", "username": "newcomer", "role": "lead"})
    assert response.status_code == 403
    assert not m.Membership.objects.filter(user__username="newcomer").exists()


# ----------------------------------------------------------------- downloads


def test_a_member_downloads_the_file_as_an_attachment_and_it_is_logged(scan, viewer, outsider, client):
    response = page_client(viewer).get(reverse("scan_file", args=[scan.pk]))
    assert response.status_code == 200
    assert response["Content-Type"] == "application/octet-stream"
    assert response["Content-Disposition"].startswith("attachment;")
    assert b"".join(response.streaming_content) == scan.file.open("rb").read()
    assert m.AuditEvent.objects.filter(verb=Verb.FILE_DOWNLOADED, actor=viewer, object_id=scan.pk).count() == 1
    assert page_client(outsider).get(reverse("scan_file", args=[scan.pk])).status_code == 404
    assert client.get(reverse("scan_file", args=[scan.pk])).status_code == 302  # to the sign-in page


def test_the_api_hands_out_the_file_to_members_only(scan, viewer, outsider):
    ok = api_client(viewer).get(f"/api/scans/{scan.pk}/file/", HTTP_ACCEPT="application/octet-stream")
    assert ok.status_code == 200
    assert b"".join(ok.streaming_content).startswith(receiver_csv([(75e6, 36.0)])[:40])
    refused = api_client(outsider).get(f"/api/scans/{scan.pk}/file/")
    assert refused.status_code == 404
    assert refused["Content-Type"] == "application/json" and "detail" in refused.json()
    assert APIClient().get(f"/api/scans/{scan.pk}/file/").status_code == 401
    raw = api_client(outsider).get(f"/api/scans/{scan.pk}/file/", HTTP_ACCEPT="application/octet-stream")
    assert raw.status_code == 404 and b"detail" in raw.content


def test_uploaded_files_have_no_public_url(scan, client, viewer):
    stored = scan.file.name
    for who in (client, page_client(viewer)):
        assert who.get("/media/" + stored).status_code == 404


# ----------------------------------------------------------------- request size


def test_an_oversized_request_gets_a_413_that_says_the_limit_and_stores_nothing(settings, engineer, case):
    settings.EMICASE_MAX_REQUEST_BYTES = 1024
    body = b"x" * 4096
    before = m.Capture.objects.count(), m.Scan.objects.count()
    api = api_client(engineer).post("/api/captures/", data=body, content_type="application/octet-stream")
    assert api.status_code == 413
    assert "accepts at most 0 MB" not in api.json()["detail"]  # rounded sizes would hide a small cap
    page = page_client(engineer).post(reverse("capture_new", args=[case.pk]), data=body,
                                      content_type="application/octet-stream")
    assert page.status_code == 413
    assert "Nothing was stored" in page.content.decode()
    assert (m.Capture.objects.count(), m.Scan.objects.count()) == before


# ----------------------------------------------------------------- forms


def test_every_form_that_posts_carries_a_csrf_token():
    """Every template form with method=post has {% csrf_token %} (CSRF is enforced by middleware)."""
    missing = []
    for path in (ROOT / "templates").rglob("*.html"):
        text = path.read_text()
        for form in re.findall(r"<form[^>]*method=\"post\"[^>]*>(.*?)</form>", text, flags=re.S | re.I):
            if "{% csrf_token %}" not in form:
                missing.append(path.name)
    assert missing == []
