"""Frequencies and tolerances as a person types them.

    parse_frequency("2.2 MHz")                     → 2.2e6
    parse_frequencies("48 MHz, 96 MHz, 144.2 MHz") → [48e6, 96e6, 144.2e6]
    parse_frequencies("48e6 96e6")                 → [48e6, 96e6]
    parse_frequencies("2.2MHz;4.4 MHz")            → [2.2e6, 4.4e6]
    parse_tolerance("0.5 %") / ("50 ppm") / ("200 kHz")

A frequency is a number with an optional SI prefix and an optional "Hz"
(``25e6``, ``25MHz``, ``2.2 MHz``, ``125k``); the prefix is read without
regard to case, so ``m`` is mega, as in the rest of emicase: nobody types
millihertz for an emission. Frequencies in a list are separated by commas,
semicolons or spaces. Whatever cannot be read raises TraceError with one line
naming the token and its position (characters counted from 1).
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np

from analysis.errors import TraceError

_SI = {"": 1.0, "k": 1e3, "m": 1e6, "g": 1e9}
_NUMBER = r"(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][-+]?[0-9]+)?"
_UNIT = r"[kKmMgG]?[hH][zZ]|[kKmMgG]"
_FREQ = re.compile(rf"^\s*({_NUMBER})\s*([kKmMgG]?)(?:[hH][zZ])?\s*$")
# One item of a list: a number, then a unit (possibly after a space), then a
# separator or the end. A space alone may separate two items ("48e6 96e6").
_ITEM = re.compile(rf"(?P<number>{_NUMBER})(?:\s*(?P<unit>{_UNIT}))?(?=[\s,;]|$)")
_SEPARATORS = re.compile(r"[\s,;]*")
_SPACES = re.compile(r"\s*")
_WORD = re.compile(r"[^\s,;]+")

# The emissions bands: CISPR 16-1-1 band A starts at 9 kHz (DOMAIN.md); 40 GHz
# is the top of the highest radiated-emissions limits (common practice).
LOWEST_HZ = 9e3
HIGHEST_HZ = 40e9
MAX_FREQUENCIES = 200
# Wider than this and a tolerance matches almost anything (the teams' own
# frequency tolerance is capped at 20 % too).
MAX_RELATIVE_TOLERANCE = 0.2
MAX_ABSOLUTE_TOLERANCE_HZ = 100e6

_EXAMPLE = "e.g. 48 MHz, 96 MHz, 144.2 MHz"


def parse_frequency(text: str) -> float:
    """``25e6``, ``25MHz``, ``2.2 MHz``, ``125k`` → Hz (finite, ≥ 0). TraceError (a ValueError) with a clear message otherwise."""
    m = _FREQ.match(text) if isinstance(text, str) else None
    if not m:
        raise TraceError(
            f"'{_printable(str(text))}' is not a frequency (e.g. 25e6, 25MHz, 2.2 MHz)"
        )
    value = float(m.group(1)) * _SI[m.group(2).lower()]
    if not np.isfinite(value):
        raise TraceError(f"'{_printable(text.strip())}' is too large to be a frequency")
    return value


def _printable(text: str) -> str:
    # A typed control character (a NUL, say) is shown, not echoed.
    return "".join(ch if ch.isprintable() else "?" for ch in text)


def _unit_factor(unit: str | None) -> float:
    if not unit:
        return 1.0
    prefix = unit[0].lower() if unit[0] not in "hH" else ""
    return _SI[prefix]


def format_hz(value: float) -> str:
    """A frequency the way an engineer writes it: ``144.2 MHz``, ``125 kHz``."""
    for scale, unit in ((1e9, "GHz"), (1e6, "MHz"), (1e3, "kHz")):
        if abs(value) >= scale:
            return f"{value / scale:.6g} {unit}"
    return f"{value:.6g} Hz"


def _not_a_frequency(text: str, i: int) -> None:
    word = _printable(_WORD.match(text, i).group(0))
    raise TraceError(
        f"'{word}' (character {i + 1}) is not a frequency: write a number with an "
        f"optional unit, {_EXAMPLE}, or 48e6"
    )


def parse_frequencies(
    text: str,
    *,
    lowest_hz: float = LOWEST_HZ,
    highest_hz: float = HIGHEST_HZ,
    max_count: int = MAX_FREQUENCIES,
) -> np.ndarray:
    """The frequencies of a typed list, in Hz, in the order typed (float64 array).

    Requires at least one frequency, each inside [lowest_hz, highest_hz] and
    at most ``max_count`` of them. Raises TraceError naming the first token
    that is not a frequency (or out of range) and its character position.
    """
    if not isinstance(text, str):
        raise TraceError(f"frequencies must be text, {_EXAMPLE}")
    values: list[float] = []
    i = _SEPARATORS.match(text).end()
    while i < len(text):
        m = _ITEM.match(text, i)
        if m is None:
            _not_a_frequency(text, i)
        if not m.group("unit"):
            # "48 MHzz": the bad unit is the mistake, not the 48 Hz before it.
            j = _SPACES.match(text, m.end()).end()
            if j < len(text) and text[j] not in ",;" and _ITEM.match(text, j) is None:
                _not_a_frequency(text, j)
        value = float(m.group("number")) * _unit_factor(m.group("unit"))
        if not (lowest_hz <= value <= highest_hz):
            # A bare number below the band is most likely a frequency without its unit.
            hint = " — add a unit, e.g. MHz" if not m.group("unit") and value < lowest_hz else ""
            shown = format_hz(value) if np.isfinite(value) else "too large to be a frequency"
            raise TraceError(
                f"'{_printable(m.group(0))}' (character {i + 1}) is {shown}, outside "
                f"{format_hz(lowest_hz)} to {format_hz(highest_hz)}{hint}"
            )
        values.append(value)
        if len(values) > max_count:
            raise TraceError(f"more than {max_count} frequencies given; search with fewer")
        i = _SEPARATORS.match(text, m.end()).end()
    if not values:
        raise TraceError(f"no frequencies given: type them, {_EXAMPLE}")
    return np.array(values, dtype=float)


@dataclass(frozen=True)
class Tolerance:
    """How far two frequencies may lie apart and still match.

    Either relative (``rel_tol``, a fraction: 0.005 = 0.5 %) or absolute
    (``abs_tol_hz``); the other is 0. ``text`` is how it reads on a page.
    """

    rel_tol: float
    abs_tol_hz: float
    text: str


def tolerance_from_percent(percent: float) -> Tolerance:
    """A relative tolerance given in % (a team's setting), checked like a typed one."""
    return _relative(float(percent) / 100.0, f"{float(percent):g} %", str(percent))


def _relative(fraction: float, text: str, token: str) -> Tolerance:
    if not fraction > 0:
        raise TraceError(f"tolerance '{token}' must be above 0")
    if not fraction <= MAX_RELATIVE_TOLERANCE:  # an overflow to inf is wide too
        raise TraceError(
            f"tolerance '{token}' is wider than {MAX_RELATIVE_TOLERANCE * 100:g} %, "
            "which matches almost anything"
        )
    return Tolerance(rel_tol=fraction, abs_tol_hz=0.0, text=text)


_PERCENT = re.compile(rf"^\s*({_NUMBER})\s*%\s*$")
_PPM = re.compile(rf"^\s*({_NUMBER})\s*ppm\s*$", re.IGNORECASE)


def parse_tolerance(text: str) -> Tolerance:
    """``0.5 %``, ``50 ppm``, ``200 kHz`` or ``200`` (Hz) → Tolerance.

    Requires a value above 0, at most 20 % (or 100 MHz). Raises TraceError
    with the offending text otherwise.
    """
    if not isinstance(text, str) or not text.strip():
        raise TraceError("no tolerance given: type e.g. 0.5 %, 50 ppm or 200 kHz")
    token = _printable(text.strip())
    if m := _PERCENT.match(text):
        return _relative(float(m.group(1)) / 100.0, f"{float(m.group(1)):g} %", token)
    if m := _PPM.match(text):
        return _relative(float(m.group(1)) / 1e6, f"{float(m.group(1)):g} ppm", token)
    try:
        hz = parse_frequency(text)
    except TraceError:
        raise TraceError(
            f"tolerance '{token}' is not a tolerance: write e.g. 0.5 %, 50 ppm or 200 kHz"
        ) from None
    if hz <= 0:
        raise TraceError(f"tolerance '{token}' must be above 0")
    if hz > MAX_ABSOLUTE_TOLERANCE_HZ:
        raise TraceError(
            f"tolerance '{token}' is wider than {format_hz(MAX_ABSOLUTE_TOLERANCE_HZ)}, "
            "which matches almost anything"
        )
    return Tolerance(rel_tol=0.0, abs_tol_hz=hz, text=format_hz(hz))
