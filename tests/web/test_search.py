"""The signature search ranks past cases as the score documented in analysis/signature.py says.

Histories are built by hand: cases with failing frequencies (closed through
the services, which index them) or with a scan row carrying a signature.
Expected scores are worked out here from the documented score:

    credit of a direct match = 1 − 0.5·|q − o|/tol, tol = max(rel·max(q, o), abs)
    family credit = 0.7 × the same closeness to n·g (g: the other's shared fundamental)
    score = 0.75·Σ query credits / M + 0.25·Σ other credits / max(K, M)

The same tests run on SQLite and on PostgreSQL (the suite's two
configurations), so the exact expected rankings hold on both.
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest
from django.utils import timezone

from analysis.signature import Signature
from emicase.models import (
    Case,
    FailingFrequency,
    Product,
    Revision,
    Scan,
    SignatureItem,
    SignatureRow,
    Team,
)
from emicase.services import search as search_svc
from emicase.services.cases import case_close, case_open
from emicase.services.countermeasures import (
    countermeasure_propose,
    countermeasure_start_trial,
    countermeasure_verify,
    verification_record_levels,
)

MHZ = 1e6
LIMIT = 30.0  # CISPR 32 Table A.4 via DOMAIN.md: class B at 10 m, 30 dBµV/m below 230 MHz
LEVEL = 36.0


# ----------------------------------------------------------------- building histories


def past_case(
    *,
    product: Product,
    by,
    lead,
    title: str,
    failing_mhz: list[float] = (),
    unit: str = "dBuV/m",
    close: str | None = "fixed",
    improvement_db: float = 9.0,
    opened: dt.date | None = None,
    scan_signature: Signature | None = None,
    scan_kind: str = "radiated",
) -> Case:
    """A case of ``product`` with failing frequencies at LEVEL over a 30 dB limit, optionally a scan
    whose analysis gave ``scan_signature``, and optionally closed: fixed by a countermeasure that
    made every failing frequency ``improvement_db`` quieter (verified by hand), or waived."""
    case = case_open(product=product, title=title, by=by)
    if opened is not None:
        at = timezone.make_aware(dt.datetime.combine(opened, dt.time(12)))
        Case.objects.filter(pk=case.pk).update(opened_at=at)
        case.refresh_from_db()
    failing = [
        FailingFrequency.objects.create(
            case=case,
            frequency_hz=f * MHZ,
            level=LEVEL - 0.1 * i,
            limit_level=LIMIT,
            unit=unit,
            confirmed=True,
        )
        for i, f in enumerate(failing_mhz)
    ]
    revision = product.revisions.order_by("id").first() or Revision.objects.create(
        product=product, hardware_label="A"
    )
    if scan_signature is not None:
        scan = Scan.objects.create(
            revision=revision,
            case=case,
            file="uploads/scan/test.csv",
            original_name=f"{title}.csv",
            uploaded_by=by,
            emission_kind=scan_kind,
            limit_id="cispr32-b-rad-10m",
            measured_on=dt.date.today(),
            status="done",
            results={"signature": scan_signature.to_dict()},
            **({"distance_m": 10.0} if scan_kind == "radiated" else {}),
        )
        search_svc.signature_index_scan(scan=scan, signature=scan_signature)
    if close == "fixed":
        cm = countermeasure_propose(
            case=case, by=by, kind="firmware", description=f"fix of {title}", revision=revision
        )
        countermeasure_start_trial(countermeasure=cm, by=by)
        v = verification_record_levels(
            countermeasure=cm,
            by=by,
            levels_after={ff.pk: ff.level - improvement_db for ff in failing},
        )
        countermeasure_verify(
            countermeasure=cm, verification=v, by=by, reason="accepted in the test"
        )
        case_close(case=case, by=lead, closure="fixed", countermeasure=cm)
    elif close == "waived":
        case_close(case=case, by=lead, closure="waived", reason="accepted by the customer")
    case.refresh_from_db()
    return case


def signature(peaks_mhz, fundamentals_mhz=()) -> Signature:
    f = np.array(sorted(peaks_mhz), dtype=float) * MHZ
    return Signature(
        frequency_hz=f,
        level=np.full(f.size, np.nan),
        fundamentals_hz=np.array(sorted(fundamentals_mhz), dtype=float) * MHZ,
    )


def typed(user, text: str, tolerance: str = "") -> search_svc.Query:
    return search_svc.query_from_frequencies(text=text, tolerance=tolerance, user=user)


def titles(user, query, **filters) -> list[str]:
    result = search_svc.search(user=user, query=query, filters=search_svc.Filters(**filters))
    return [h.case.title for h in result.hits]


def closeness(q: float, o: float, rel: float = 0.005) -> float:
    """The documented credit of a direct match (analysis/signature.py)."""
    tol = rel * max(q, o)
    return 1 - 0.5 * abs(q - o) / tol if abs(q - o) <= tol else 0.0


def build_history(product, engineer, lead) -> dict[str, Case]:
    """The product owner's story, built by hand (titles say what each case is)."""
    return {
        "family": past_case(
            product=product,
            by=engineer,
            lead=lead,
            title="Soil probe 48 MHz family",
            failing_mhz=[48, 96, 144, 192],
            opened=dt.date(2024, 3, 1),
        ),
        "single": past_case(
            product=product,
            by=engineer,
            lead=lead,
            title="Vent controller, one line at 96 MHz",
            failing_mhz=[40, 80, 96, 120, 160],
            opened=dt.date(2025, 5, 1),
        ),
        "unrelated": past_case(
            product=product,
            by=engineer,
            lead=lead,
            title="Gateway 25 MHz PHY family",
            failing_mhz=[75, 125, 175, 225],
            opened=dt.date(2025, 6, 1),
        ),
    }


@pytest.fixture
def history(product, engineer, lead):
    return build_history(product, engineer, lead)


# ----------------------------------------------------------------- ranking rules


def test_a_family_outranks_a_single_common_frequency(history, engineer):
    result = search_svc.search(user=engineer, query=typed(engineer, "48 MHz, 96 MHz, 144.2 MHz"))
    assert [h.case.title for h in result.hits] == [
        "Soil probe 48 MHz family",
        "Vent controller, one line at 96 MHz",
    ]
    family, single = result.hits
    # Worked example: the single coincidence (96 MHz, exact) earns 1 of 3 query credits and
    # 1 of max(5, 3) other credits: 0.75/3 + 0.25/5 = 0.3.
    assert single.score == pytest.approx(0.75 / 3 + 0.25 / 5, abs=1e-9)
    assert family.score > 0.9 > 0.3
    # The page's words say why, with the drift of 144.2 against 144.
    assert (
        "same 48.02 MHz family: orders 1, 2, 3 here, orders 1, 2, 3, 4 there"
        in family.similarity.explanation
    )
    assert "144.2 MHz matched 144 MHz within 0.14 %" in family.similarity.explanation
    orders = {round(m.query_hz / MHZ, 1): m.order for m in family.similarity.matches}
    assert orders == {48.0: 1, 96.0: 2, 144.2: 3}


def test_a_shared_fundamental_finds_other_orders_of_the_family(product, engineer, lead, history):
    """A new case failing at orders 5, 6, 7 of 48 MHz (its scan found the 48 MHz family) finds the
    soil probe, which failed at orders 1 to 4: no frequency in common, only the family."""
    new = past_case(
        product=product,
        by=engineer,
        lead=lead,
        title="New board",
        failing_mhz=[240, 288, 336],
        close=None,
        scan_signature=signature([240, 288, 336, 384], [48]),
    )
    query = search_svc.query_from_case(case=new)
    assert query.signature.fundamentals_hz.tolist() == [pytest.approx(48 * MHZ, rel=1e-12)]
    result = search_svc.search(user=engineer, query=query)
    assert [h.case.title for h in result.hits] == ["Soil probe 48 MHz family"]
    # Worked example: each query frequency earns 0.7 (family credit, exact on n·48 MHz) and so
    # does each of the soil probe's four peaks on the query's 48 MHz family:
    # 0.75·(3·0.7)/3 + 0.25·(4·0.7)/4 = 0.7.
    assert result.hits[0].score == pytest.approx(0.7, abs=1e-9)
    assert (
        "same 48 MHz family: orders 5, 6, 7 here, orders 1, 2, 3, 4 there"
        in result.hits[0].similarity.explanation
    )


def test_drift_within_tolerance_matches_and_beyond_it_does_not(product, engineer, lead):
    past_case(product=product, by=engineer, lead=lead, title="drift 0.4 %", failing_mhz=[100.4])
    past_case(product=product, by=engineer, lead=lead, title="drift 0.6 %", failing_mhz=[100.6])
    result = search_svc.search(user=engineer, query=typed(engineer, "100 MHz", "0.5 %"))
    assert [h.case.title for h in result.hits] == ["drift 0.4 %"]
    # Worked example: one query and one other frequency, credit 1 − 0.5·0.4/(0.005·100.4).
    assert result.hits[0].score == pytest.approx(closeness(100e6, 100.4e6), abs=1e-9)
    # An absolute tolerance of 200 kHz leaves the 0.4 MHz drift out; 1 MHz takes both.
    assert titles(engineer, typed(engineer, "100 MHz", "200 kHz")) == []
    assert titles(engineer, typed(engineer, "100 MHz", "1 MHz")) == ["drift 0.4 %", "drift 0.6 %"]


def test_another_teams_case_never_appears_unless_shared_and_closed(
    other_team, outsider, engineer, product, lead
):
    theirs = Product.objects.create(team=other_team, name="Their logger")
    past_case(
        product=theirs,
        by=outsider,
        lead=outsider,
        title="their closed 48 MHz case",
        failing_mhz=[48, 96, 144],
    )
    # Open cases are in the index through their analysed scans.
    past_case(
        product=theirs,
        by=outsider,
        lead=outsider,
        title="their open 48 MHz case",
        failing_mhz=[48, 96, 144],
        close=None,
        scan_signature=signature([48, 96, 144], [48]),
    )
    past_case(
        product=product,
        by=engineer,
        lead=lead,
        title="our open 48 MHz case",
        failing_mhz=[48, 96, 144],
        close=None,
        scan_signature=signature([48, 96, 144], [48]),
    )
    query = typed(engineer, "48 MHz, 96 MHz, 144 MHz")
    assert titles(engineer, query) == ["our open 48 MHz case"]
    # The outsider's own search never shows ours, open or not.
    assert titles(outsider, typed(outsider, "48 MHz, 96 MHz, 144 MHz")) == [
        "their open 48 MHz case",
        "their closed 48 MHz case",
    ]
    Team.objects.filter(pk=other_team.pk).update(share_closed_cases=True)
    result = search_svc.search(user=engineer, query=query)
    assert [(h.case.title, h.shared) for h in result.hits] == [
        ("our open 48 MHz case", False),
        ("their closed 48 MHz case", True),
    ]
    # Sharing is one way: our team does not share, so the outsider still sees none of ours.
    assert "our open 48 MHz case" not in titles(
        outsider, typed(outsider, "48 MHz, 96 MHz, 144 MHz")
    )


def test_a_user_of_no_team_finds_nothing(history, make_user):
    nobody = make_user("nobody")
    assert titles(nobody, typed(nobody, "48 MHz, 96 MHz, 144 MHz")) == []


def test_a_reopened_case_is_checked_against_its_own_row(
    history, engineer, lead, other_team, outsider
):
    """The index's copy of the outcome may lag (reopening does not update it): the hit is checked again."""
    from emicase.services.cases import case_reopen

    Team.objects.filter(pk=other_team.pk).update(share_closed_cases=True)
    theirs = Product.objects.create(team=other_team, name="Their logger")
    shared = past_case(
        product=theirs, by=outsider, lead=outsider, title="theirs", failing_mhz=[48, 96, 144]
    )
    query = typed(engineer, "48 MHz, 96 MHz, 144 MHz")
    assert "theirs" in titles(engineer, query)
    case_reopen(case=shared, by=outsider, reason="the fix did not hold")
    assert "theirs" not in titles(engineer, query)
    assert "theirs" not in titles(engineer, query, fixed_only=True)


def test_a_cases_own_search_leaves_it_out(history, engineer):
    query = search_svc.query_from_case(case=history["family"])
    assert query.case_id == history["family"].pk
    assert "Soil probe 48 MHz family" not in titles(engineer, query)
    assert titles(engineer, query) == ["Vent controller, one line at 96 MHz"]


def test_filters_narrow_by_outcome_kind_date_and_product(product, engineer, lead, team):
    past_case(
        product=product,
        by=engineer,
        lead=lead,
        title="fixed radiated",
        failing_mhz=[48, 96, 144],
        opened=dt.date(2024, 1, 10),
    )
    past_case(
        product=product,
        by=engineer,
        lead=lead,
        title="waived radiated",
        failing_mhz=[48, 96, 144],
        close="waived",
        opened=dt.date(2025, 1, 10),
    )
    other = Product.objects.create(team=team, name="Second product")
    past_case(
        product=other,
        by=engineer,
        lead=lead,
        title="waived conducted",
        failing_mhz=[48, 96, 144],
        unit="dBuV",
        close="waived",
        opened=dt.date(2025, 6, 10),
    )
    query = typed(engineer, "48 MHz, 96 MHz, 144 MHz")
    assert set(titles(engineer, query)) == {"fixed radiated", "waived radiated", "waived conducted"}
    assert titles(engineer, query, fixed_only=True) == ["fixed radiated"]
    assert set(titles(engineer, query, emission_kind="radiated")) == {
        "fixed radiated",
        "waived radiated",
    }
    assert titles(engineer, query, emission_kind="conducted") == ["waived conducted"]
    assert titles(
        engineer, query, opened_from=dt.date(2024, 6, 1), opened_to=dt.date(2025, 3, 1)
    ) == ["waived radiated"]
    assert titles(engineer, query, product_id=other.pk) == ["waived conducted"]
    assert titles(engineer, query, product_id=product.pk, fixed_only=True) == ["fixed radiated"]


# ----------------------------------------------------------------- the same on both databases


def test_the_same_query_gives_the_same_ranking_on_sqlite_and_postgresql(
    history, product, engineer, lead
):
    """Exact titles and scores (1e-9), run as is in both suite configurations."""
    past_case(
        product=product,
        by=engineer,
        lead=lead,
        title="Exact 48 MHz triple",
        failing_mhz=[48, 96, 144],
    )
    past_case(
        product=product,
        by=engineer,
        lead=lead,
        title="Drifted 48 MHz pair",
        failing_mhz=[48.1, 96.2],
    )
    result = search_svc.search(user=engineer, query=typed(engineer, "48 MHz, 96 MHz, 144 MHz"))
    got = [(h.case.title, h.score) for h in result.hits]
    # Worked examples. The query's fundamental is exactly 48 MHz (orders 1, 2, 3 exact).
    # Exact triple: every credit 1 → 1.
    # Soil probe: query credits 1, 1, 1; other credits 1, 1, 1 and 0.7 for 192 MHz (order 4 on
    # the shared 48 MHz family) → 0.75 + 0.25·3.7/4.
    # Drifted pair (no family: two frequencies make none): direct credits at 48.1 and 96.2 MHz.
    # Vent controller: 96 MHz only → 0.75/3 + 0.25/5.
    pair = closeness(48e6, 48.1e6) + closeness(96e6, 96.2e6)
    expected = [
        ("Exact 48 MHz triple", 1.0),
        ("Soil probe 48 MHz family", 0.75 + 0.25 * 3.7 / 4),
        ("Drifted 48 MHz pair", 0.75 * pair / 3 + 0.25 * pair / 3),
        ("Vent controller, one line at 96 MHz", 0.75 / 3 + 0.25 / 5),
    ]
    assert [t for t, _ in got] == [t for t, _ in expected]
    for (_, score), (_, want) in zip(got, expected, strict=True):
        assert score == pytest.approx(want, abs=1e-9)


# ----------------------------------------------------------------- the index


def test_closing_indexes_the_failing_frequencies_and_marks_the_outcome(product, engineer, lead):
    case = past_case(
        product=product,
        by=engineer,
        lead=lead,
        title="scan and failing",
        failing_mhz=[48, 96, 144],
        close=None,
        scan_signature=signature([48, 96, 144, 200], [48]),
    )
    assert list(SignatureItem.objects.filter(case=case).values_list("source", flat=True)) == [
        "scan"
    ]
    assert set(SignatureRow.objects.filter(case=case).values_list("outcome", flat=True)) == {0}
    cm = countermeasure_propose(
        case=case,
        by=engineer,
        kind="filtering",
        description="RC on the clock",
        revision=product.revisions.first(),
    )
    countermeasure_start_trial(countermeasure=cm, by=engineer)
    v = verification_record_levels(
        countermeasure=cm,
        by=engineer,
        levels_after={ff.pk: 25.0 for ff in case.failing_frequencies.all()},
    )
    countermeasure_verify(countermeasure=cm, verification=v, by=engineer)
    case_close(case=case, by=lead, closure="fixed", countermeasure=cm)
    items = {i.source: i for i in SignatureItem.objects.filter(case=case)}
    assert set(items) == {"scan", "failing"} and items["failing"].emission_kind == "radiated"
    failing_rows = SignatureRow.objects.filter(item=items["failing"]).order_by(
        "role", "frequency_hz"
    )
    assert [(r.role, r.frequency_hz) for r in failing_rows] == [
        (0, 48e6),
        (0, 96e6),
        (0, 144e6),
        (1, 48e6),
    ]
    assert set(SignatureRow.objects.filter(case=case).values_list("outcome", flat=True)) == {1}
    # Rebuilding from the stored results gives the same rows.
    before = sorted(
        SignatureRow.objects.filter(case=case).values_list("role", "frequency_hz", "outcome")
    )
    assert search_svc.signature_reindex_case(case=case) == 2
    assert (
        sorted(
            SignatureRow.objects.filter(case=case).values_list("role", "frequency_hz", "outcome")
        )
        == before
    )


def test_a_fix_reports_its_improvement_at_the_worst_failing_frequency(history, engineer):
    result = search_svc.search(user=engineer, query=typed(engineer, "48 MHz, 96 MHz, 144 MHz"))
    (fix,) = result.hits[0].fixes
    assert fix.closed_the_case
    # Every failing frequency was made 9 dB quieter; the worst (least margin) is the loudest, 48 MHz.
    assert fix.improvement_db == pytest.approx(9.0) and fix.mean_improvement_db == pytest.approx(
        9.0
    )
    assert fix.at_frequency_hz == 48e6 and fix.measured == 4


def test_query_ranges_contain_every_partner_the_score_can_match():
    """Property: a case the score credits has a peak in a query frequency's range or a fundamental
    in a query fundamental's range (the candidate query's two kinds of range)."""
    from analysis.frequencies import Tolerance
    from analysis.signature import similarity

    rng = np.random.default_rng(7)
    credited = 0
    for rel, ab in ((0.005, 0.0), (0.0, 200e3), (0.002, 50e3)):
        tol = Tolerance(rel_tol=rel, abs_tol_hz=ab, text="")
        query = signature(rng.uniform(30, 1000, 6), [48.0])
        ranges = search_svc.query_ranges(query, tol)
        peak_ranges, fundamental_ranges = (
            ranges[: query.frequency_hz.size],
            ranges[query.frequency_hz.size :],
        )
        other_peaks = np.concatenate(
            [
                rng.uniform(30, 1000, 400),
                48.0 * np.arange(1, 21) * (1 + rng.uniform(-0.012, 0.012, 20)),
            ]
        )
        for f in other_peaks:
            other = signature(
                [f], [48.0 * (1 + rng.uniform(-rel, rel))] if rng.random() < 0.5 else []
            )
            if similarity(query, other, rel_tol=rel, abs_tol_hz=ab).score > 0:
                peak = other.frequency_hz[:, None]
                fundamental = other.fundamentals_hz[:, None]
                inside = np.any(
                    (peak_ranges[:, 0] <= peak) & (peak <= peak_ranges[:, 2])
                ) or np.any(
                    (fundamental_ranges[:, 0] <= fundamental)
                    & (fundamental <= fundamental_ranges[:, 2])
                )
                assert inside, (rel, ab, f)
                credited += 1
    assert credited > 60  # the property was checked on many credited cases, not vacuously


def test_analysing_a_scan_or_capture_indexes_it_and_an_after_scan_not(
    settings, tmp_path, revision, engineer, case
):
    """Through the real engine, in this process: the index is written where the results are stored."""
    from django.core.files.uploadedfile import SimpleUploadedFile

    from emicase.services.analysis import analyse_capture, analyse_scan
    from emicase.services.countermeasures import verification_by_scan
    from emicase.services.uploads import capture_upload, scan_upload
    from tests.web.traces import receiver_csv

    settings.MEDIA_ROOT = tmp_path
    fields = {
        "emission_kind": "radiated",
        "limit_id": "cispr32-b-rad-10m",
        "distance_m": 10.0,
        "measured_on": dt.date.today(),
    }
    tones = [(75e6, 36.0), (125e6, 34.0), (175e6, 32.0), (225e6, 31.0)]  # odd orders of 25 MHz
    scan = scan_upload(
        revision=revision,
        case=case,
        by=engineer,
        file=SimpleUploadedFile("s.csv", receiver_csv(tones)),
        **fields,
    )
    assert analyse_scan(scan.pk) == "done"
    item = SignatureItem.objects.get(scan=scan)
    assert (item.source, item.emission_kind) == ("scan", "radiated")
    peaks = SignatureRow.objects.filter(item=item, role=0).values_list("frequency_hz", flat=True)
    assert {round(f / MHZ) for f in peaks} == {75, 125, 175, 225}
    (fundamental,) = SignatureRow.objects.filter(item=item, role=1).values_list(
        "frequency_hz", flat=True
    )
    assert fundamental == pytest.approx(25e6, rel=2e-3)  # the comb 3, 5, 7, 9 × 25 MHz
    # An open case of the team is found through its scan.
    assert titles(engineer, typed(engineer, "75 MHz, 125 MHz")) == [case.title]

    capture = capture_upload(
        case=case,
        file=SimpleUploadedFile("c.csv", receiver_csv(tones)),
        by=engineer,
        revision=revision,
        probe_kind="h_field",
        tip="loop 10 mm",
        location="U4",
    )
    assert analyse_capture(capture.pk) == "done"
    assert SignatureItem.objects.get(capture=capture).emission_kind == ""

    cm = countermeasure_propose(
        case=case, by=engineer, kind="ferrite", description="choke", revision=revision
    )
    v = verification_by_scan(
        countermeasure=cm,
        by=engineer,
        file=SimpleUploadedFile("a.csv", receiver_csv(tones[:1])),
        **fields,
    )
    assert analyse_scan(v.after_scan_id) == "done"
    assert not SignatureItem.objects.filter(scan_id=v.after_scan_id).exists()


def _unpacked(item: SignatureItem) -> tuple[list[float], list[float]]:
    values = np.frombuffer(bytes(item.packed_hz), dtype="<f8").tolist()
    return values[: item.peak_count], values[item.peak_count :]


def _rows_of(item: SignatureItem) -> tuple[list[float], list[float]]:
    rows = SignatureRow.objects.filter(item=item).order_by("frequency_hz")
    return (
        list(rows.filter(role=0).values_list("frequency_hz", flat=True)),
        list(rows.filter(role=1).values_list("frequency_hz", flat=True)),
    )


def test_each_item_packs_exactly_the_frequencies_of_its_rows(history):
    items = list(SignatureItem.objects.all())
    assert items and any(item.peak_count > 0 for item in items)
    for item in items:
        assert _unpacked(item) == _rows_of(item)


def test_the_migration_packs_items_indexed_before_it(history):
    import importlib

    from django.apps import apps

    migration = importlib.import_module("emicase.migrations.0006_signature_item_packed")
    expected = {item.pk: _rows_of(item) for item in SignatureItem.objects.all()}
    SignatureItem.objects.update(peak_count=0, packed_hz=b"")
    migration.pack_existing(apps, None)
    got = {item.pk: _unpacked(item) for item in SignatureItem.objects.all()}
    assert got == expected
    assert any(peaks for peaks, _ in got.values()) and any(g for _, g in got.values())


def test_reindex_signatures_rebuilds_the_index_from_stored_results(history):
    from django.core.management import CommandError, call_command

    before = sorted(SignatureRow.objects.values_list("case_id", "role", "frequency_hz", "outcome"))
    SignatureItem.objects.all().delete()
    call_command("reindex_signatures", verbosity=0)
    assert (
        sorted(SignatureRow.objects.values_list("case_id", "role", "frequency_hz", "outcome"))
        == before
    )
    with pytest.raises(CommandError, match="no case 999999"):
        call_command("reindex_signatures", case=[999999])


def test_a_search_reads_a_fixed_number_of_queries(
    history, product, engineer, lead, django_assert_max_num_queries
):
    """Teams (two), candidates, their rows, the shown cases, their items, their fixes (two)."""
    for i in range(6):
        past_case(
            product=product,
            by=engineer,
            lead=lead,
            title=f"scan case {i}",
            failing_mhz=[48, 96, 144],
            scan_signature=signature([48, 96, 144, 192 + i], [48]),
        )
    query = typed(engineer, "48 MHz, 96 MHz, 144 MHz")
    with django_assert_max_num_queries(8):
        result = search_svc.search(user=engineer, query=query)
        assert len(result.hits) == 8
        assert all(h.revision is None or h.revision.product.name for h in result.hits)
