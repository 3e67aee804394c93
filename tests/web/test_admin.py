"""Every model has an admin, and its pages load."""

import pytest
from django.contrib import admin
from django.urls import reverse

from emicase import models


def test_every_model_is_registered():
    ours = {m for m in vars(models).values() if isinstance(m, type) and issubclass(m, models.models.Model)
            and not m._meta.abstract and m._meta.app_label == "emicase"}
    assert ours, "found no models to check"
    assert ours - set(admin.site._registry) == set()


@pytest.mark.parametrize("model", [m for m in admin.site._registry if m._meta.app_label == "emicase"],
                         ids=lambda m: m.__name__)
def test_admin_list_and_add_pages_load(admin_client, model, case):
    meta = model._meta
    assert admin_client.get(reverse(f"admin:{meta.app_label}_{meta.model_name}_changelist")).status_code == 200
    # The append-only audit log and the derived search index refuse the add page; every other
    # model shows it.
    view_only = model in (models.AuditEvent, models.SignatureItem, models.SignatureRow)
    add = admin_client.get(reverse(f"admin:{meta.app_label}_{meta.model_name}_add"))
    assert add.status_code == (403 if view_only else 200)


def test_the_search_index_is_shown_but_not_editable_in_the_admin(admin_client, case):
    from analysis.signature import signature_from_frequencies
    from emicase.services.search import _store_item

    item = _store_item(
        case=case, source="failing", signature=signature_from_frequencies([48e6, 96e6, 144e6])
    )
    page = admin_client.get(reverse("admin:emicase_signatureitem_change", args=[item.pk]))
    assert page.status_code == 200 and b'name="peak_count"' not in page.content
    before = (item.peak_count, bytes(item.packed_hz))
    posted = admin_client.post(
        reverse("admin:emicase_signatureitem_change", args=[item.pk]), {"peak_count": 7}
    )
    assert posted.status_code == 403
    item.refresh_from_db()
    assert (item.peak_count, bytes(item.packed_hz)) == before
    delete = reverse("admin:emicase_signatureitem_delete", args=[item.pk])
    assert admin_client.post(delete, {"post": "yes"}).status_code == 403
    assert models.SignatureItem.objects.filter(pk=item.pk).exists()


def test_admin_change_page_of_a_case_loads(admin_client, case):
    assert admin_client.get(reverse("admin:emicase_case_change", args=[case.pk])).status_code == 200
