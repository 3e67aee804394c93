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
    # An append-only model (the audit log) refuses the add page; every other one shows it.
    append_only = model is models.AuditEvent
    add = admin_client.get(reverse(f"admin:{meta.app_label}_{meta.model_name}_add"))
    assert add.status_code == (403 if append_only else 200)


def test_admin_change_page_of_a_case_loads(admin_client, case):
    assert admin_client.get(reverse("admin:emicase_case_change", args=[case.pk])).status_code == 200
