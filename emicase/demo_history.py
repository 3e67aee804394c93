"""The demo's past: earlier products of the same invented maker, closed long ago.

Everything here is made up, like the rest of the demo, and no test of a
computation uses it. It gives the signature search something to find:

* the Sowline soil probe SP-2, two years ago: radiated class B fail at the
  harmonics of its 48 MHz clock; a 33 Ω series resistor on the clock line
  plus spread spectrum on the clock generator made it about 9 dB quieter;
* the Cloudtally weather mast WM-1, eighteen months ago: conducted fail at
  the harmonics of its 2.2 MHz buck converter; an input π-filter plus the
  converter's spread-spectrum mode, about 12 dB;
* the Ventwise greenhouse vent controller VC-3, a year ago: one radiated
  line at 96 MHz (the third harmonic of its display's 32 MHz pixel clock,
  next to the mains-synchronised triac drive's broadband hum), fixed with a
  ferrite on the display's flex cable: a single frequency in common with the
  soil probe's family, and the search ranks it below.

Each case goes through the services as a live one does: a failing scan
analysed in this process opens it, a countermeasure is tried and verified
by an after-scan, a lead closes it as fixed. Then its dates are moved into
the past and its signature index rebuilt to match.
"""

from __future__ import annotations

import datetime as dt

from django.core.exceptions import ValidationError
from django.utils import timezone

from emicase.demo import _file, receiver_trace, trace_csv

RADIATED = {
    "emission_kind": "radiated",
    "limit_id": "cispr32-b-rad-10m",
    "detector": "quasi-peak",
    "distance_m": 10.0,
    "polarisation": "vertical",
    "setting": "pre",
    "lab": "Furrowlight EMC room",
}
CONDUCTED = {
    "emission_kind": "conducted",
    "limit_id": "cispr32-b-cond-qp",
    "detector": "quasi-peak",
    "mains_line": "L1",
    "setting": "pre",
    "lab": "Furrowlight EMC room",
}

# name, description, revisions (label, firmware, notes), known sources (name, kind, Hz, tolerance Hz)
PRODUCTS = {
    "soil": (
        "Sowline soil probe SP-2",
        "Buried moisture and temperature probe with a LoRa-style radio link.",
        [
            ("A", "0.9", "First build."),
            ("B", "1.0", "33 Ω on the clock line; clock generator spread spectrum on."),
        ],
        [("Clock generator Y1", "clock", 48e6, 2400.0)],
    ),
    "mast": (
        "Cloudtally weather mast WM-1",
        "Wind, rain and sun sensors on a mains-powered mast.",
        [
            ("A", "2.1", "First build."),
            ("B", "2.2", "Input π-filter; buck spread-spectrum mode on."),
        ],
        [("Buck converter U3", "switching", 2.2e6, 110e3)],
    ),
    "vent": (
        "Ventwise vent controller VC-3",
        "Greenhouse vent motor controller with a small display.",
        [("A", "1.3", "First build."), ("B", "1.3", "Ferrite on the display flex cable.")],
        [("Display pixel clock", "clock", 32e6, 1600.0)],
    ),
}


def _scan_file(
    name: str, band: tuple[float, float], emissions, *, floor: float, seed: int, conducted: bool
):
    f, level = receiver_trace(
        band[0],
        band[1],
        emissions,
        floor=floor,
        seed=seed,
        points=6001,
        width_hz=5e3 if conducted else 60e3,
    )
    return _file(
        name,
        trace_csv(
            f, level, unit="dBµV" if conducted else "dBµV/m", preamble={"Site": "demo archive"}
        ),
    )


def _past_case(
    *,
    key: str,
    products: dict,
    people: dict,
    title: str,
    fields: dict,
    band,
    before,
    after_db: float,
    conducted: bool,
    countermeasure: tuple[str, str],
    days_ago: int,
    seed: int,
) -> tuple[object, int]:
    """Open, hunt, fix, verify and close one past case. Returns it and the number of scans analysed."""
    from emicase.models import Case
    from emicase.services import cases as case_svc
    from emicase.services import countermeasures as cm_svc
    from emicase.services import uploads
    from emicase.services.analysis import analyse_scan

    product, rev_a, rev_b = products[key]
    engineer, lead = people["ines"], people["demo"]
    today = timezone.localdate()
    opened_on = today - dt.timedelta(days=days_ago)
    first = uploads.scan_upload(
        revision=rev_a,
        by=engineer,
        opens_case_titled=title,
        measured_on=opened_on,
        operator="Ines Vardy",
        file=_scan_file(
            f"{key}-revA-before.csv",
            band,
            before,
            floor=30.0 if conducted else 14.0,
            seed=seed,
            conducted=conducted,
        ),
        **fields,
    )
    analyse_scan(first.pk)
    first.refresh_from_db()
    case = first.case
    if case is None:  # nothing over the limit: the demo's trace is wrong, not the user's data
        raise RuntimeError(f"demo history: {first.original_name} opened no case")
    case.failing_frequencies.update(confirmed=True)
    case_svc.case_move(
        case=case, to=Case.Stage.HUNTING, by=engineer, note="Probing the usual suspects."
    )
    kind, description = countermeasure
    cm = cm_svc.countermeasure_propose(
        case=case, by=engineer, kind=kind, description=description, revision=rev_b
    )
    cm_svc.countermeasure_start_trial(countermeasure=cm, by=engineer)
    quieter = [(f, level - after_db) for f, level in before]
    verification = cm_svc.verification_by_scan(
        countermeasure=cm,
        by=engineer,
        measured_on=opened_on + dt.timedelta(days=20),
        operator="Ines Vardy",
        file=_scan_file(
            f"{key}-revB-after.csv",
            band,
            quieter,
            floor=30.0 if conducted else 14.0,
            seed=seed + 1,
            conducted=conducted,
        ),
        **fields,
    )
    analyse_scan(verification.after_scan_id)
    try:
        cm_svc.countermeasure_verify(countermeasure=cm, verification=verification, by=lead)
    except ValidationError:
        cm_svc.countermeasure_verify(
            countermeasure=cm,
            verification=verification,
            by=lead,
            reason="Confirmed at the test house with margin to spare.",
        )
    case_svc.case_close(case=case, by=lead, closure=Case.Closure.FIXED, countermeasure=cm)
    _move_into_the_past(case, days_ago)
    return case, 2


def _move_into_the_past(case, days_ago: int) -> None:
    """Shift the case's times back by ``days_ago`` days and rebuild its index rows with the new dates."""
    from django.db.models import F

    from emicase.models import Case, CaseEvent, Countermeasure, FailingFrequency, Scan, Verification
    from emicase.services.search import signature_reindex_case

    shift = dt.timedelta(days=days_ago)
    Case.objects.filter(pk=case.pk).update(
        opened_at=F("opened_at") - shift,
        closed_at=F("closed_at") - shift + dt.timedelta(days=30),
        updated_at=F("updated_at") - shift + dt.timedelta(days=30),
    )
    CaseEvent.objects.filter(case=case).update(at=F("at") - shift)
    Scan.objects.filter(case=case).update(uploaded_at=F("uploaded_at") - shift)
    FailingFrequency.objects.filter(case=case).update(created_at=F("created_at") - shift)
    Countermeasure.objects.filter(case=case).update(
        proposed_at=F("proposed_at") - shift + dt.timedelta(days=5)
    )
    Verification.objects.filter(countermeasure__case=case).update(
        recorded_at=F("recorded_at") - shift + dt.timedelta(days=20)
    )
    signature_reindex_case(case=case)


def load_history(*, team, people: dict, made: dict) -> None:
    """Create the demo's past products and their closed cases in ``team``; adds to the ``made`` counts.

    ``people`` maps the demo's usernames to users. Call inside load_demo's transaction.
    """
    from emicase.models import EmissionSource, Product, Revision

    products = {}
    for key, (name, description, revisions, sources) in PRODUCTS.items():
        product = Product.objects.create(team=team, name=name, description=description)
        revs = []
        for label, firmware, notes in revisions:
            rev = Revision.objects.create(
                product=product, hardware_label=label, firmware_label=firmware, notes=notes
            )
            for source, kind, hz, tol in sources:
                EmissionSource.objects.create(
                    revision=rev, name=source, kind=kind, nominal_frequency_hz=hz, tolerance_hz=tol
                )
            revs.append(rev)
        products[key] = (product, *revs)

    # CISPR 32 class B at 10 m: 30 dBµV/m below 230 MHz, 37 above. The worst
    # failing frequency (least margin) is 96 MHz at 36 dBµV/m.
    soil = [(48e6, 35.0), (96e6, 36.0), (144e6, 34.5), (192e6, 33.0), (240e6, 40.0), (62e6, 21.0)]
    # Conducted class B QP: 56 dBµV from 0.5 to 5 MHz, 60 from 5 to 30 MHz.
    mast = [
        (n * 2.2e6, level)
        for n, level in ((1, 66.0), (2, 63.0), (3, 64.0), (4, 61.5), (5, 61.0), (6, 57.0))
    ]
    # The pixel clock's family stays under the limit; only 96 MHz fails.
    vent = [(32e6, 24.0), (64e6, 22.0), (96e6, 34.5), (128e6, 20.0), (160e6, 19.0), (47e6, 18.0)]
    stories = [
        dict(
            key="soil",
            title="Soil probe fails class B at its 48 MHz clock's harmonics",
            fields=RADIATED,
            band=(30e6, 1e9),
            before=soil,
            after_db=9.0,
            conducted=False,
            days_ago=730,
            seed=201,
            countermeasure=(
                "firmware",
                "33 Ω series resistor on the 48 MHz clock line plus spread spectrum "
                "(1 % down-spread) on the clock generator",
            ),
        ),
        dict(
            key="mast",
            title="Weather mast's buck converter harmonics over the conducted limit",
            fields=CONDUCTED,
            band=(150e3, 30e6),
            before=mast,
            after_db=12.0,
            conducted=True,
            days_ago=540,
            seed=211,
            countermeasure=(
                "filtering",
                "Input π-filter (10 µH, 2 × 4.7 µF) plus the buck's spread-spectrum mode",
            ),
        ),
        dict(
            key="vent",
            title="Vent controller: one radiated line at 96 MHz",
            fields=RADIATED,
            band=(30e6, 1e9),
            before=vent,
            after_db=8.0,
            conducted=False,
            days_ago=365,
            seed=221,
            countermeasure=(
                "ferrite",
                "Clip-on ferrite on the display flex cable, near the connector",
            ),
        ),
    ]
    for story in stories:
        _, scans = _past_case(products=products, people=people, **story)
        made["scans"] += scans
    made["history_cases"] = len(stories)
