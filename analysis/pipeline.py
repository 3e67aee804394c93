"""The whole analysis of one trace, in the order the worker and the CLI need it.

    read → (FFT if a time record) → peaks → families → attribution
         → margins against a limit line → signature → plotting envelope

``analyse_file`` is the one entry point; everything it returns is plain data
(``Analysis``), and ``Analysis.to_json()`` is the JSON contract of
``python -m analysis --json`` (documented in analysis/__main__.py).
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import BinaryIO

import numpy as np

from analysis import __version__
from analysis.arrays import distinct_sorted
from analysis.attribution import attribute
from analysis.envelope import envelope as decimate
from analysis.fft import amplitude_spectrum
from analysis.harmonics import find_families
from analysis.limits import FAR_FIELD_CAUTION, LimitLine, exceedances, get_limit
from analysis.peaks import find_peaks
from analysis.reader import read_trace
from analysis.signature import Signature, signature_of
from analysis.types import (
    SPECTRUM,
    Attribution,
    Exceedance,
    Family,
    Peak,
    Source,
    Spectrum,
    Trace,
)

ENGINE_VERSION = __version__

Progress = Callable[[float], None]


@dataclass(frozen=True, eq=False)
class Analysis:
    trace: Trace
    spectrum: Spectrum
    peaks: tuple[Peak, ...]
    families: tuple[Family, ...]
    attributions: tuple[Attribution, ...]
    exceedances: tuple[Exceedance, ...] | None
    limit: LimitLine | None
    signature: Signature
    envelope: tuple[np.ndarray, np.ndarray]
    warnings: tuple[str, ...]
    peak_resolution_hz: np.ndarray

    @property
    def domain(self) -> str:
        return self.trace.domain

    def to_json(self) -> dict:
        """The CLI's JSON object (plus warnings, limit, signature and a few facts)."""
        out: dict = {
            "unit": self.spectrum.unit,
            "domain": self.domain,
            "engine_version": ENGINE_VERSION,
            "points": len(self.spectrum),
            "frequency_range_hz": [float(self.spectrum.frequency_hz[0]), float(self.spectrum.frequency_hz[-1])],
            "rbw_hz": self.spectrum.rbw_hz,
            "peaks": [
                {
                    "frequency_hz": p.frequency_hz,
                    "level": p.level,
                    "prominence_db": p.prominence_db,
                    "width_hz": p.width_hz,
                    # Kept so a later re-attribution (new known sources) needs no re-read.
                    "resolution_hz": float(r),
                }
                for p, r in zip(self.peaks, self.peak_resolution_hz, strict=True)
            ],
            "families": [
                {
                    "fundamental_hz": f.fundamental_hz,
                    "orders": list(f.orders),
                    "odd_only": f.odd_only,
                    "spread_spectrum": f.spread_spectrum,
                }
                for f in self.families
            ],
            "warnings": list(self.warnings),
            "signature": self.signature.to_dict(),
        }
        if self.exceedances is not None and self.limit is not None:
            out["limit"] = {
                "id": self.limit.id,
                "title": self.limit.title,
                "unit": self.limit.unit,
                "detector": self.limit.detector,
                "distance_m": self.limit.distance_m,
            }
            out["exceedances"] = [
                {"frequency_hz": e.frequency_hz, "level": e.level, "limit": e.limit, "margin_db": e.margin_db}
                for e in self.exceedances
            ]
        if self.attributions:
            out["attributions"] = [
                {
                    "frequency_hz": a.frequency_hz,
                    "terms": [{"source": t.source, "order": t.order} for t in a.terms],
                    "error_hz": a.error_hz,
                }
                for a in self.attributions
            ]
        return out


def resolve_limit(limit: str | LimitLine | None, distance_m: float | None) -> tuple[LimitLine | None, list[str]]:
    """The limit line to judge against, converted to the measuring distance when that differs."""
    if limit is None:
        return None, []
    line = get_limit(limit) if isinstance(limit, str) else limit
    warnings = []
    if distance_m and line.kind == "radiated" and line.distance_m and abs(distance_m - line.distance_m) > 1e-9:
        line = line.at_distance(distance_m)
        warnings.append(f"limit converted to {distance_m:g} m. {FAR_FIELD_CAUTION}")
    return line, warnings


def peak_resolution_hz(spectrum: Spectrum, peaks: Sequence[Peak]) -> np.ndarray:
    """How precisely each peak's frequency is known: the trace's point spacing there."""
    if not peaks:
        return np.zeros(0)
    frequency_hz = spectrum.frequency_hz
    query = np.array([p.frequency_hz for p in peaks], dtype=float)
    # The step ending at point k is f[k] − f[k−1]; interpolating those steps
    # at a peak needs only the few around it, not a diff of the whole trace.
    # np.interp on that subset finds the same bracketing pair, so the same value.
    around = np.searchsorted(frequency_hz, query)[:, None] + _AROUND
    k = np.clip(around, 1, frequency_hz.size - 1, out=around).ravel()
    k.sort()
    k = distinct_sorted(k)
    return np.interp(query, frequency_hz[k], frequency_hz[k] - frequency_hz[k - 1])


# The points around a peak whose steps peak_resolution_hz interpolates.
_AROUND = np.arange(-2, 3)[None, :]
_AROUND.flags.writeable = False


def analyse_file(
    source: str | os.PathLike | bytes | BinaryIO,
    *,
    name: str | None = None,
    domain: str | None = None,
    frequency_unit: str | None = None,
    level_unit: str | None = None,
    limit: str | LimitLine | None = None,
    distance_m: float | None = None,
    sources: Sequence[Source] = (),
    guard_db: float = 0.0,
    prominence_db: float = 6.0,
    window: str = "flattop",
    envelope_points: int = 4000,
    progress: Progress | None = None,
) -> Analysis:
    """Read ``source`` and analyse it. Raises TraceError (one line) for anything wrong with the input."""
    report = progress or (lambda fraction: None)
    report(0.0)
    trace = read_trace(
        source, name=name, domain=domain, frequency_unit=frequency_unit, level_unit=level_unit
    )
    report(0.25)
    return analyse_trace(
        trace, limit=limit, distance_m=distance_m, sources=sources, guard_db=guard_db,
        prominence_db=prominence_db, window=window, envelope_points=envelope_points,
        progress=lambda f: report(0.25 + 0.75 * f),
    )


def analyse_trace(
    trace: Trace,
    *,
    limit: str | LimitLine | None = None,
    distance_m: float | None = None,
    sources: Sequence[Source] = (),
    guard_db: float = 0.0,
    prominence_db: float = 6.0,
    window: str = "flattop",
    envelope_points: int = 4000,
    progress: Progress | None = None,
) -> Analysis:
    """Analyse a trace already read (see ``analyse_file``)."""
    report = progress or (lambda fraction: None)
    line, warnings = resolve_limit(limit, distance_m)
    if trace.domain == SPECTRUM:
        spectrum = trace.data
    else:
        spectrum = amplitude_spectrum(trace.data, window=window, progress=lambda f: report(0.6 * f))
    report(0.6)
    peaks = find_peaks(spectrum, prominence_db=prominence_db)
    report(0.8)
    resolution = peak_resolution_hz(spectrum, peaks)
    families = find_families(peaks, resolution_hz=resolution)
    attributions = attribute(peaks, sources, resolution_hz=resolution) if sources else ()
    found = exceedances(peaks, spectrum.unit, line, guard_db=guard_db) if line is not None else None
    env = decimate(spectrum.frequency_hz, spectrum.level, max_points=envelope_points)
    report(1.0)
    return Analysis(
        trace=trace,
        spectrum=spectrum,
        peaks=tuple(peaks),
        families=tuple(families),
        attributions=tuple(attributions),
        exceedances=None if found is None else tuple(found),
        limit=line,
        signature=signature_of(peaks, families),
        envelope=env,
        warnings=tuple(trace.warnings) + tuple(warnings),
        peak_resolution_hz=np.asarray(resolution, dtype=float),
    )
