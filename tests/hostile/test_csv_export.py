"""The case's CSV export neutralises formula-looking text and leaves numbers alone.

Common practice after OWASP's "CSV Injection" page: a cell that starts with
= + - @ tab or CR gets a leading apostrophe, so a spreadsheet shows it as text.
"""

from __future__ import annotations

import csv
import io
import re

import pytest
from django.urls import reverse

from emicase.models import FailingFrequency
from emicase.services import countermeasures as cm_svc
from emicase.services.cases import case_open
from emicase.views import FORMULA_LEAD, csv_safe
from tests.hostile.corpus import FORMULAS

PLAIN_NUMBER = re.compile(r"-?\d+(\.\d+)?")


@pytest.mark.parametrize("text", [*FORMULAS, "＝1+1", "-", "+", "@", "=", "-3.2x", "-1-1"])
def test_formula_looking_text_gets_an_apostrophe(text):
    assert csv_safe(text) == "'" + text


# A leading blank is not a formula lead (a spreadsheet keeps " =1" as text; from memory).
@pytest.mark.parametrize(
    "value", ["-3.2", "-40", "-1e-3", "plain", "3-2", " =1", "", -3.2, -40, 0.0, True, None]
)
def test_numbers_and_harmless_text_pass_unchanged(value):
    assert csv_safe(value) == value


def test_the_export_neutralises_every_user_text_and_keeps_negative_margins(
    client, engineer, product, revision
):
    case = case_open(product=product, title=FORMULAS[0], by=engineer)
    # 38.5 dBµV/m against the CISPR 32 class B 10 m limit of 30 (Table A.4 via DOMAIN.md): margin −8.5 dB.
    ff = FailingFrequency.objects.create(
        case=case, frequency_hz=75e6, level=38.5, limit_level=30.0, confirmed=True
    )
    for text in FORMULAS[1:]:
        cm = cm_svc.countermeasure_propose(
            case=case, by=engineer, kind="other", description=text, revision=revision
        )
        cm_svc.verification_record_levels(
            countermeasure=cm, by=engineer, levels_after={ff.pk: 20.0}, note=text
        )
    client.force_login(engineer)
    response = client.get(reverse("case_report_csv", args=[case.pk]))
    assert response.status_code == 200
    rows = list(csv.reader(io.StringIO(response.content.decode("utf-8-sig"), newline="")))
    cells = [c for row in rows[1:] for c in row]
    dangerous = [c for c in cells if c.startswith(FORMULA_LEAD) and not PLAIN_NUMBER.fullmatch(c)]
    assert dangerous == []
    assert "'" + FORMULAS[0] in cells  # the title, shown as text
    for text in FORMULAS[1:]:
        stored = text.strip()  # the services strip descriptions and notes
        expected = "'" + stored if stored.startswith(FORMULA_LEAD) else stored
        assert cells.count(expected) >= 2, text  # description and note of its verification row
    assert "-8.5" in cells  # the margin stays a number a spreadsheet can sum
    assert len(rows) == 1 + 1 + len(
        FORMULAS[1:]
    )  # header, the failing row, one row per verification
