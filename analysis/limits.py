"""Limit lines: the published ones, custom ones from a file, distance
conversion, margins and exceedances.

A limit line is a short run of segments, each constant or linear in log10(f)
(how the standards print a sloping limit). Margins are ``limit − level``:
negative means over the limit. At a frequency where two segments meet, the
lower (stricter) value applies: common practice in reading the tables, and
§15.109(c) says so for FCC radiated limits.

Built-in ids (values in ``analysis.tables``, each with its source):

- ``cispr32-{a,b}-rad-{10m,3m}``: CISPR 32 radiated, 30–1000 MHz, quasi-peak.
- ``cispr32-{a,b}-rad-3m-{av,pk}-1-6ghz``: CISPR 32 radiated, 1–6 GHz at 3 m,
  average and peak. The class A ones are values from memory (their source and
  title say so).
- ``cispr32-{a,b}-cond-{qp,av}``: CISPR 32 conducted, AC mains, 0.15–30 MHz.
- ``fcc15-a-rad-10m``, ``fcc15-b-rad-3m``: FCC §15.109, 30–1000 MHz,
  quasi-peak, from the regulation's µV/m values.
- ``fcc15-{a,b}-cond-{qp,av}``: FCC §15.107, 0.15–30 MHz.
"""

from __future__ import annotations

import math
import numbers
import os
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from functools import cached_property
from pathlib import Path
from types import MappingProxyType

import numpy as np
from numpy.typing import ArrayLike

from analysis import tables
from analysis.errors import TraceError
from analysis.types import LEVEL_UNITS, Exceedance, Peak

RADIATED = "radiated"
CONDUCTED = "conducted"
KINDS = (RADIATED, CONDUCTED)
DETECTORS = ("quasi-peak", "average", "peak")
# The units a limit line may be in, by kind. dBµA is there for custom
# conducted limits measured with a current probe.
LIMIT_UNITS = {RADIATED: ("dBuV/m",), CONDUCTED: ("dBuV", "dBuA")}

FAR_FIELD_CAUTION = (
    "Converting a limit to another distance by the inverse-distance law "
    "(20·log10(d1/d2)) holds in the far field only, beyond about λ/2π "
    "(47.7 m / f in MHz); closer to the source the field does not fall as 1/r "
    "and the converted limit misleads."
)

# dBµV = dBm + 10·log10(50 Ω · 1 mW / (1 µV)²) = dBm + 106.99 (P = V²/R).
_DBM_TO_DBUV_50_OHM = 10.0 * math.log10(50.0 * 1e-3) + 120.0

# A limit file is a few dozen rows; the caps only stop a wrong upload early.
_MAX_LIMIT_FILE_BYTES = 1_000_000
# CISPR 16 receivers start at 9 kHz (band A): a lower frequency in a file
# almost surely means the header did not say the unit.
_LOWEST_EMISSIONS_HZ = 9e3

_FREQUENCY_UNITS = {"hz": 1.0, "khz": 1e3, "mhz": 1e6, "ghz": 1e9}


@dataclass(frozen=True)
class Segment:
    """A piece of a limit line: ``start_level`` at ``start_hz`` to
    ``stop_level`` at ``stop_hz``, linear in log10(f) between them."""

    start_hz: float
    stop_hz: float
    start_level: float
    stop_level: float


@dataclass(frozen=True, eq=False)
class LimitLine:
    """A limit line in ``unit`` ("dBuV/m" radiated, "dBuV" or "dBuA" conducted).

    ``segments`` go up in frequency and do not overlap; where one ends and the
    next starts at the same frequency the lower value applies there; between
    segments that do not touch there is no limit (NaN). ``distance_m`` is the
    measuring distance of a radiated line (None when a custom file does not
    say). Construction checks all of this and raises TraceError.
    """

    id: str
    title: str
    kind: str
    detector: str
    unit: str
    distance_m: float | None
    segments: tuple[Segment, ...]
    source: str

    def __post_init__(self) -> None:
        where = f"limit {self.id}"
        if self.kind not in KINDS:
            raise TraceError(f"kind {self.kind!r} is not one of {', '.join(KINDS)}", name=where)
        if self.detector not in DETECTORS:
            raise TraceError(
                f"detector {self.detector!r} is not one of {', '.join(DETECTORS)}", name=where
            )
        if self.unit not in LIMIT_UNITS[self.kind]:
            raise TraceError(
                f"a {self.kind} limit is in {' or '.join(LIMIT_UNITS[self.kind])}, "
                f"not {self.unit!r}",
                name=where,
            )
        if self.kind == CONDUCTED and self.distance_m is not None:
            raise TraceError("a conducted limit has no measuring distance", name=where)
        if self.distance_m is not None:
            _positive_metres(self.distance_m, where)
        if not self.segments:
            raise TraceError("a limit line needs at least one segment", name=where)
        try:
            starts, stops, start_levels, stop_levels = self._table
        except (AttributeError, TypeError, ValueError) as exc:
            raise TraceError("segments must be Segment values of numbers", name=where) from exc
        if not (np.all(np.isfinite(self._table)) and np.all(starts > 0)):
            raise TraceError(
                "segment frequencies and levels must be finite, above 0 Hz", name=where
            )
        if np.any(stops <= starts):
            raise TraceError("each segment must stop above the frequency it starts at", name=where)
        if np.any(starts[1:] < stops[:-1]):
            raise TraceError("segments must go up in frequency without overlapping", name=where)

    @cached_property
    def _table(self) -> np.ndarray:
        # Rows: start_hz, stop_hz, start_level, stop_level; one column per segment.
        return np.array(
            [[s.start_hz, s.stop_hz, s.start_level, s.stop_level] for s in self.segments],
            dtype=float,
        ).T.reshape(4, -1)

    @property
    def frequency_range_hz(self) -> tuple[float, float]:
        """(lowest, highest) frequency the line covers."""
        return float(self.segments[0].start_hz), float(self.segments[-1].stop_hz)

    def level_at(self, frequency_hz: ArrayLike) -> np.ndarray:
        """The limit at each frequency, same shape as the input, in ``unit``.

        NaN outside the line's range and in gaps between segments; where two
        segments meet, the lower (stricter) of their two values.
        """
        try:
            f = np.asarray(frequency_hz, dtype=float)
        except (TypeError, ValueError) as exc:
            raise TraceError("frequencies must be numbers in Hz", name=f"limit {self.id}") from exc
        starts, stops, start_levels, stop_levels = self._table
        # The last segment starting at or below f; f belongs to it if it has
        # not stopped yet.
        index = np.clip(np.searchsorted(starts, f, side="right") - 1, 0, starts.size - 1)
        inside = (f >= starts[index]) & (f <= stops[index])
        # Ratios keep the precision of very short segments; one too short to
        # resolve in log10 takes its start level.
        start = starts[index]
        offset = np.log10(np.where(inside, f, start) / start)
        span = np.log10(stops[index] / start)
        fraction = np.divide(offset, span, out=np.zeros_like(offset), where=span > 0)
        level = start_levels[index] + (stop_levels[index] - start_levels[index]) * fraction
        # Exactly where the previous segment stops and this one starts, the
        # stricter of the two values applies.
        previous = np.maximum(index - 1, 0)
        at_edge = inside & (index > 0) & (f == starts[index]) & (stops[previous] == f)
        level = np.where(at_edge, np.minimum(level, stop_levels[previous]), level)
        return np.where(inside, level, np.nan)

    def at_distance(self, distance_m: float) -> LimitLine:
        """The same radiated line for another measuring distance.

        L(d2) = L(d1) + 20·log10(d1/d2), the inverse-distance law, which holds
        in the far field only (see FAR_FIELD_CAUTION). The standards' own
        tables round 10 m → 3 m to 10 dB; this gives 10.46 dB. Raises
        TraceError for a conducted line, a line with no distance, or a
        distance that is not a positive number.
        """
        where = f"limit {self.id}"
        if self.kind != RADIATED:
            raise TraceError(
                "only a radiated limit can be converted to another distance", name=where
            )
        if self.distance_m is None:
            raise TraceError(
                "the limit does not say its measuring distance, so it cannot be converted",
                name=where,
            )
        distance_m = _positive_metres(distance_m, where)
        shift_db = 20.0 * math.log10(self.distance_m / distance_m)
        label = f"{distance_m:g} m"
        return replace(
            self,
            id=f"{self.id}@{distance_m:g}m",
            title=f"{self.title}, converted to {label}",
            distance_m=float(distance_m),
            segments=tuple(
                Segment(s.start_hz, s.stop_hz, s.start_level + shift_db, s.stop_level + shift_db)
                for s in self.segments
            ),
            source=(
                f"{self.source}; converted from {self.distance_m:g} m to {label} by the "
                f"inverse-distance law ({shift_db:+.2f} dB, far field only)"
            ),
        )

    def points(self) -> tuple[np.ndarray, np.ndarray]:
        """(frequency_hz, level) vertices for drawing the line.

        Two points per segment, so a step shows as a vertical jump at the
        shared frequency; a NaN level separates segments that do not touch.
        Sloping segments are straight on a log-frequency axis.
        """
        starts, stops, start_levels, stop_levels = self._table
        frequency_hz = np.column_stack([starts, stops]).ravel()
        level = np.column_stack([start_levels, stop_levels]).ravel()
        gaps = np.flatnonzero(starts[1:] > stops[:-1])
        if gaps.size:
            # Insert (stop, NaN) after each segment followed by a gap.
            at = 2 * (gaps + 1)
            frequency_hz = np.insert(frequency_hz, at, stops[gaps])
            level = np.insert(level, at, np.nan)
        return frequency_hz, level


def _real(value: object) -> float | None:
    """value as a float if it is a finite real number (not a bool), else None."""
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        return None
    number = float(value)
    return number if math.isfinite(number) else None


def _positive_metres(distance_m: object, where: str) -> float:
    number = _real(distance_m)
    if number is None or number <= 0:
        raise TraceError(
            f"measuring distance must be a positive number of metres, not {distance_m!r}",
            name=where,
        )
    return number


def dbuv_per_m_from_uv_per_m(field_uv_per_m: ArrayLike) -> np.ndarray:
    """Field strength in dBµV/m from µV/m: 20·log10(E / 1 µV/m)."""
    return 20.0 * np.log10(np.asarray(field_uv_per_m, dtype=float))


def _from_table(table: tables.LimitTable) -> LimitLine:
    if table.unit == "uV/m":
        rows = [
            (start, stop, *dbuv_per_m_from_uv_per_m((first, last)).tolist())
            for start, stop, first, last in table.rows
        ]
        unit = "dBuV/m"
    else:
        rows, unit = list(table.rows), table.unit
    return LimitLine(
        id=table.id,
        title=table.title,
        kind=table.kind,
        detector=table.detector,
        unit=unit,
        distance_m=table.distance_m,
        segments=tuple(Segment(*map(float, row)) for row in rows),
        source=table.source,
    )


BUILTIN_LIMITS: Mapping[str, LimitLine] = MappingProxyType(
    {
        line.id: line
        for line in map(
            _from_table,
            (
                *tables.CISPR32_RADIATED_LIMITS,
                *tables.CISPR32_RADIATED_ABOVE_1GHZ_LIMITS,
                *tables.CISPR32_CONDUCTED_LIMITS,
                *tables.FCC15_RADIATED_LIMITS,
                *tables.FCC15_CONDUCTED_LIMITS,
            ),
        )
    }
)


def get_limit(limit_id: str) -> LimitLine:
    """The built-in line with this id; TraceError listing the known ids otherwise."""
    try:
        return BUILTIN_LIMITS[limit_id]
    except (KeyError, TypeError):
        raise TraceError(
            f"unknown limit {limit_id!r}; known limits: {', '.join(BUILTIN_LIMITS)}"
        ) from None


def list_limits() -> tuple[LimitLine, ...]:
    """All built-in lines, CISPR 32 first, then FCC Part 15."""
    return tuple(BUILTIN_LIMITS.values())


# ---------------------------------------------------------------- limit files


def read_limit_file(
    source: str | os.PathLike | bytes,
    *,
    name: str | None = None,
    limit_id: str = "custom",
    kind: str = RADIATED,
    detector: str = "quasi-peak",
    unit: str | None = None,
    distance_m: float | None = None,
) -> LimitLine:
    """A limit line from a small text file.

    ``source`` is a path (str or PathLike) or the file's bytes; ``name`` is
    what error messages call it (default: the file name, or "limit file").

    Format: lines starting with ``#`` (and anything after a ``#``) are
    comments; blank lines are skipped; an optional header row comes before the
    data; each data row is ``frequency, level``, separated by commas,
    semicolons or tabs (with semicolons or tabs a comma inside a number is read
    as a decimal point). The frequency unit comes from the header, e.g.
    ``Frequency (MHz)`` or ``Freq [kHz]``; without one it is Hz. The level
    unit may also be in the header (``Limit (dBµV/m)``); otherwise ``unit``,
    or the kind's usual unit (dBµV/m radiated, dBµV conducted). Frequencies go
    up; consecutive points are joined linearly in log10(f); a frequency given
    twice makes a step, where the stricter value applies.

    Raises TraceError naming the file, the line and what was expected.
    """
    text, name = _read_text(source, name)
    if kind not in KINDS:
        raise TraceError(f"kind {kind!r} is not one of {', '.join(KINDS)}", name=name)
    if detector not in DETECTORS:
        raise TraceError(f"detector {detector!r} is not one of {', '.join(DETECTORS)}", name=name)
    if unit is not None and unit not in LIMIT_UNITS[kind]:
        raise TraceError(
            f"a {kind} limit is in {' or '.join(LIMIT_UNITS[kind])}, not {unit!r}", name=name
        )
    if kind == CONDUCTED and distance_m is not None:
        raise TraceError("a conducted limit has no measuring distance", name=name)
    rows, header_unit, last_line = _parse_rows(text, name)
    if header_unit is not None:
        header_line, header_level_unit = header_unit
        if header_level_unit not in LIMIT_UNITS[kind]:
            raise TraceError(
                f"the header gives levels in {header_level_unit}, but a {kind} limit is in "
                f"{' or '.join(LIMIT_UNITS[kind])}",
                name=name,
                line=header_line,
            )
        if unit is not None and unit != header_level_unit:
            raise TraceError(
                f"the header gives levels in {header_level_unit}, but {unit} was chosen",
                name=name,
                line=header_line,
            )
        unit = header_level_unit
    segments = _segments_from_points(rows, name, last_line)
    return LimitLine(
        id=limit_id,
        title=f"Custom limit ({name})",
        kind=kind,
        detector=detector,
        unit=unit or LIMIT_UNITS[kind][0],
        distance_m=None if distance_m is None else _positive_metres(distance_m, name),
        segments=segments,
        source=f"custom limit file {name}",
    )


def _read_text(source: str | os.PathLike | bytes, name: str | None) -> tuple[str, str]:
    if isinstance(source, bytes | bytearray):
        raw, name = bytes(source), name or "limit file"
    elif isinstance(source, str | os.PathLike):
        path = Path(source)
        name = name or path.name
        try:
            if path.stat().st_size > _MAX_LIMIT_FILE_BYTES:
                raise TraceError(
                    f"larger than {_MAX_LIMIT_FILE_BYTES // 1000} kB; a limit file is a few "
                    "dozen rows",
                    name=name,
                )
            raw = path.read_bytes()
        except OSError as exc:
            raise TraceError(f"cannot be read ({exc.strerror or exc})", name=name) from None
    else:
        raise TraceError("expected a path or the file's bytes", name=name or "limit file")
    if len(raw) > _MAX_LIMIT_FILE_BYTES:
        raise TraceError(
            f"larger than {_MAX_LIMIT_FILE_BYTES // 1000} kB; a limit file is a few dozen rows",
            name=name,
        )
    try:
        return raw.decode("utf-8-sig"), name
    except UnicodeDecodeError:
        # Older instrument software writes µ in Latin-1.
        return raw.decode("latin-1"), name


_BRACKETED = re.compile(r"[(\[]\s*([^)\]]*?)\s*[)\]]")
_FREQUENCY_UNIT = re.compile(r"(?<![a-z])(g|m|k|)hz(?![a-z])", re.IGNORECASE)
_LEVEL_UNIT = re.compile(r"(?<![a-z])db\s*[uµμ]\s*(v\s*/\s*m|v|a)(?![a-z/])", re.IGNORECASE)
_LEVEL_UNIT_NAMES = {"v/m": "dBuV/m", "v": "dBuV", "a": "dBuA"}


def _parse_rows(
    text: str, name: str
) -> tuple[list[tuple[int, float, float]], tuple[int, str] | None, int]:
    """Rows (line number, frequency_hz, level), the header's level unit (with
    its line number) if it gives one, and the last line number read."""
    delimiter: str | None = None
    header_seen = False
    scale_hz = 1.0
    header_unit: tuple[int, str] | None = None
    rows: list[tuple[int, float, float]] = []
    line_number = 0
    # A limit file is a few dozen rows: reading it line by line is what lets
    # every error name its line.
    for line_number, raw_line in enumerate(text.splitlines(), start=1):
        line = raw_line.split("#", 1)[0].strip()
        if not line:
            continue
        if delimiter is None:
            delimiter = "\t" if "\t" in line else ";" if ";" in line else ","
        fields = [f.strip() for f in line.split(delimiter)]
        while fields and not fields[-1]:
            fields.pop()  # a trailing delimiter is harmless
        if fields and not rows and not header_seen and not _is_number(fields[0], delimiter):
            if len(fields) != 2:
                raise TraceError(
                    f"expected a header of two columns (frequency, level), found {len(fields)}",
                    name=name,
                    line=line_number,
                )
            header_seen = True
            scale_hz = _header_frequency_scale(fields[0], name, line_number)
            level_unit = _header_level_unit(fields[1], name, line_number)
            header_unit = None if level_unit is None else (line_number, level_unit)
            continue
        if len(fields) != 2:
            raise TraceError(
                f"expected two values 'frequency{delimiter} level', found {len(fields)}",
                name=name,
                line=line_number,
            )
        frequency = _number(fields[0], "frequency", delimiter, name, line_number)
        level = _number(fields[1], "level", delimiter, name, line_number)
        frequency_hz = frequency * scale_hz
        if frequency_hz <= 0:
            raise TraceError(f"frequency {fields[0]} is not above 0", name=name, line=line_number)
        if frequency_hz < _LOWEST_EMISSIONS_HZ:
            raise TraceError(
                f"frequency {frequency_hz:g} Hz is below 9 kHz, where emissions limits start; "
                "name the unit in a header such as 'Frequency (MHz), Level (dBµV/m)'",
                name=name,
                line=line_number,
            )
        rows.append((line_number, frequency_hz, level))
    return rows, header_unit, line_number


def _header_frequency_scale(field: str, name: str, line_number: int) -> float:
    """Hz per unit of the frequency column: from the header, else 1 (Hz)."""
    bracketed = _BRACKETED.search(field)
    text = bracketed.group(1) if bracketed else field
    match = _FREQUENCY_UNIT.search(text)
    if bracketed and (match is None or match.group(0) != text):
        raise TraceError(
            f"frequency unit {text!r} not understood; expected Hz, kHz, MHz or GHz",
            name=name,
            line=line_number,
        )
    if match is None:
        return 1.0  # a bare name such as "Frequency": the documented default, Hz
    return _FREQUENCY_UNITS[match.group(0).lower()]


def _header_level_unit(field: str, name: str, line_number: int) -> str | None:
    """The level unit named in the header ("dBuV/m", "dBuV", "dBuA"), or None."""
    bracketed = _BRACKETED.search(field)
    text = bracketed.group(1) if bracketed else field
    match = _LEVEL_UNIT.search(text)
    if bracketed and (match is None or match.group(0) != text):
        raise TraceError(
            f"level unit {text!r} not understood; expected dBµV/m, dBµV or dBµA",
            name=name,
            line=line_number,
        )
    if match is None:
        return None  # a bare name such as "Limit"
    return _LEVEL_UNIT_NAMES[re.sub(r"\s", "", match.group(1)).lower()]


_NUMBER = re.compile(r"[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?")


def _is_number(text: str, delimiter: str) -> bool:
    if delimiter != ",":
        text = text.replace(",", ".")
    return _NUMBER.fullmatch(text) is not None


def _number(text: str, what: str, delimiter: str, name: str, line_number: int) -> float:
    if delimiter != ",":
        text = text.replace(",", ".")  # decimal comma, allowed when commas do not separate
    if _NUMBER.fullmatch(text) is None:
        raise TraceError(
            f"{text!r} is not a number in the {what} column", name=name, line=line_number
        )
    return float(text)


def _segments_from_points(
    rows: list[tuple[int, float, float]], name: str, last_line: int
) -> tuple[Segment, ...]:
    if len(rows) < 2:
        raise TraceError(
            f"expected at least two rows 'frequency, level', found {len(rows)}",
            name=name,
            line=max(last_line, 1),
        )
    lines = np.array([r[0] for r in rows])
    frequency_hz = np.array([r[1] for r in rows])
    level = np.array([r[2] for r in rows])
    step = np.diff(frequency_hz)
    falling = np.flatnonzero(step < 0)
    if falling.size:
        i = falling[0] + 1
        raise TraceError(
            f"frequency {frequency_hz[i]:g} Hz is below the previous row's "
            f"{frequency_hz[i - 1]:g} Hz; rows must go up in frequency",
            name=name,
            line=int(lines[i]),
        )
    repeated = step == 0
    triple = np.flatnonzero(repeated[1:] & repeated[:-1])
    if triple.size:
        raise TraceError(
            f"frequency {frequency_hz[triple[0]]:g} Hz appears more than twice; "
            "twice makes a step, a third row has no meaning",
            name=name,
            line=int(lines[triple[0] + 2]),
        )
    if repeated[0] or repeated[-1]:
        i = 1 if repeated[0] else len(rows) - 1
        raise TraceError(
            f"a step at frequency {frequency_hz[i]:g} Hz needs the line to go on on both sides",
            name=name,
            line=int(lines[i]),
        )
    # One segment between each pair of consecutive distinct frequencies; a
    # repeated frequency ends one segment and starts the next at another level.
    keep = np.flatnonzero(~repeated)
    return tuple(
        Segment(float(a), float(b), float(la), float(lb))
        for a, b, la, lb in zip(
            frequency_hz[keep],
            frequency_hz[keep + 1],
            level[keep],
            level[keep + 1],
            strict=True,
        )
    )


# ---------------------------------------------------------- margins, exceedances


def _in_limit_unit(level: np.ndarray, unit: str, limit: LimitLine) -> np.ndarray:
    """Levels in the limit's unit, or TraceError when no plain unit change gets there.

    The only conversion done here is dBm → dBµV in 50 Ω (a unit change). A
    voltage can never become a field strength without the antenna factor and
    cable loss (analysis.corrections), and a current needs the impedance, so
    those are refused rather than guessed.
    """
    where = f"limit {limit.id}"
    if unit not in LEVEL_UNITS:
        raise TraceError(f"level unit {unit!r} is not one of {', '.join(LEVEL_UNITS)}", name=where)
    if unit == "dBm" and limit.unit in ("dBuV", "dBuV/m"):
        level, unit = level + _DBM_TO_DBUV_50_OHM, "dBuV"
    if unit == limit.unit:
        return level
    if limit.unit == "dBuV/m" and unit == "dBuV":
        raise TraceError(
            "a trace in dBµV cannot be compared with a limit in dBµV/m: correct it with "
            "the antenna factor and cable loss first (a near-field probe reading gives no "
            "field strength at all)",
            name=where,
        )
    raise TraceError(
        f"a trace in {unit} cannot be compared with a limit in {limit.unit}", name=where
    )


def margins(frequency_hz: ArrayLike, level: ArrayLike, unit: str, limit: LimitLine) -> np.ndarray:
    """``limit − level`` in dB at each point (negative = over the limit).

    ``level`` is in ``unit``; a dBm trace is taken as dBm into 50 Ω and turned
    into dBµV first. NaN outside the limit's range. TraceError when the shapes
    differ or the units cannot be compared (see exceedances).
    """
    try:
        f = np.asarray(frequency_hz, dtype=float)
        values = np.asarray(level, dtype=float)
    except (TypeError, ValueError) as exc:
        raise TraceError(
            "frequencies and levels must be numbers", name=f"limit {limit.id}"
        ) from exc
    if f.shape != values.shape:
        raise TraceError(
            f"{f.size} frequencies but {values.size} levels; expected one level per frequency",
            name=f"limit {limit.id}",
        )
    return limit.level_at(f) - _in_limit_unit(values, unit, limit)


def exceedances(
    peaks: Sequence[Peak], unit: str, limit: LimitLine, *, guard_db: float = 0.0
) -> tuple[Exceedance, ...]:
    """The peaks whose margin (limit − level) is below ``guard_db``.

    With ``guard_db=0`` these are the peaks over the limit; with 6 dB, also
    those within 6 dB of it. Peaks outside the limit's range are ignored. The
    result is in frequency order, and ``Exceedance.level`` is the peak's level
    in the limit's unit, so ``margin_db == limit - level`` holds exactly.

    Units: a peak level in the limit's unit is used as is; dBm is turned into
    dBµV (50 Ω, +106.99 dB). A dBµV (or dBm) trace against a dBµV/m limit is
    refused with a TraceError: it needs the antenna factor and cable loss
    first. So is any other mix, and a guard band that is negative or not a
    number.
    """
    guard = _real(guard_db)
    if guard is None or guard < 0:
        raise TraceError(
            f"guard band must be a number of dB, 0 or more, not {guard_db!r}",
            name=f"limit {limit.id}",
        )
    frequency_hz = np.array([p.frequency_hz for p in peaks], dtype=float)
    level = _in_limit_unit(np.array([p.level for p in peaks], dtype=float), unit, limit)
    limit_level = limit.level_at(frequency_hz)
    margin_db = limit_level - level
    # NaN margins (outside the range) compare False and drop out here.
    chosen = np.flatnonzero(margin_db < guard)
    chosen = chosen[np.argsort(frequency_hz[chosen], kind="stable")]
    return tuple(
        Exceedance(
            frequency_hz=float(frequency_hz[i]),
            level=float(level[i]),
            limit=float(limit_level[i]),
            margin_db=float(margin_db[i]),
        )
        for i in chosen
    )
