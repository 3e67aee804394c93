"""Level conversions against the relations and check values of DOMAIN.md's units table."""

import math

import numpy as np
import pytest

from analysis import units
from analysis.errors import TraceError


def test_0_dbm_in_50_ohm_is_106_99_dbuv():
    # P = V²/R: 0 dBm = 0.2236 V rms = 106.99 dBµV (DOMAIN.md units table)
    assert units.dbm_to_dbuv(0.0) == pytest.approx(106.99, abs=0.005)
    assert units.dbuv_to_volts(units.dbm_to_dbuv(0.0)) == pytest.approx(0.2236, abs=5e-5)
    assert units.dbuv_to_dbm(106.99) == pytest.approx(0.0, abs=0.005)


def test_power_to_voltage_follows_p_equals_v_squared_over_r_for_any_impedance():
    # P = V²/R worked by hand: 1 mW into 75 Ω is sqrt(0.075) V = 0.27386 V rms
    volts = math.sqrt(1e-3 * 75.0)
    assert units.dbm_to_dbuv(0.0, impedance_ohm=75.0) == pytest.approx(
        20 * math.log10(volts / 1e-6), abs=1e-9
    )


def test_1_volt_is_120_dbuv():
    # definition: dBµV = 20·log10(V / 1 µV) (DOMAIN.md units table)
    assert units.volts_to_dbuv(1.0) == pytest.approx(120.0, abs=1e-12)
    assert units.dbuv_to_volts(120.0) == pytest.approx(1.0, rel=1e-12)
    assert units.volts_to_dbuv(1e-6) == pytest.approx(0.0, abs=1e-9)


def test_current_through_50_ohm_is_dbuv_minus_33_98():
    # Ohm's law: dBµA = dBµV − 20·log10(50) = dBµV − 33.98 = dBm + 73 (DOMAIN.md units table)
    assert units.dbuv_to_dbua(60.0) == pytest.approx(60.0 - 33.98, abs=0.005)
    assert units.convert_level(0.0, "dBm", "dBuA") == pytest.approx(73.0, abs=0.02)


def test_current_probe_reading_54_dbuv_on_10_ohm_is_34_dbua_which_is_50_ua():
    # probe makers' conversion notes via DOMAIN.md: 54 dBµV on a 10 Ω (20 dBΩ) probe = 34 dBµA = 50 µA
    by_ohms = units.dbuv_to_dbua(54.0, impedance_ohm=10.0)
    by_dbohm = units.dbuv_to_dbua(54.0, transfer_impedance_dbohm=20.0)
    assert by_ohms == pytest.approx(34.0, abs=1e-9)
    assert by_dbohm == pytest.approx(34.0, abs=1e-9)
    assert 10 ** (by_ohms / 20) == pytest.approx(50.0, rel=0.01)  # µA
    assert units.dbua_to_dbuv(34.0, transfer_impedance_dbohm=20.0) == pytest.approx(54.0)


def test_it_refuses_both_an_impedance_and_a_transfer_impedance():
    with pytest.raises(TraceError, match="not both"):
        units.dbuv_to_dbua(54.0, impedance_ohm=10.0, transfer_impedance_dbohm=20.0)


def test_plane_wave_magnetic_field_is_51_5_db_below_the_electric_field():
    # free-space impedance 377 Ω: dBµA/m = dBµV/m − 51.5 (DOMAIN.md units table)
    assert units.dbuvm_to_dbuam(40.0) == pytest.approx(40.0 - 51.5, abs=0.05)
    assert units.dbuam_to_dbuvm(units.dbuvm_to_dbuam(40.0)) == pytest.approx(40.0)


@pytest.mark.parametrize(
    ("uv_per_m", "dbuvm"),
    [
        # definition; the FCC §15.109(a) Class B values as quoted in DOMAIN.md
        (100.0, 40.00),
        (150.0, 43.52),
        (200.0, 46.02),
        (500.0, 53.98),
        # FCC §15.109(b) Class A values as quoted in DOMAIN.md
        (90.0, 39.08),
        (210.0, 46.44),
        (300.0, 49.54),
    ],
)
def test_microvolts_per_metre_to_dbuvm(uv_per_m, dbuvm):
    assert units.uv_per_m_to_dbuvm(uv_per_m) == pytest.approx(dbuvm, abs=0.005)
    assert units.dbuvm_to_uv_per_m(dbuvm) == pytest.approx(uv_per_m, rel=1e-3)


def test_field_from_an_antenna_reading_adds_af_and_cable_and_subtracts_preamp_gain():
    # standard measurement practice (DOMAIN.md): dBµV/m = dBµV + AF + cable loss − preamp gain;
    # worked by hand: 30 + 12 + 2 − 20 = 24
    assert units.dbuv_to_dbuvm(30.0, 12.0, cable_loss_db=2.0, preamp_gain_db=20.0) == pytest.approx(
        24.0
    )
    assert units.dbuvm_to_dbuv(24.0, 12.0, cable_loss_db=2.0, preamp_gain_db=20.0) == pytest.approx(
        30.0
    )


def test_conversions_are_vectorised_and_keep_scalars_scalar():
    levels = np.array([[0.0, 10.0], [-20.0, 30.0]])
    out = units.dbm_to_dbuv(levels)
    assert out.shape == (2, 2)
    np.testing.assert_allclose(out, levels + units.dbm_to_dbuv(0.0))
    assert isinstance(units.dbm_to_dbuv(0.0), float)
    af = np.array([10.0, 12.0])
    np.testing.assert_allclose(units.dbuv_to_dbuvm(np.array([30.0, 30.0]), af), [40.0, 42.0])


def test_log_conversions_refuse_non_positive_values():
    with pytest.raises(TraceError, match="positive"):
        units.volts_to_dbuv(np.array([1.0, 0.0]))
    with pytest.raises(TraceError, match="positive"):
        units.uv_per_m_to_dbuvm(-5.0)


@pytest.mark.parametrize(
    ("spelling", "canonical"),
    [
        ("dBµV", "dBuV"),  # micro sign U+00B5
        ("dBμV", "dBuV"),  # Greek mu U+03BC
        ("dBuV", "dBuV"),
        ("dB(uV)", "dBuV"),
        ("dB µV", "dBuV"),
        ("DBUV", "dBuV"),
        ("dBm", "dBm"),
        ("dBµV/m", "dBuV/m"),
        ("dB(µV/m)", "dBuV/m"),
        ("dBuV/m", "dBuV/m"),
        ("dBµA", "dBuA"),
        ("dBuA", "dBuA"),
        ("dBpT", "dBpT"),
        ("dBÂµV", "dBuV"),  # UTF-8 read as Latin-1 upstream
    ],
)
def test_normalise_level_unit_accepts_every_spelling(spelling, canonical):
    assert units.normalise_level_unit(spelling) == canonical


@pytest.mark.parametrize("text", ["dB", "V", "MHz", "dBV", "", "level"])
def test_normalise_level_unit_returns_none_for_other_text(text):
    assert units.normalise_level_unit(text) is None


def test_parse_level_unit_knows_the_voltage_references_scopes_write():
    # definition: 1 V = 120 dBµV, 1 mV = 60 dBµV
    assert units.parse_level_unit("dBV") == ("dBuV", 120.0)
    assert units.parse_level_unit("dBmV") == ("dBuV", 60.0)


def test_convert_level_between_circuit_units_round_trips():
    x = np.linspace(-40, 40, 9)
    there = units.convert_level(x, "dBm", "dBµV")
    np.testing.assert_allclose(there, x + 106.9897, atol=1e-4)  # P = V²/R in 50 Ω
    np.testing.assert_allclose(units.convert_level(there, "dB(uV)", "dBm"), x)
    np.testing.assert_allclose(units.convert_level(x, "dBuA", "dBuV", impedance_ohm=10.0), x + 20.0)


def test_convert_level_to_a_field_strength_says_an_antenna_factor_is_needed():
    with pytest.raises(TraceError, match="antenna factor"):
        units.convert_level(40.0, "dBµV", "dBµV/m")
    with pytest.raises(TraceError, match="antenna or probe factor"):
        units.convert_level(40.0, "dBm", "dBpT")
    with pytest.raises(TraceError, match="unknown"):
        units.convert_level(40.0, "dBfoo", "dBm")
