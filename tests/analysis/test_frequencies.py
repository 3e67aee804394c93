"""Typed frequencies and tolerances: units read as SI prefixes, nonsense refused with its token and place."""

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from analysis.errors import TraceError
from analysis.frequencies import (
    format_hz,
    parse_frequencies,
    parse_frequency,
    parse_tolerance,
    tolerance_from_percent,
)

# SI prefixes (BIPM, The International System of Units, 9th ed., Table 7): k = 1e3, M = 1e6, G = 1e9.


@pytest.mark.parametrize(
    "text,hz",
    [
        ("48 MHz, 96 MHz, 144.2 MHz", [48e6, 96e6, 144.2e6]),
        ("48e6 96e6", [48e6, 96e6]),
        ("2.2MHz;4.4 MHz", [2.2e6, 4.4e6]),
        ("125 kHz\n250k ; 1.5 GHz", [125e3, 250e3, 1.5e9]),
        ("  30mhz,, 60 MHZ ,", [30e6, 60e6]),  # case-blind, as in the command line: m is mega here
        (".5 GHz 48. MHz", [0.5e9, 48e6]),
        ("9 kHz, 40 GHz", [9e3, 40e9]),  # the edges of the emissions bands are inside
    ],
)
def test_lists_of_frequencies_read_in_hz_in_the_order_typed(text, hz):
    assert parse_frequencies(text) == pytest.approx(hz, rel=1e-15)


@pytest.mark.parametrize(
    "text,words",
    [
        ("48 MHzz, 96 MHz", "'MHzz' (character 4) is not a frequency"),
        ("48 MHz, fast", "'fast' (character 9) is not a frequency"),
        ("-48 MHz", "'-48' (character 1) is not a frequency"),
        ("48MHz96MHz", "'48MHz96MHz' (character 1) is not a frequency"),
        ("MHz", "'MHz' (character 1) is not a frequency"),
        ("48 MHz MHz", "'MHz' (character 8) is not a frequency"),
        ("48 MHz, 96", "'96' (character 9) is 96 Hz, outside 9 kHz to 40 GHz — add a unit"),
        ("1e99", "'1e99' (character 1) is 1e+90 GHz, outside"),
        ("100 GHz", "'100 GHz' (character 1) is 100 GHz, outside 9 kHz to 40 GHz"),
        ("", "no frequencies given"),
        (" ;, ", "no frequencies given"),
        ("48 MHz," * 201, "more than 200 frequencies"),
    ],
)
def test_nonsense_is_refused_naming_the_token_and_its_position(text, words):
    with pytest.raises(TraceError) as caught:
        parse_frequencies(text)
    assert words in str(caught.value)
    assert "\n" not in str(caught.value)


def test_the_range_and_the_count_are_the_callers_to_choose():
    assert parse_frequencies("50 Hz", lowest_hz=1.0) == pytest.approx([50.0])
    with pytest.raises(TraceError, match="more than 2 frequencies"):
        parse_frequencies("1 MHz 2 MHz 3 MHz", max_count=2)


def test_a_single_frequency_keeps_the_command_lines_contract():
    assert parse_frequency("25MHz") == 25e6 and parse_frequency(" 125k ") == 125e3
    with pytest.raises(ValueError, match="is not a frequency"):  # TraceError is a ValueError
        parse_frequency("fast")


@pytest.mark.parametrize(
    "text,rel,abs_hz,shown",
    [
        ("0.5 %", 0.005, 0.0, "0.5 %"),
        ("0.5%", 0.005, 0.0, "0.5 %"),
        ("50 ppm", 50e-6, 0.0, "50 ppm"),  # ppm = 1e-6 (definition)
        ("200 kHz", 0.0, 200e3, "200 kHz"),
        ("1.5MHz", 0.0, 1.5e6, "1.5 MHz"),
        ("300", 0.0, 300.0, "300 Hz"),
    ],
)
def test_tolerances_read_in_percent_ppm_or_hz(text, rel, abs_hz, shown):
    tol = parse_tolerance(text)
    assert (tol.rel_tol, tol.abs_tol_hz, tol.text) == (pytest.approx(rel, rel=1e-15), abs_hz, shown)


@pytest.mark.parametrize(
    "text,words",
    [
        ("", "no tolerance given"),
        ("0 %", "must be above 0"),
        ("0 Hz", "must be above 0"),
        ("-1 %", "'-1 %' is not a tolerance"),
        ("30 %", "wider than 20 %"),
        ("500 MHz", "wider than 100 MHz"),
        ("lots", "'lots' is not a tolerance"),
    ],
)
def test_tolerance_nonsense_is_refused(text, words):
    with pytest.raises(TraceError, match=words):
        parse_tolerance(text)


def test_a_teams_percent_setting_is_a_relative_tolerance():
    tol = tolerance_from_percent(0.5)
    assert (tol.rel_tol, tol.abs_tol_hz, tol.text) == (0.005, 0.0, "0.5 %")


@settings(max_examples=60, deadline=None)
@given(
    st.lists(st.floats(min_value=9e3, max_value=40e9, allow_nan=False), min_size=1, max_size=12),
    st.sampled_from([", ", "; ", " ", "\n", ",", ";"]),
)
def test_what_format_hz_writes_reads_back(values, separator):
    """Round trip: a list written the way the page writes frequencies reads back to 6 significant digits."""
    text = separator.join(format_hz(v) for v in values)
    assert parse_frequencies(text) == pytest.approx(np.array(values), rel=1e-5)
