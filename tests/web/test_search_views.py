"""The "similar past problems" pages and /api/similar-problems/: words on the page, isolation, errors."""

from __future__ import annotations

import pytest
from django.core.files.uploadedfile import SimpleUploadedFile
from django.urls import reverse

from emicase.models import Scan
from tests.web.test_search import build_history
from tests.web.traces import receiver_csv

API = "/api/similar-problems/"
FAMILY = "48 MHz, 96 MHz, 144.2 MHz"


@pytest.fixture
def history(product, engineer, lead):
    return build_history(product, engineer, lead)


@pytest.fixture
def signed_in(client):
    def sign_in(user):
        client.force_login(user)
        return client

    return sign_in


def test_the_page_explains_a_typed_search_in_words(signed_in, engineer, history):
    page = signed_in(engineer).get(reverse("search:similar"), {"frequencies": FAMILY})
    assert page.status_code == 200
    html = page.content.decode()
    assert html.index("Soil probe 48 MHz family") < html.index(
        "Vent controller, one line at 96 MHz"
    )
    assert "Same 48.02 MHz family: orders 1, 2, 3 here, orders 1, 2, 3, 4 there" in html
    assert "144.2 MHz matched 144 MHz within 0.14 %" in html
    # Its fix: every failing frequency 9 dB quieter, read at the worst one (48 MHz).
    assert "9.0 dB quieter at 48 MHz (mean 9.0 dB over 4 frequencies)" in html
    assert "least margin before the fix" in html  # the rule behind the dB figure
    assert "pre-compliance only" in html and "isolation transformer" in html
    assert "Gateway 25 MHz PHY family" not in html


def test_a_viewer_may_search_too(signed_in, viewer, history):
    page = signed_in(viewer).get(reverse("search:similar"), {"frequencies": FAMILY})
    assert page.status_code == 200 and "Soil probe 48 MHz family" in page.content.decode()


def test_nonsense_is_refused_beside_its_field(signed_in, engineer, history):
    page = signed_in(engineer).post(reverse("search:similar"), {"frequencies": "48 MHzz, 96 MHz"})
    html = page.content.decode()
    assert page.status_code == 200
    assert "&#x27;MHzz&#x27; (character 4) is not a frequency" in html
    assert "Soil probe" not in html
    page = signed_in(engineer).post(
        reverse("search:similar"), {"frequencies": "48 MHz", "tolerance": "lots"}
    )
    assert "tolerance &#x27;lots&#x27; is not a tolerance" in page.content.decode()


def test_a_trace_file_is_searched_with_and_not_stored(
    signed_in, engineer, history, settings, tmp_path
):
    settings.MEDIA_ROOT = tmp_path
    scans = Scan.objects.count()
    trace = SimpleUploadedFile(
        "bench.csv", receiver_csv([(48e6, 45.0), (96e6, 44.0), (144e6, 42.0)])
    )
    page = signed_in(engineer).post(reverse("search:similar"), {"trace": trace})
    html = page.content.decode()
    assert page.status_code == 200
    assert "Searched with trace bench.csv" in html
    assert html.index("Soil probe 48 MHz family") < html.index("Vent controller")
    assert Scan.objects.count() == scans and not any(tmp_path.iterdir())


def test_a_binary_file_is_refused(signed_in, engineer, history):
    junk = SimpleUploadedFile("photo.csv", b"\x89PNG\r\n\x1a\n" + bytes(200))
    page = signed_in(engineer).post(reverse("search:similar"), {"trace": junk})
    assert "is not a text trace" in page.content.decode()


def test_the_case_page_searches_with_the_cases_frequencies_and_leaves_it_out(
    signed_in, engineer, history
):
    case = history["family"]
    page = signed_in(engineer).get(reverse("search:case_similar", args=[case.pk]))
    html = page.content.decode()
    assert page.status_code == 200
    assert f"Searched with case #{case.pk} Soil probe 48 MHz family" in html
    assert "Vent controller, one line at 96 MHz" in html
    assert html.count("Soil probe 48 MHz family") == 2  # the title and the query line, not a hit
    filtered = signed_in(engineer).get(
        reverse("search:case_similar", args=[case.pk]), {"emission_kind": "conducted"}
    )
    assert "Vent controller" not in filtered.content.decode()


def test_an_outsider_sees_nothing_of_ours(signed_in, outsider, history):
    client = signed_in(outsider)
    assert (
        client.get(reverse("search:case_similar", args=[history["family"].pk])).status_code == 404
    )
    page = client.get(reverse("search:similar"), {"frequencies": FAMILY})
    assert page.status_code == 200 and "Soil probe" not in page.content.decode()
    assert client.get(API, {"case": history["family"].pk}).status_code == 404
    assert client.get(API, {"frequencies": FAMILY}).json()["results"] == []


def test_signing_in_is_required(client, history):
    assert client.get(reverse("search:similar")).status_code == 302
    assert client.get(API, {"frequencies": FAMILY}).status_code in (401, 403)


# ----------------------------------------------------------------- the API


def test_the_api_ranks_explains_and_reports_fixes(signed_in, engineer, history):
    body = signed_in(engineer).get(API, {"frequencies": FAMILY}).json()
    assert body["query"]["kind"] == "frequencies" and body["query"]["tolerance"] == "0.5 %"
    assert body["query"]["frequencies_hz"] == [48e6, 96e6, 144.2e6]
    first, second = body["results"]
    assert first["case"]["title"] == "Soil probe 48 MHz family" and second["case"][
        "title"
    ].startswith("Vent")
    assert first["score"] > second["score"]
    assert first["case"]["url"].endswith(f"/cases/{history['family'].pk}/")
    assert first["case"]["outcome"] == "Fixed" and first["matched"]["source"] == "failing"
    orders = {round(m["query_hz"] / 1e6, 1): m["order"] for m in first["matches"]}
    assert orders == {48.0: 1, 96.0: 2, 144.2: 3}
    (fix,) = first["fixes"]
    assert fix["closed_the_case"] and fix["improvement_db"] == pytest.approx(9.0)
    assert fix["improvement_at_hz"] == 48e6 and fix["measured_frequencies"] == 4
    assert "144.2 MHz matched 144 MHz within 0.14 %" in first["explanation"]


def test_the_api_filters_and_limits(signed_in, engineer, history):
    client = signed_in(engineer)
    assert [
        r["case"]["title"]
        for r in client.get(API, {"frequencies": FAMILY, "limit": 1}).json()["results"]
    ] == ["Soil probe 48 MHz family"]
    body = client.get(API, {"frequencies": FAMILY, "opened_from": "2025-01-01"}).json()
    assert [r["case"]["title"] for r in body["results"]] == ["Vent controller, one line at 96 MHz"]


@pytest.mark.parametrize(
    "params,field,words",
    [
        ({"frequencies": "48 MHz, fast"}, "frequencies", "'fast' (character 9) is not a frequency"),
        ({"frequencies": "48"}, "frequencies", "is 48 Hz, outside 9 kHz to 40 GHz"),
        ({"frequencies": FAMILY, "tolerance": "30 %"}, "tolerance", "wider than 20 %"),
        ({}, "non_field_errors", "Give either a case or frequencies"),
        ({"frequencies": FAMILY, "limit": 500}, "limit", ""),
        (
            {"frequencies": FAMILY, "opened_from": "2025-02-01", "opened_to": "2025-01-01"},
            "opened_to",
            "before",
        ),
    ],
)
def test_the_api_refuses_nonsense_field_by_field(signed_in, engineer, params, field, words):
    answer = signed_in(engineer).get(API, params)
    assert answer.status_code == 400
    assert words in " ".join(answer.json()[field])


def test_the_api_searches_with_a_case_and_with_a_posted_trace(signed_in, engineer, history):
    client = signed_in(engineer)
    body = client.get(API, {"case": history["family"].pk}).json()
    assert body["query"]["kind"] == "case"
    assert [r["case"]["title"] for r in body["results"]] == ["Vent controller, one line at 96 MHz"]
    trace = SimpleUploadedFile(
        "bench.csv", receiver_csv([(48e6, 45.0), (96e6, 44.0), (144e6, 42.0)])
    )
    body = client.post(API, {"trace": trace, "fixed_only": "true"}).json()
    assert body["query"]["kind"] == "trace"
    assert body["results"][0]["case"]["title"] == "Soil probe 48 MHz family"


def test_the_api_is_in_the_schema(signed_in, engineer):
    schema = signed_in(engineer).get("/api/schema/", {"format": "json"}).json()
    operation = schema["paths"]["/api/similar-problems/"]
    assert {p["name"] for p in operation["get"]["parameters"]} >= {
        "case",
        "frequencies",
        "tolerance",
        "limit",
    }
    assert "post" in operation
