"""Products, revisions and their known emission sources; a team's settings."""

from __future__ import annotations

import pytest
from django.urls import reverse

from emicase.forms import parse_tolerance_hz
from emicase.models import EmissionSource, Product, Revision


def test_the_products_page_lists_revisions_and_their_sources(client, engineer, revision):
    client.force_login(engineer)
    html = client.get(reverse("products")).content.decode()
    assert "Test controller" in html and "rev A" in html and "PHY clock (25 MHz)" in html


def test_an_engineer_adds_a_product_and_a_revision_copying_its_sources(
    client, engineer, team, revision
):
    client.force_login(engineer)
    response = client.post(
        reverse("products"), {"team": team.pk, "name": "Valve node", "description": ""}
    )
    product = Product.objects.get(name="Valve node")
    assert response.url == reverse("product", args=[product.pk])
    response = client.post(
        reverse("product", args=[revision.product_id]),
        {
            "hardware_label": "B",
            "firmware_label": "1.1",
            "notes": "",
            "copy_sources_from": revision.pk,
        },
    )
    rev_b = Revision.objects.get(hardware_label="B")
    assert response.url == reverse("revision", args=[rev_b.pk])
    assert list(rev_b.sources.values_list("name", flat=True)) == ["PHY clock"]


def test_a_product_needs_a_name_beside_the_field(client, engineer, team):
    client.force_login(engineer)
    html = client.post(
        reverse("products"), {"team": team.pk, "name": "", "description": "kept text"}
    ).content.decode()
    assert "Give the product a name." in html and "kept text" in html


def test_known_sources_are_added_edited_and_removed(client, engineer, revision):
    client.force_login(engineer)
    url = reverse("revision", args=[revision.pk])
    client.post(
        url, {"name": "Buck U7", "kind": "switching", "nominal_mhz": "2.2", "tolerance": "5 %"}
    )
    buck = EmissionSource.objects.get(name="Buck U7")
    assert buck.nominal_frequency_hz == pytest.approx(2.2e6) and buck.tolerance_hz == pytest.approx(
        110e3
    )
    client.post(
        reverse("source_edit", args=[buck.pk]),
        {"name": "Buck U7", "kind": "switching", "nominal_mhz": "2.1", "tolerance": "100 kHz"},
    )
    buck.refresh_from_db()
    assert buck.nominal_frequency_hz == pytest.approx(2.1e6) and buck.tolerance_hz == pytest.approx(
        100e3
    )
    client.post(reverse("source_delete", args=[buck.pk]))
    assert not EmissionSource.objects.filter(name="Buck U7").exists()


def test_a_tolerance_in_words_is_explained(client, engineer, revision):
    client.force_login(engineer)
    html = client.post(
        reverse("revision", args=[revision.pk]),
        {"name": "Y1", "kind": "clock", "nominal_mhz": "16", "tolerance": "about fifty"},
    ).content.decode()
    assert "Write the tolerance as e.g. &#x27;50 ppm&#x27;" in html and 'value="Y1"' in html


def test_tolerances_convert_to_hz():
    # 50 ppm of 25 MHz = 1250 Hz; 5 % of 2.2 MHz = 110 kHz (definitions of ppm and percent).
    assert parse_tolerance_hz("50 ppm", 25e6) == pytest.approx(1250.0)
    assert parse_tolerance_hz("5 %", 2.2e6) == pytest.approx(110e3)
    assert parse_tolerance_hz("30 kHz", 12e6) == pytest.approx(30e3)
    assert parse_tolerance_hz("1250", 25e6) == pytest.approx(1250.0)


def test_a_viewer_reads_products_but_changes_nothing(client, viewer, team, revision):
    client.force_login(viewer)
    html = client.get(reverse("revision", args=[revision.pk])).content.decode()
    assert "PHY clock" in html and "Add a known source" not in html
    assert (
        client.post(
            reverse("revision", args=[revision.pk]),
            {"name": "X", "kind": "clock", "nominal_mhz": "1", "tolerance": "1 Hz"},
        ).status_code
        == 403
    )
    assert client.post(reverse("products"), {"team": team.pk, "name": "Sneaky"}).status_code == 403
    src = revision.sources.get()
    assert client.post(reverse("source_delete", args=[src.pk])).status_code == 403
    assert revision.sources.count() == 1 and not Product.objects.filter(name="Sneaky").exists()


def test_another_teams_products_are_not_found(client, outsider, revision):
    client.force_login(outsider)
    src = revision.sources.get()
    for url in (
        reverse("product", args=[revision.product_id]),
        reverse("revision", args=[revision.pk]),
        reverse("source_edit", args=[src.pk]),
    ):
        assert client.get(url).status_code == 404
    assert "Test controller" not in client.get(reverse("products")).content.decode()


def test_only_a_lead_changes_the_guard_band(client, lead, engineer, team):
    url = reverse("team_settings", args=[team.slug])
    client.force_login(engineer)
    assert "A team lead changes these." in client.get(url).content.decode()
    assert (
        client.post(url, {"guard_band_db": "6", "frequency_tolerance_pct": "0.5"}).status_code
        == 403
    )
    client.force_login(lead)
    html = client.post(
        url, {"guard_band_db": "-1", "frequency_tolerance_pct": "0.5"}
    ).content.decode()
    assert "Ensure this value is greater than or equal to 0." in html
    client.post(url, {"guard_band_db": "6", "frequency_tolerance_pct": "0.5"})
    team.refresh_from_db()
    assert team.guard_band_db == 6.0


def test_another_teams_settings_are_not_found(client, outsider, team):
    client.force_login(outsider)
    assert client.get(reverse("team_settings", args=[team.slug])).status_code == 404
