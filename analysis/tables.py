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
