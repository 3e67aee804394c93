"""Script and HTML typed into every user text field reach every page escaped, never as markup.

Each field gets its own marked payload (``<script>alert('title')</script>``
and the attribute-breaking ``"><img src=x onerror=alert('title')>``), so a
failure says which field leaked and on which page. The charts' JSON sits in
``<script type="application/json">`` and must not contain ``</`` or ``<!--``
either (OWASP XSS prevention: JSON in a script element).
"""

from __future__ import annotations

import html as html_module
import json
import re

import pytest
from django.core.files.uploadedfile import SimpleUploadedFile
from django.urls import reverse
from django.utils.html import escape

from emicase import models as m
from emicase.services import countermeasures as cm_svc
from emicase.services.analysis import analyse_capture
from emicase.services.cases import case_close, case_open, comment_add
from emicase.services.uploads import capture_upload
from tests.hostile.corpus import rows, text
from tests.web.pages_data import analysed_capture, analysed_scan


def script(field: str) -> str:
    return f"<script>alert('{field}')</script>"


def img(field: str) -> str:
    return f"\"><img src=x onerror=alert('{field}')>"


def both(field: str) -> str:
    return script(field) + img(field)


@pytest.fixture(autouse=True)
def _media(settings, tmp_path):
    settings.MEDIA_ROOT = tmp_path


@pytest.fixture
def hostile(team, lead, engineer, product, revision):
    """A team whose every text field a user can type holds script and HTML; returns the ids and values."""
    values: dict[str, str] = {}

    def put(field: str, value: str | None = None) -> str:
        values[field] = value if value is not None else both(field)
        return values[field]

    m.Team.objects.filter(pk=team.pk).update(name=put("team")[:120])
    type(engineer).objects.filter(pk=engineer.pk).update(first_name=put("person"), last_name="")
    m.Product.objects.filter(pk=product.pk).update(
        name=put("product"), description=put("product_desc")
    )
    # 40 characters at most on the labels: the short payload
    m.Revision.objects.filter(pk=revision.pk).update(
        hardware_label=put("hw", script("hw")),
        firmware_label=put("fw", script("fw")),
        notes=put("rev_notes"),
    )
    m.EmissionSource.objects.filter(revision=revision).update(name=put("source", script("source")))
    scan = analysed_scan(
        revision, engineer, [(75e6, 36.0), (400e6, 35.5)], title=put("title"),
        name=put("scan_file", img("scan_file")[:40] + ".csv"), lab=put("lab", script("lab")),
        operator=put("operator", script("operator")),
    )  # fmt: skip
    case = m.Case.objects.get(pk=scan.case_id)
    case.failing_frequencies.update(confirmed=True)
    capture = analysed_capture(
        case, engineer, revision, [(75e6, 50.0), (25e6, 40.0)], location=put("location", script("location")),
        x_mm=10.0, y_mm=20.0,
        tip=put("tip", script("tip")), name=put("capture_file", "<svg onload=alert('capture_file')>.csv"),
    )  # fmt: skip
    m.Capture.objects.filter(pk=capture.pk).update(notes=put("capture_notes"))
    # A file whose header and name are script: its failure message echoes both.
    broken = capture_upload(
        case=case, by=engineer, revision=revision, probe_kind="h_field", tip="loop 10 mm", location="U9",
        file=SimpleUploadedFile(put("broken_file", img("broken")[:40] + ".csv"),
                                text([f"Frequency (MHz),{script('header')}", *rows()])),
    )  # fmt: skip
    assert analyse_capture(broken.pk) == "failed"
    values["header"] = script("header")
    comment_add(case=case, by=engineer, text=put("comment"))
    cm = cm_svc.countermeasure_propose(
        case=case,
        by=engineer,
        kind="filtering",
        description=put("cm_description"),
        revision=revision,
    )
    ff = case.failing_frequencies.order_by("frequency_hz").first()
    v = cm_svc.verification_record_levels(
        countermeasure=cm, by=engineer, levels_after={ff.pk: 20.0}, note=put("verification_note")
    )
    rejected = cm_svc.countermeasure_propose(
        case=case, by=engineer, kind="other", description=put("cm2_description"), revision=revision
    )
    cm_svc.countermeasure_reject(countermeasure=rejected, by=engineer, reason=put("reject_reason"))
    # A second case, closed with a waiver: its reason shows on its page and in the search.
    old = case_open(product=product, title=put("old_title"), by=engineer)
    m.FailingFrequency.objects.create(
        case=old, frequency_hz=75e6, level=38.0, limit_level=30.0, confirmed=True
    )
    case_close(case=old, by=lead, closure="waived", reason=put("waiver"))
    return {
        "values": values, "case": case, "old": old, "scan": scan, "capture": capture, "broken": broken,
        "cm": cm, "verification": v, "ff": ff, "team": m.Team.objects.get(pk=team.pk), "revision": revision,
        "product": product, "source": m.EmissionSource.objects.filter(revision=revision).first(),
    }  # fmt: skip


def _pages(h) -> list[tuple[str, str]]:
    """(who, url) of every page that shows what the fixture typed."""
    case, team = h["case"], h["team"]
    return [
        ("engineer", reverse("home")),
        ("engineer", reverse("products")),
        ("engineer", reverse("product", args=[h["product"].pk])),
        ("engineer", reverse("revision", args=[h["revision"].pk])),
        ("engineer", reverse("source_edit", args=[h["source"].pk])),
        ("engineer", reverse("case", args=[case.pk])),
        ("engineer", reverse("case", args=[h["old"].pk])),
        ("engineer", reverse("case_report", args=[case.pk])),
        ("engineer", reverse("locate", args=[case.pk])),
        ("engineer", reverse("scan", args=[h["scan"].pk])),
        ("engineer", reverse("capture", args=[h["capture"].pk])),
        ("engineer", reverse("capture", args=[h["broken"].pk])),
        ("engineer", reverse("capture_new", args=[case.pk])),
        ("engineer", reverse("case_scan_new", args=[case.pk])),
        ("engineer", reverse("fix", args=[h["cm"].pk])),
        ("engineer", reverse("fix_new", args=[case.pk])),
        ("engineer", reverse("frequency_edit", args=[h["ff"].pk])),
        ("engineer", reverse("search:case_similar", args=[case.pk])),
        ("engineer", reverse("search:similar") + "?frequencies=75+MHz"),
        ("engineer", reverse("log_fail")),
        ("lead", reverse("case_close", args=[case.pk])),
        ("lead", reverse("team_settings", args=[team.slug])),
        ("lead", reverse("team_members", args=[team.slug])),
        ("lead", reverse("team_audit", args=[team.slug])),
    ]


_JSON_SCRIPT = re.compile(r'<script type="application/json"[^>]*>(.*?)</script>', re.S)


def test_every_page_shows_typed_html_as_text(client, hostile, lead, engineer):
    values = hostile["values"]
    seen: set[str] = set()
    charts_with_text = 0
    users = {"lead": lead, "engineer": engineer}
    for who, url in _pages(hostile):
        client.force_login(users[who])
        response = client.get(url)
        assert response.status_code == 200, url
        html = response.content.decode()
        for field, value in values.items():
            for raw in (value, script(field), img(field)):
                assert raw not in html, f"{field} is unescaped on {url}"
            if escape(value) in html or escape(script(field)) in html:
                seen.add(field)
        # no user-made markup at all: our own templates never write an alert() or an <img src=x>
        assert "<img src=x" not in html and "<script>alert" not in html, url
        for payload in _JSON_SCRIPT.findall(html):
            assert "</" not in payload and "<!--" not in payload, url
            if "alert(" in payload:  # a chart labelled with typed text
                charts_with_text += 1
                # As entities: plotly renders a few tags in labels and decodes entities, so the
                # chart shows the characters typed, never markup (emicase.charts._plain).
                assert any(
                    html_module.escape(script(f), quote=False) in json.dumps(json.loads(payload), ensure_ascii=False)
                    for f in values
                )
    # Every field was shown somewhere, escaped: the test looked where the text really is
    # (the scan's operator is kept for the record and shown on no page).
    assert seen == set(values) - {"operator"}, set(values) - seen
    assert charts_with_text >= 3  # source names on the spectra, tips and locations on the board map


def test_chart_json_cannot_close_its_script_element():
    import plotly.graph_objects as go

    from emicase.charts import figure_json

    label = "</script><script>alert(1)</script><!-- -->"
    out = figure_json(go.Figure(go.Scatter(x=[1], y=[2], name=label, text=[label])))
    assert "</" not in out and "<!--" not in out and "<script" not in out
    assert (
        json.loads(out)["data"][0]["name"] == label
    )  # the escapes mean the same inside JSON strings


def test_the_api_returns_typed_html_as_data_not_markup(hostile, engineer):
    from rest_framework.test import APIClient

    api = APIClient()
    api.force_authenticate(engineer)
    response = api.get(f"/api/cases/{hostile['case'].pk}/")
    assert response.status_code == 200 and response["Content-Type"].startswith("application/json")
    assert (
        response.json()["title"] == hostile["values"]["title"]
    )  # stored as typed; escaping is the page's job


def test_a_hostile_file_name_is_quoted_in_the_download(client, hostile, engineer):
    client.force_login(engineer)
    response = client.get(reverse("scan_file", args=[hostile["scan"].pk]))
    assert response.status_code == 200
    disposition = response["Content-Disposition"]
    # RFC 6266: a quoted-string with \" escapes, or an RFC 5987 filename*= form; never a bare quote
    quoted = re.fullmatch(r'attachment; filename="((?:[^"\\]|\\.)*)"', disposition)
    assert quoted or disposition.startswith("attachment; filename*=utf-8''"), disposition
    if quoted:
        assert re.sub(r"\\(.)", r"\1", quoted.group(1)) == hostile["values"]["scan_file"]
    assert "\n" not in disposition and "\r" not in disposition
    b"".join(response.streaming_content)
