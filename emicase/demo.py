"""The demo data set: an invented maker of smart-farming hardware.

Everything here is made up — the company, the people, the boards, the
traces — and serves only to show the tool working. None of it is a reference
for any test of the computations.

The story: Furrowlight's RC-8 irrigation controller, revision A, fails
radiated class B at harmonics of the 25 MHz Ethernet PHY clock (the Ethernet
cable radiates) and conducted at harmonics of its 2.2 MHz buck converter.
Two engineers hunt with near-field probes; a common-mode choke plus series
resistors fix the radiated problem on revision B. An older product of theirs
(the Sowline soil probe) failed at a 48 MHz family two years ago; its closed
case gives the signature search something to find.
"""

from __future__ import annotations

import datetime as dt
import io

import numpy as np
from django.contrib.auth import get_user_model
from django.core.files.base import ContentFile
from django.db import transaction
from django.utils import timezone

DEMO_USERNAME = "demo"
DEMO_PASSWORD = "furrow-demo"
TEAM_NAME = "Furrowlight hardware lab"

PEOPLE = [
    # username, first, last, role
    (DEMO_USERNAME, "Mara", "Quist", "lead"),
    ("ines", "Ines", "Vardy", "engineer"),
    ("tomas", "Tomás", "Ekholm", "engineer"),
    ("pat", "Pat", "Oduya", "viewer"),
]

SOURCES = [
    # name, kind, nominal Hz, tolerance Hz
    ("MCU crystal Y1", "clock", 16e6, 800.0),
    ("Ethernet PHY clock Y2", "clock", 25e6, 1250.0),
    ("Buck converter U7", "switching", 2.2e6, 110e3),
    ("Tag reader", "radio", 125e3, 1250.0),
    ("USB full-speed", "data_bus", 12e6, 30e3),
]

# Board outline 100 × 70 mm; where things sit (x, y in mm).
PLACES = {
    "U1 MCU": (45.0, 40.0),
    "U4 PHY": (70.0, 22.0),
    "T1 magnetics": (86.0, 14.0),
    "J3 Ethernet jack": (96.0, 10.0),
    "U7 buck": (18.0, 58.0),
    "J1 power in": (4.0, 62.0),
}


def _rng(seed: int) -> np.random.Generator:
    return np.random.default_rng(seed)


def receiver_trace(
    start_hz: float, stop_hz: float, emissions: list[tuple[float, float]], *, floor: float, seed: int,
    points: int = 10001, width_hz: float = 60e3,
) -> tuple[np.ndarray, np.ndarray]:
    """A receiver-like trace: log-spaced points, a smooth noisy floor, narrow emissions (f, level)."""
    f = np.geomspace(start_hz, stop_hz, points)
    rng = _rng(seed)
    power = 10 ** ((floor + 2.0 * np.log10(f / start_hz) + rng.normal(0, 0.7, f.size)) / 10)
    for fc, level in emissions:
        power += 10 ** (level / 10) * np.exp(-(((f - fc) / max(width_hz, fc * 2e-4)) ** 2))
    return f, 10 * np.log10(power)


def _csv(header: list[str], columns: list[np.ndarray], fmt: list[str]) -> bytes:
    out = io.StringIO()
    out.write("\n".join(header) + "\n")
    np.savetxt(out, np.column_stack(columns), fmt=fmt, delimiter=",")
    return out.getvalue().encode("utf-8")


def trace_csv(f: np.ndarray, level: np.ndarray, *, unit: str, preamble: dict[str, str]) -> bytes:
    header = [f"# {k}: {v}" for k, v in preamble.items()] + [f"Frequency (MHz),Level ({unit})"]
    return _csv(header, [f / 1e6, level], ["%.6f", "%.2f"])


def _distance_mm(a: tuple[float, float], b: tuple[float, float]) -> float:
    return float(np.hypot(a[0] - b[0], a[1] - b[1]))


def nearfield_spectrum(xy: tuple[float, float], *, tip_gain_db: float, seed: int, reduced_db: float = 0.0):
    """A probe spectrum at board position ``xy``: the 25 MHz family is loudest near the magnetics and jack."""
    hot = PLACES["T1 magnetics"]
    buck = PLACES["U7 buck"]
    near_phy = -20 * np.log10(1 + _distance_mm(xy, hot) / 6.0) + tip_gain_db - reduced_db
    near_buck = -20 * np.log10(1 + _distance_mm(xy, buck) / 6.0) + tip_gain_db
    emissions = [(n * 25e6, 62 - 4 * np.log2(n) + near_phy) for n in (1, 2, 3, 4, 5, 6, 7, 10)]
    emissions += [(n * 2.2e6, 58 - 6 * np.log2(n) + near_buck) for n in range(1, 10)]
    emissions += [(n * 16e6, 38 - 5 * np.log2(n) + tip_gain_db) for n in (1, 2, 3)]
    return receiver_trace(1e6, 500e6, emissions, floor=8.0 + tip_gain_db, seed=seed, points=6001, width_hz=40e3)


def scope_record(*, n: int = 262144, rate_hz: float = 1e9, seed: int) -> bytes:
    """An oscilloscope time record (volts) at the PHY: a 25 MHz clock edge train plus noise."""
    rng = _rng(seed)
    t = np.arange(n) / rate_hz
    v = np.zeros(n)
    for k in (1, 3, 5, 7, 9):  # a square-ish clock: odd harmonics 4A/(πk)
        v += 0.004 * 4 / (np.pi * k) * np.sin(2 * np.pi * 25e6 * k * t)
    v += 0.0008 * np.sin(2 * np.pi * 2.2e6 * t) + rng.normal(0, 2e-5, n)
    return _csv(["# scope: demo bench oscilloscope", "Time (s),Voltage (V)"], [t, v], ["%.12e", "%.7e"])


def _file(name: str, content: bytes) -> ContentFile:
    return ContentFile(content, name=name)


def demo_exists() -> bool:
    from emicase.models import Team

    return Team.objects.filter(name=TEAM_NAME).exists()


@transaction.atomic
def load_demo(*, analyse_now: bool = True) -> dict[str, int]:
    """Create the demo team, products, cases and uploads. Returns counts of what was made.

    With ``analyse_now`` the uploads are analysed in this process (so the demo
    cases can be verified and closed); the queued tasks then find their rows
    done and skip them.
    """
    from emicase import models as m
    from emicase.services import cases as case_svc
    from emicase.services import countermeasures as cm_svc
    from emicase.services import uploads
    from emicase.services.analysis import analyse_capture, analyse_scan

    User = get_user_model()
    team = m.Team.objects.create(name=TEAM_NAME, slug="furrowlight", guard_band_db=3.0, frequency_tolerance_pct=0.5)
    people = {}
    for username, first, last, role in PEOPLE:
        user, _ = User.objects.get_or_create(username=username, defaults={"first_name": first, "last_name": last})
        user.set_password(DEMO_PASSWORD)
        user.save()
        m.Membership.objects.create(team=team, user=user, role=role)
        people[username] = user
    lead, ines, tomas = people[DEMO_USERNAME], people["ines"], people["tomas"]

    rc8 = m.Product.objects.create(team=team, name="RC-8 irrigation controller",
                                   description="Eight-zone valve controller with Ethernet, USB service port and tag reader.")
    revs = {}
    for label, fw, note in (("A", "1.0", "First build."), ("B", "1.2", "Common-mode choke on Ethernet, series resistors."),
                            ("C", "2.0", "Stitched ground pour; buck spread spectrum enabled.")):
        rev = m.Revision.objects.create(product=rc8, hardware_label=label, firmware_label=fw, notes=note)
        for name, kind, f0, tol in SOURCES:
            m.EmissionSource.objects.create(revision=rev, name=name, kind=kind, nominal_frequency_hz=f0, tolerance_hz=tol)
        revs[label] = rev

    today = timezone.localdate()
    # --- case 1: radiated fail, found, fixed on rev B, proven.
    f, level = receiver_trace(30e6, 1e9, [(75e6, 38.5), (125e6, 35.0), (175e6, 29.0), (250e6, 40.5), (48e6, 24.0),
                                          (325e6, 33.0)], floor=14.0, seed=1)
    first = uploads.scan_upload(
        revision=revs["A"], file=_file("rc8-revA-radiated-10m.csv",
                                       trace_csv(f, level, unit="dBµV/m", preamble={"Site": "demo pre-compliance room"})),
        by=ines, opens_case_titled="Radiated class B fail at 25 MHz harmonics",
        emission_kind="radiated", limit_id="cispr32-b-rad-10m", detector="quasi-peak", distance_m=10.0,
        polarisation="vertical", setting="pre", lab="Furrowlight EMC room", measured_on=today - dt.timedelta(days=21),
        operator="Ines Vardy",
    )
    f, level = receiver_trace(150e3, 30e6, [(n * 2.2e6, 62 - 3 * n) for n in range(1, 8)], floor=30.0, seed=2,
                              width_hz=5e3)
    cond = uploads.scan_upload(
        revision=revs["A"], file=_file("rc8-revA-conducted-L1.csv", trace_csv(f, level, unit="dBµV", preamble={})),
        by=tomas, opens_case_titled="Conducted fail at buck harmonics", emission_kind="conducted",
        limit_id="cispr32-b-cond-qp", detector="quasi-peak", mains_line="L1", setting="pre",
        lab="Furrowlight EMC room", measured_on=today - dt.timedelta(days=20), operator="Tomás Ekholm",
    )
    made = {"scans": 2, "captures": 0}
    if not analyse_now:
        return made
    analyse_scan(first.pk)
    analyse_scan(cond.pk)
    first.refresh_from_db()
    cond.refresh_from_db()
    radiated_case = first.case
    if radiated_case is None:  # the analysis found nothing over the limit
        return made
    radiated_case.failing_frequencies.update(confirmed=True)
    case_svc.case_move(case=radiated_case, to=m.Case.Stage.HUNTING, by=ines, note="Probing around the PHY and jack.")
    for i, (who, place, tip, gain) in enumerate(
        [(ines, "U1 MCU", "loop 25 mm", 10.0), (ines, "U4 PHY", "loop 25 mm", 10.0), (ines, "T1 magnetics", "loop 25 mm", 10.0),
         (ines, "J3 Ethernet jack", "loop 25 mm", 10.0), (tomas, "U7 buck", "loop 25 mm", 10.0),
         (tomas, "U4 PHY", "loop 5 mm", 0.0), (tomas, "T1 magnetics", "loop 5 mm", 0.0), (tomas, "J1 power in", "loop 5 mm", 0.0)]
    ):
        f, level = nearfield_spectrum(PLACES[place], tip_gain_db=gain, seed=10 + i)
        cap = uploads.capture_upload(
            case=radiated_case, file=_file(f"nf-{place.split()[0].lower()}-{tip.replace(' ', '')}.csv",
                                           trace_csv(f, level, unit="dBµV", preamble={"Probe": tip})),
            by=who, revision=revs["A"], probe_kind="h_field", tip=tip, board_side="top",
            location=place, x_mm=PLACES[place][0], y_mm=PLACES[place][1],
        )
        analyse_capture(cap.pk)
        made["captures"] += 1
    scope = uploads.capture_upload(
        case=radiated_case, file=_file("scope-phy-clock.csv", scope_record(seed=99)), by=tomas, revision=revs["A"],
        probe_kind="e_field", tip="ball 3 mm", board_side="top", location="U4 PHY", declared_domain="time",
    )
    analyse_capture(scope.pk)
    made["captures"] += 1
    cm = cm_svc.countermeasure_propose(case=radiated_case, by=tomas, kind="ferrite",
                                       description="Common-mode choke on the Ethernet pairs plus 33 Ω series resistors on the PHY clock",
                                       revision=revs["B"])
    cm_svc.countermeasure_start_trial(countermeasure=cm, by=tomas)
    f, level = receiver_trace(30e6, 1e9, [(75e6, 24.0), (125e6, 22.0), (175e6, 19.0), (250e6, 28.0), (48e6, 23.0),
                                          (325e6, 25.0)], floor=14.0, seed=3)
    v = cm_svc.verification_by_scan(
        countermeasure=cm, by=ines, file=_file("rc8-revB-radiated-10m.csv", trace_csv(f, level, unit="dBµV/m", preamble={})),
        emission_kind="radiated", limit_id="cispr32-b-rad-10m", detector="quasi-peak", distance_m=10.0,
        polarisation="vertical", setting="pre", lab="Furrowlight EMC room", measured_on=today - dt.timedelta(days=6),
        operator="Ines Vardy",
    )
    analyse_scan(v.after_scan_id)
    made["scans"] += 1
    cm_svc.countermeasure_verify(countermeasure=cm, verification=v, by=lead)
    case_svc.comment_add(case=radiated_case, by=lead, text="Good result. Book the test house for rev B before closing.")
    from emicase.demo_history import load_history  # it builds on this module's trace helpers

    load_history(team=team, people=people, made=made)
    return made
