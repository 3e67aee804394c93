"""Properties of the typed-frequency parser that must hold for any text.

1. Any text gives frequencies (finite, in range, in the order typed) or a
   TraceError of one line — never another exception.
2. A number written with Python's repr and a unit reads back as exactly
   float(repr) times the SI prefix (BIPM SI Brochure, 9th ed., Table 7:
   k = 1e3, M = 1e6, G = 1e9), whatever the separators.
3. A junk token among good ones is named, with its 1-based character position.
4. Tolerances: any text gives one within (0, 20 %] or (0, 100 MHz], or a TraceError.
"""

from __future__ import annotations

import math
import re

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from analysis.errors import TraceError
from analysis.frequencies import (
    HIGHEST_HZ,
    LOWEST_HZ,
    MAX_ABSOLUTE_TOLERANCE_HZ,
    MAX_RELATIVE_TOLERANCE,
    format_hz,
    parse_frequencies,
    parse_frequency,
    parse_tolerance,
)

FAST = settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])

# Text near the grammar: digits, marks, prefixes, separators, and a few impostors
# (a Unicode digit, a thin space, µ, a full-width equals sign, a NUL).
_PIECES = [
    *"0123456789.eE+-kKmMgGhHzZ ,;%\t\n",
    "ppm",
    "µ",
    "\u2009",
    "\u0663",
    "\uff1d",
    "\x00",
    "nan",
    "inf",
    "=",
]
_NEAR = st.lists(st.sampled_from(_PIECES), max_size=30).map("".join)
_ANY = st.one_of(st.text(max_size=60), _NEAR)
_PREFIX = {"": 1.0, "k": 1e3, "K": 1e3, "M": 1e6, "m": 1e6, "G": 1e9, "g": 1e9}


@FAST
@given(_ANY)
def test_any_text_gives_frequencies_or_a_trace_error(text):
    try:
        values = parse_frequencies(text)
    except TraceError as err:
        message = str(err)
        assert message and "\x00" not in message and "\n" not in message
        where = re.search(r"\(character (\d+)\)", message)
        if where:
            assert 1 <= int(where.group(1)) <= len(text)
        return
    assert values.dtype == np.float64 and 1 <= values.size <= 200
    assert np.all(np.isfinite(values)) and np.all((values >= LOWEST_HZ) & (values <= HIGHEST_HZ))


@FAST
@given(_ANY)
def test_any_text_gives_one_frequency_or_a_trace_error(text):
    try:
        value = parse_frequency(text)
    except TraceError as err:
        assert "\x00" not in str(err) and "\n" not in str(err)
        return
    assert math.isfinite(value) and value >= 0


@FAST
@given(
    st.lists(
        st.tuples(st.floats(min_value=0.01, max_value=40.0), st.sampled_from(["G", "g"]))
        | st.tuples(
            st.floats(min_value=0.01, max_value=999.0), st.sampled_from(["M", "m", "k", "K"])
        )
        | st.tuples(st.floats(min_value=9e3, max_value=4e10), st.just("")),
        min_size=1,
        max_size=20,
    ),
    st.sampled_from([", ", ",", ";", " ", "\n", " ; ", ",,"]),
    st.sampled_from(["Hz", "hz", "HZ", "", " Hz"]),
)
def test_written_frequencies_read_back_exactly_in_the_order_typed(items, separator, hz):
    texts, expected = [], []
    for number, prefix in items:
        value = float(repr(number)) * _PREFIX[prefix]
        if not LOWEST_HZ <= value <= HIGHEST_HZ:
            continue
        unit = f"{prefix}{hz.strip()}" if prefix or hz.strip() else ""
        texts.append(f"{number!r}{' ' if hz.startswith(' ') and unit else ''}{unit}")
        expected.append(value)  # reference: Python's float() of the digits, times the prefix
    if not texts:
        return
    assert parse_frequencies(separator.join(texts)).tolist() == expected


@FAST
@given(
    st.lists(st.floats(min_value=9e3, max_value=4e10), min_size=0, max_size=6),
    st.integers(0, 6),
    st.sampled_from(["abc", "=cmd", "48MHzz", "1.2.3", "0x10", "<b>", "MHz", "--5"]),
)
def test_a_junk_token_is_named_with_its_position(values, at, junk):
    tokens = [f"{v!r}" for v in values]
    at = min(at, len(tokens))
    tokens.insert(at, junk)
    text = ", ".join(tokens)
    position = len(", ".join(tokens[:at])) + (2 if at else 0) + 1
    try:
        parse_frequencies(text)
    except TraceError as err:
        message = str(err)
    else:
        raise AssertionError(f"{text!r} was read")
    # The first problem is the junk, or an earlier token's own unit trouble cannot
    # happen: every other token is a bare number inside the band.
    assert f"(character {position})" in message, message


@FAST
@given(st.lists(st.floats(min_value=9e3, max_value=4e10), min_size=1, max_size=20))
def test_what_the_pages_write_reads_back_to_six_digits(values):
    # format_hz writes 6 significant digits: the round trip is exact to that.
    text = ", ".join(format_hz(v) for v in values)
    back = parse_frequencies(text)
    assert np.allclose(back, values, rtol=5e-6, atol=0)


@FAST
@given(
    st.one_of(
        _ANY,
        st.builds(
            lambda n, u: f"{n!r} {u}",
            st.floats(allow_nan=False),
            st.sampled_from(["%", "ppm", "kHz", "Hz", ""]),
        ),
    )
)
def test_any_text_gives_a_bounded_tolerance_or_a_trace_error(text):
    try:
        tol = parse_tolerance(text)
    except TraceError as err:
        assert "\n" not in str(err) and "\x00" not in str(err)  # one line, whatever was typed
        return
    if tol.rel_tol:
        assert tol.abs_tol_hz == 0 and 0 < tol.rel_tol <= MAX_RELATIVE_TOLERANCE
    else:
        assert 0 < tol.abs_tol_hz <= MAX_ABSOLUTE_TOLERANCE_HZ
    again = parse_tolerance(tol.text)  # what the page shows reads back as the same tolerance
    assert math.isclose(again.rel_tol, tol.rel_tol, rel_tol=1e-5)
    assert math.isclose(again.abs_tol_hz, tol.abs_tol_hz, rel_tol=5e-6)


# What the fuzzing found, kept as plain examples.
def test_what_the_fuzzing_found():
    import pytest

    with pytest.raises(TraceError, match=r"^'1e999' is too large to be a frequency$"):
        parse_frequency("1e999")  # was inf, taken for a frequency
    with pytest.raises(TraceError, match=r"^'None' is not a frequency"):
        parse_frequency(None)  # was a TypeError
    with pytest.raises(TraceError, match=r"is wider than 20 %"):
        parse_tolerance("1e400 %")  # was "must be above 0"
    with pytest.raises(TraceError, match=r"^'MHz\?' \(character 4\)"):
        parse_frequencies("48 MHz\x00")  # the NUL was echoed into the message
    with pytest.raises(TraceError, match=r"is 1000 GHz, outside 9 kHz to 40 GHz$"):
        parse_frequencies("1e12")  # no "add a unit" hint above the band: a unit would not help
    with pytest.raises(
        TraceError, match=r"is 48 Hz, outside 9 kHz to 40 GHz — add a unit, e.g. MHz$"
    ):
        parse_frequencies("48")
