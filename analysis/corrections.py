"""Transducer and path corrections: antenna factors, cable losses, probe factors, preamp gains.

A correction table lists dB values against frequency. Between its points the
value is interpolated linearly in log10(frequency), the way calibration data
are tabulated and plotted; outside the table's range there is no value, and
asking for one is a TraceError naming the range — a correction is never
extrapolated silently.

Applying them follows the field-strength relation of DOMAIN.md:
dBµV/m = dBµV + AF + cable loss − preamp gain.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from typing import BinaryIO

import numpy as np

from analysis import units
from analysis.errors import TraceError
from analysis.reader import read_frequency_table
from analysis.types import LEVEL_UNITS, Spectrum

KINDS = ("antenna_factor", "cable_loss", "probe_factor", "preamp_gain")
_EDGE_TOLERANCE = 1e-9  # relative: 30 MHz computed as 3e7·(1 + 1e-16) is still 30 MHz


def _fmt_hz(value: float) -> str:
    for unit, scale in (("GHz", 1e9), ("MHz", 1e6), ("kHz", 1e3)):
        if abs(value) >= scale:
            return f"{value / scale:.6g} {unit}"
    return f"{value:.6g} Hz"


@dataclass(frozen=True, eq=False)
class CorrectionTable:
    """dB values against frequency, for one kind of correction (one of KINDS).

    ``frequency_hz`` is strictly increasing and positive, ``value_db`` finite,
    both float64 of the same length (at least 2); checked on construction.
    ``warnings`` carries what the file reader fixed or assumed.
    """

    name: str
    kind: str
    frequency_hz: np.ndarray
    value_db: np.ndarray
    warnings: tuple[str, ...] = ()
    _log_frequency: np.ndarray = field(init=False, repr=False)

    def __post_init__(self) -> None:
        if self.kind not in KINDS:
            raise TraceError(
                f"unknown correction kind {self.kind!r}; expected one of {', '.join(KINDS)}"
            )
        f = np.array(self.frequency_hz, dtype=np.float64)
        v = np.array(self.value_db, dtype=np.float64)
        if f.ndim != 1 or v.shape != f.shape:
            raise TraceError("a correction table needs one value per frequency", name=self.name)
        if f.size < 2:
            raise TraceError("a correction table needs at least 2 points", name=self.name)
        if not (np.all(np.isfinite(f)) and np.all(np.isfinite(v))):
            raise TraceError("a correction table holds only finite numbers", name=self.name)
        if f[0] <= 0 or not np.all(f[1:] > f[:-1]):
            raise TraceError(
                "correction frequencies must be positive and strictly increasing", name=self.name
            )
        f.flags.writeable = False
        v.flags.writeable = False
        object.__setattr__(self, "frequency_hz", f)
        object.__setattr__(self, "value_db", v)
        object.__setattr__(self, "_log_frequency", np.log10(f))

    def at(self, frequency_hz: float | np.ndarray) -> np.ndarray | float:
        """The correction in dB at each frequency (same shape; a float for a scalar).

        Linear interpolation in log10(frequency) between the table's points.
        Raises TraceError if any frequency lies outside the table's range.
        """
        f = np.asarray(frequency_hz, dtype=np.float64)
        low, high = float(self.frequency_hz[0]), float(self.frequency_hz[-1])
        inside = (f >= low * (1 - _EDGE_TOLERANCE)) & (f <= high * (1 + _EDGE_TOLERANCE))
        if not np.all(inside):
            bad = float(f.flat[int(np.argmax(~inside))])
            shown = _fmt_hz(bad) if np.isfinite(bad) else repr(bad)
            raise TraceError(
                f"{shown} is outside the {self.kind} table's range {_fmt_hz(low)} to {_fmt_hz(high)} "
                "(corrections are not extrapolated)",
                name=self.name,
            )
        values = np.interp(np.log10(np.clip(f, low, high)), self._log_frequency, self.value_db)
        return float(values) if values.ndim == 0 else values


def read_correction_table(
    source: str | os.PathLike | bytes | BinaryIO,
    *,
    kind: str,
    name: str | None = None,
    frequency_unit: str | None = None,
) -> CorrectionTable:
    """Read a two-column text table: frequency, then the correction in dB.

    The format rules and error messages are the reader's (analysis.reader):
    comma, semicolon, tab or blank separated, optional preamble and header.
    The frequency unit comes from ``frequency_unit``, else the header
    (``Frequency (MHz)``), else Hz for a file without a header. The value
    column is taken as dB whatever its header says (dB/m, dB(1/m), dB).
    Rows may be in any order; frequencies must be distinct and positive.
    """
    if kind not in KINDS:
        raise TraceError(
            f"unknown correction kind {kind!r}; expected one of {', '.join(KINDS)}", name=name
        )
    table = read_frequency_table(source, name=name, frequency_unit=frequency_unit, min_points=2)
    return CorrectionTable(
        name=table.name,
        kind=kind,
        frequency_hz=table.frequency_hz,
        value_db=table.value,
        warnings=table.warnings,
    )


Correction = CorrectionTable | float | None


def _correction_db(
    correction: Correction, expected_kind: str, frequency_hz: np.ndarray
) -> np.ndarray | float:
    if correction is None:
        return 0.0
    if isinstance(correction, CorrectionTable):
        if correction.kind != expected_kind:
            raise TraceError(
                f"{expected_kind}= was given a {correction.kind} table", name=correction.name
            )
        return correction.at(frequency_hz)
    value = float(correction)
    if not np.isfinite(value):
        raise TraceError(f"{expected_kind}= must be a finite number of dB, got {correction!r}")
    return value


def apply_corrections(
    spectrum: Spectrum,
    *,
    antenna_factor: Correction = None,
    cable_loss: Correction = None,
    preamp_gain: Correction = None,
    probe_factor: Correction = None,
    probe_unit: str | None = None,
) -> Spectrum:
    """Correct a receiver reading for its transducer and signal path.

    Each correction is a CorrectionTable of the matching kind, a constant in
    dB, or None. The reading must be in dBµV (dBm is first converted in 50 Ω).
    Returns a new Spectrum with level = reading + transducer factor + cable
    loss − preamp gain, whose unit is:

    * dBµV/m when ``antenna_factor`` is given (DOMAIN.md's field-strength relation);
    * ``probe_unit`` (one of LEVEL_UNITS, e.g. "dBuA" for a current probe whose
      factor is −Z_t in dB, "dBpT" for a calibrated H-field probe) when
      ``probe_factor`` is given, and dBµV when it is not stated — a near-field
      probe's reading is usually a relative level, compared only with readings
      of the same probe;
    * dBµV when only path corrections are given (the level at the transducer's port).

    Raises TraceError if a frequency of the spectrum lies outside a table's
    range, or both an antenna and a probe factor are given.
    """
    if antenna_factor is not None and probe_factor is not None:
        raise TraceError(
            "give an antenna factor or a probe factor, not both (one transducer per reading)"
        )
    if probe_unit is not None and probe_factor is None:
        raise TraceError("probe_unit= only applies with probe_factor=")
    if spectrum.unit == "dBuV":
        level = spectrum.level
    elif spectrum.unit == "dBm":
        level = units.dbm_to_dbuv(spectrum.level)
    else:
        raise TraceError(
            f"corrections apply to a receiver reading in dBuV (or dBm), not to levels in {spectrum.unit}"
        )
    f = spectrum.frequency_hz
    transducer = _correction_db(antenna_factor, "antenna_factor", f)
    if probe_factor is not None:
        transducer = _correction_db(probe_factor, "probe_factor", f)
    path = _correction_db(cable_loss, "cable_loss", f)
    gain = _correction_db(preamp_gain, "preamp_gain", f)
    corrected = units.dbuv_to_dbuvm(level, transducer, path, gain)
    if antenna_factor is not None:
        unit = "dBuV/m"
    elif probe_unit is not None:
        unit = units.normalise_level_unit(probe_unit) or ""
        if unit not in LEVEL_UNITS:
            raise TraceError(
                f"unknown probe_unit {probe_unit!r}; expected one of {', '.join(LEVEL_UNITS)}"
            )
    else:
        unit = "dBuV"
    return Spectrum(
        frequency_hz=spectrum.frequency_hz,
        level=np.asarray(corrected, dtype=np.float64),
        unit=unit,
        rbw_hz=spectrum.rbw_hz,
        from_fft=spectrum.from_fft,
    )
