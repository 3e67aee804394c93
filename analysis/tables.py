"""Published values the engine relies on, each table with its source beside it.

Nothing here is computed; modules that use a table import it from here so a
reviewer checks the numbers in one place.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class ReceiverBand:
    name: str
    start_hz: float
    stop_hz: float
    rbw_hz: float  # 6 dB resolution bandwidth


# CISPR 16-1-1, measuring receiver bands and their 6 dB bandwidths (confirmed
# in an instrument manual that quotes the standard). Band E's upper edge
# (18 GHz) is from memory.
CISPR16_BANDS: tuple[ReceiverBand, ...] = (
    ReceiverBand("A", 9e3, 150e3, 200.0),
    ReceiverBand("B", 150e3, 30e6, 9e3),
    ReceiverBand("C", 30e6, 300e6, 120e3),
    ReceiverBand("D", 300e6, 1e9, 120e3),
    ReceiverBand("E", 1e9, 18e9, 1e6),
)


@dataclass(frozen=True)
class LimitTable:
    """One published limit line, as printed.

    ``rows`` are ``(start_hz, stop_hz, level_at_start, level_at_stop)`` in
    ``unit``: equal levels for a constant segment, different ones for a level
    that varies linearly with log10(f). ``unit`` is the unit the source prints
    (FCC radiated limits are printed in µV/m and kept so here; analysis.limits
    turns them into dBµV/m). ``source`` names the table and how far its values
    were confirmed.
    """

    id: str
    title: str
    kind: str  # "radiated" | "conducted"
    detector: str  # "quasi-peak" | "average" | "peak"
    unit: str  # "dBuV/m" | "uV/m" | "dBuV"
    distance_m: float | None
    rows: tuple[tuple[float, float, float, float], ...]
    source: str


_CISPR32_A_RAD = "CISPR 32 Annex A Table A.2 (class A, radiated), confirmed in secondary sources"
_CISPR32_B_RAD = "CISPR 32 Annex A Table A.4 (class B, radiated), confirmed in secondary sources"

# CISPR 32 (= EN 55032) Annex A, radiated below 1 GHz, 120 kHz RBW, quasi-peak.
# Table A.2 (class A) and Table A.4 (class B), confirmed in secondary sources.
# One distance's table applies across the whole range (no mixing of distances).
CISPR32_RADIATED_LIMITS: tuple[LimitTable, ...] = (
    LimitTable(
        "cispr32-a-rad-10m",
        "CISPR 32 class A radiated, 10 m, quasi-peak",
        "radiated",
        "quasi-peak",
        "dBuV/m",
        10.0,
        ((30e6, 230e6, 40.0, 40.0), (230e6, 1000e6, 47.0, 47.0)),
        _CISPR32_A_RAD,
    ),
    LimitTable(
        "cispr32-a-rad-3m",
        "CISPR 32 class A radiated, 3 m, quasi-peak",
        "radiated",
        "quasi-peak",
        "dBuV/m",
        3.0,
        ((30e6, 230e6, 50.0, 50.0), (230e6, 1000e6, 57.0, 57.0)),
        _CISPR32_A_RAD,
    ),
    LimitTable(
        "cispr32-b-rad-10m",
        "CISPR 32 class B radiated, 10 m, quasi-peak",
        "radiated",
        "quasi-peak",
        "dBuV/m",
        10.0,
        ((30e6, 230e6, 30.0, 30.0), (230e6, 1000e6, 37.0, 37.0)),
        _CISPR32_B_RAD,
    ),
    LimitTable(
        "cispr32-b-rad-3m",
        "CISPR 32 class B radiated, 3 m, quasi-peak",
        "radiated",
        "quasi-peak",
        "dBuV/m",
        3.0,
        ((30e6, 230e6, 40.0, 40.0), (230e6, 1000e6, 47.0, 47.0)),
        _CISPR32_B_RAD,
    ),
)

_CISPR32_B_RAD_1G = (
    "CISPR 32 Annex A Table A.5 (class B, radiated above 1 GHz, 3 m), "
    "confirmed in a secondary source"
)
_CISPR32_A_RAD_1G = (
    "CISPR 32 Annex A (class A, radiated above 1 GHz, 3 m): values from memory, "
    "not confirmed in a source"
)

# CISPR 32 Annex A, radiated 1–6 GHz at 3 m, 1 MHz RBW, average and peak
# detectors. Class B: Table A.5, confirmed in a secondary source. Class A:
# values from memory (not confirmed); kept apart under their own ids and
# flagged in their titles so nobody mistakes them for checked values.
CISPR32_RADIATED_ABOVE_1GHZ_LIMITS: tuple[LimitTable, ...] = (
    LimitTable(
        "cispr32-b-rad-3m-av-1-6ghz",
        "CISPR 32 class B radiated 1–6 GHz, 3 m, average",
        "radiated",
        "average",
        "dBuV/m",
        3.0,
        ((1e9, 3e9, 50.0, 50.0), (3e9, 6e9, 54.0, 54.0)),
        _CISPR32_B_RAD_1G,
    ),
    LimitTable(
        "cispr32-b-rad-3m-pk-1-6ghz",
        "CISPR 32 class B radiated 1–6 GHz, 3 m, peak",
        "radiated",
        "peak",
        "dBuV/m",
        3.0,
        ((1e9, 3e9, 70.0, 70.0), (3e9, 6e9, 74.0, 74.0)),
        _CISPR32_B_RAD_1G,
    ),
    LimitTable(
        "cispr32-a-rad-3m-av-1-6ghz",
        "CISPR 32 class A radiated 1–6 GHz, 3 m, average (values from memory)",
        "radiated",
        "average",
        "dBuV/m",
        3.0,
        ((1e9, 3e9, 56.0, 56.0), (3e9, 6e9, 60.0, 60.0)),
        _CISPR32_A_RAD_1G,
    ),
    LimitTable(
        "cispr32-a-rad-3m-pk-1-6ghz",
        "CISPR 32 class A radiated 1–6 GHz, 3 m, peak (values from memory)",
        "radiated",
        "peak",
        "dBuV/m",
        3.0,
        ((1e9, 3e9, 76.0, 76.0), (3e9, 6e9, 80.0, 80.0)),
        _CISPR32_A_RAD_1G,
    ),
)

_CISPR32_COND = (
    "CISPR 32 Annex A Tables A.8/A.10 (AC mains port) — values identical to CISPR 22, "
    "confirmed for CISPR 22 in a handbook table; identity with CISPR 32 from memory"
)

# CISPR 32 Annex A, conducted, AC mains port, 9 kHz RBW, Tables A.8/A.10. The
# values are those of CISPR 22, confirmed for CISPR 22 in a handbook table;
# their identity with CISPR 32 is from memory. On 0.15–0.5 MHz the class B
# levels fall linearly with log10(f) from the first to the second value.
CISPR32_CONDUCTED_LIMITS: tuple[LimitTable, ...] = (
    LimitTable(
        "cispr32-a-cond-qp",
        "CISPR 32 class A conducted (AC mains), quasi-peak",
        "conducted",
        "quasi-peak",
        "dBuV",
        None,
        ((0.15e6, 0.5e6, 79.0, 79.0), (0.5e6, 5e6, 73.0, 73.0), (5e6, 30e6, 73.0, 73.0)),
        _CISPR32_COND,
    ),
    LimitTable(
        "cispr32-a-cond-av",
        "CISPR 32 class A conducted (AC mains), average",
        "conducted",
        "average",
        "dBuV",
        None,
        ((0.15e6, 0.5e6, 66.0, 66.0), (0.5e6, 5e6, 60.0, 60.0), (5e6, 30e6, 60.0, 60.0)),
        _CISPR32_COND,
    ),
    LimitTable(
        "cispr32-b-cond-qp",
        "CISPR 32 class B conducted (AC mains), quasi-peak",
        "conducted",
        "quasi-peak",
        "dBuV",
        None,
        ((0.15e6, 0.5e6, 66.0, 56.0), (0.5e6, 5e6, 56.0, 56.0), (5e6, 30e6, 60.0, 60.0)),
        _CISPR32_COND,
    ),
    LimitTable(
        "cispr32-b-cond-av",
        "CISPR 32 class B conducted (AC mains), average",
        "conducted",
        "average",
        "dBuV",
        None,
        ((0.15e6, 0.5e6, 56.0, 46.0), (0.5e6, 5e6, 46.0, 46.0), (5e6, 30e6, 50.0, 50.0)),
        _CISPR32_COND,
    ),
)

# 47 CFR Part 15 §15.109, radiated, quasi-peak below 1 GHz (§15.35(b)); the
# regulation's text, which prints field strength in µV/m: (a) class B at 3 m,
# (b) class A at 10 m. §15.109(a)'s last band reads "above 960 MHz"; the line
# here stops at 1 GHz, where §15.35(b) changes to the average detector.
FCC15_RADIATED_LIMITS: tuple[LimitTable, ...] = (
    LimitTable(
        "fcc15-a-rad-10m",
        "FCC Part 15 class A radiated, 10 m, quasi-peak",
        "radiated",
        "quasi-peak",
        "uV/m",
        10.0,
        (
            (30e6, 88e6, 90.0, 90.0),
            (88e6, 216e6, 150.0, 150.0),
            (216e6, 960e6, 210.0, 210.0),
            (960e6, 1000e6, 300.0, 300.0),
        ),
        "47 CFR §15.109(b) (class A, 10 m), regulation text; dBµV/m = 20·log10(µV/m)",
    ),
    LimitTable(
        "fcc15-b-rad-3m",
        "FCC Part 15 class B radiated, 3 m, quasi-peak",
        "radiated",
        "quasi-peak",
        "uV/m",
        3.0,
        (
            (30e6, 88e6, 100.0, 100.0),
            (88e6, 216e6, 150.0, 150.0),
            (216e6, 960e6, 200.0, 200.0),
            (960e6, 1000e6, 500.0, 500.0),
        ),
        "47 CFR §15.109(a) (class B, 3 m), regulation text; dBµV/m = 20·log10(µV/m)",
    ),
)

_FCC15_COND = "47 CFR §15.107, regulation text (50 µH / 50 Ω LISN)"

# 47 CFR Part 15 §15.107, conducted on the AC power line, the regulation's
# text (the post-2002 rule: 0.15–30 MHz, not the old 450 kHz / 250 µV one).
FCC15_CONDUCTED_LIMITS: tuple[LimitTable, ...] = (
    LimitTable(
        "fcc15-a-cond-qp",
        "FCC Part 15 class A conducted, quasi-peak",
        "conducted",
        "quasi-peak",
        "dBuV",
        None,
        ((0.15e6, 0.5e6, 79.0, 79.0), (0.5e6, 30e6, 73.0, 73.0)),
        _FCC15_COND,
    ),
    LimitTable(
        "fcc15-a-cond-av",
        "FCC Part 15 class A conducted, average",
        "conducted",
        "average",
        "dBuV",
        None,
        ((0.15e6, 0.5e6, 66.0, 66.0), (0.5e6, 30e6, 60.0, 60.0)),
        _FCC15_COND,
    ),
    LimitTable(
        "fcc15-b-cond-qp",
        "FCC Part 15 class B conducted, quasi-peak",
        "conducted",
        "quasi-peak",
        "dBuV",
        None,
        ((0.15e6, 0.5e6, 66.0, 56.0), (0.5e6, 5e6, 56.0, 56.0), (5e6, 30e6, 60.0, 60.0)),
        _FCC15_COND,
    ),
    LimitTable(
        "fcc15-b-cond-av",
        "FCC Part 15 class B conducted, average",
        "conducted",
        "average",
        "dBuV",
        None,
        ((0.15e6, 0.5e6, 56.0, 46.0), (0.5e6, 5e6, 46.0, 46.0), (5e6, 30e6, 50.0, 50.0)),
        _FCC15_COND,
    ),
)
