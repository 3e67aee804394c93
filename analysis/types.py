"""The small frozen values the engine passes around.

Units are in the names (``frequency_hz``, ``margin_db``). Level arrays carry
their unit beside them as one of ``LEVEL_UNITS``; time records are in volts.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

SPECTRUM = "spectrum"
TIME = "time"

# Canonical ASCII spellings of the level units the engine knows.
LEVEL_UNITS = ("dBuV", "dBm", "dBuV/m", "dBuA", "dBpT")


@dataclass(frozen=True, eq=False)
class Spectrum:
    """Levels against frequency.

    ``frequency_hz`` is float64 and strictly increasing; ``level`` is float64 in
    ``unit``. ``rbw_hz`` is the resolution bandwidth when known. ``from_fft`` is
    True for spectra computed from a time record: their floor is Rayleigh noise,
    which the peak finder treats differently from a receiver's smooth floor.
    """

    frequency_hz: np.ndarray
    level: np.ndarray
    unit: str
    rbw_hz: float | None = None
    from_fft: bool = False

    def __len__(self) -> int:
        return int(self.frequency_hz.size)


@dataclass(frozen=True, eq=False)
class TimeRecord:
    """Voltage samples, uniformly spaced in time (checked by the reader)."""

    time_s: np.ndarray
    volts: np.ndarray

    @property
    def sample_rate_hz(self) -> float:
        n = self.time_s.size
        return float((n - 1) / (self.time_s[-1] - self.time_s[0]))

    def __len__(self) -> int:
        return int(self.volts.size)


@dataclass(frozen=True, eq=False)
class Trace:
    """What the reader returns: the data plus what the file said about itself."""

    name: str
    data: Spectrum | TimeRecord
    metadata: Mapping[str, str] = field(default_factory=dict)
    warnings: tuple[str, ...] = ()

    @property
    def domain(self) -> str:
        return SPECTRUM if isinstance(self.data, Spectrum) else TIME


@dataclass(frozen=True)
class Peak:
    frequency_hz: float
    level: float
    prominence_db: float
    width_hz: float


@dataclass(frozen=True)
class Family:
    """A fundamental whose integer multiples explain several peaks.

    The fundamental need not be a peak itself (a missing first order is common).
    """

    fundamental_hz: float
    orders: tuple[int, ...]
    odd_only: bool
    spread_spectrum: bool
    peak_frequencies_hz: tuple[float, ...] = ()


@dataclass(frozen=True)
class Source:
    """A known emission source on the board: a clock, a converter, a bus."""

    name: str
    frequency_hz: float
    tolerance_hz: float


@dataclass(frozen=True)
class Term:
    """One term ``order × source`` of an attribution; order may be negative."""

    source: str
    order: int


@dataclass(frozen=True)
class Attribution:
    """A peak explained as Σ order·f_source, off by ``error_hz``."""

    frequency_hz: float
    terms: tuple[Term, ...]
    error_hz: float


@dataclass(frozen=True)
class Exceedance:
    """A peak whose margin is below the guard band. margin_db = limit − level."""

    frequency_hz: float
    level: float
    limit: float
    margin_db: float
