"""Correction tables: log-frequency interpolation, reading, and the field-strength relation."""

import math

import numpy as np
import pytest

from analysis.corrections import CorrectionTable, apply_corrections, read_correction_table
from analysis.errors import TraceError
from analysis.types import Spectrum


def _table(kind="antenna_factor", f=(30e6, 300e6), v=(10.0, 20.0), name="af.csv"):
    return CorrectionTable(name=name, kind=kind, frequency_hz=np.array(f), value_db=np.array(v))


def test_the_midpoint_in_log_frequency_gets_the_mean_value():
    # hand-worked: between 30 MHz and 300 MHz the midpoint in log f is sqrt(30·300) MHz = 94.87 MHz
    table = _table()
    assert math.sqrt(30e6 * 300e6) == pytest.approx(94.87e6, rel=1e-4)
    assert table.at(94.868e6) == pytest.approx(15.0, abs=1e-3)
    # not the linear midpoint: at 165 MHz log interpolation gives 10 + 10·log10(5.5) = 17.40 dB
    assert table.at(165e6) == pytest.approx(10 + 10 * math.log10(5.5), abs=1e-9)


def test_interpolation_matches_numpy_interp_on_log_frequencies():
    rng = np.random.default_rng(1)
    f_table = np.sort(rng.uniform(np.log10(9e3), np.log10(6e9), 40))
    f_table = 10**f_table
    v_table = rng.normal(20, 5, f_table.size)
    table = _table(f=f_table, v=v_table)
    f = 10 ** rng.uniform(np.log10(f_table[0]), np.log10(f_table[-1]), 1000)
    # reference: numpy.interp on log10 frequencies
    np.testing.assert_allclose(
        table.at(f), np.interp(np.log10(f), np.log10(f_table), v_table), rtol=0, atol=1e-12
    )


def test_table_points_are_returned_exactly_and_scalars_stay_scalars():
    table = _table(f=(30e6, 100e6, 300e6), v=(12.0, 9.5, 14.0))
    np.testing.assert_array_equal(table.at(np.array([30e6, 100e6, 300e6])), [12.0, 9.5, 14.0])
    assert isinstance(table.at(100e6), float)


def test_it_never_extrapolates():
    table = _table()
    with pytest.raises(TraceError) as below:
        table.at(np.array([50e6, 25e6]))
    assert str(below.value).startswith(
        "af.csv: 25 MHz is outside the antenna_factor table's range 30 MHz to 300 MHz"
    )
    with pytest.raises(TraceError, match="outside"):
        table.at(1e9)


def test_it_checks_its_own_table():
    with pytest.raises(TraceError, match="increasing"):
        _table(f=(300e6, 30e6))
    with pytest.raises(TraceError, match="kind"):
        _table(kind="gain")
    with pytest.raises(TraceError, match="at least 2"):
        _table(f=(30e6,), v=(1.0,))


def test_it_reads_a_table_with_a_unit_in_the_header(tmp_path):
    path = tmp_path / "biconical.csv"
    path.write_text(
        "# antenna calibration\nModel,demo\nFrequency (MHz),AF (dB/m)\n30,12.5\n100,10.0\n300,15.5\n"
    )
    table = read_correction_table(path, kind="antenna_factor")
    assert table.name == "biconical.csv"
    np.testing.assert_array_equal(table.frequency_hz, [30e6, 100e6, 300e6])
    np.testing.assert_array_equal(table.value_db, [12.5, 10.0, 15.5])


def test_a_headerless_table_is_in_hz_unless_told(tmp_path):
    path = tmp_path / "cable.txt"
    path.write_text("1000000\t0.5\n10000000\t1.2\n100000000\t3.1\n")
    table = read_correction_table(path, kind="cable_loss")
    np.testing.assert_array_equal(table.frequency_hz, [1e6, 1e7, 1e8])
    assert table.warnings == ("no header: frequencies taken as Hz",)
    in_mhz = read_correction_table(
        path.read_bytes(), kind="cable_loss", frequency_unit="kHz", name="cable.txt"
    )
    np.testing.assert_array_equal(in_mhz.frequency_hz, [1e9, 1e10, 1e11])


def test_reading_a_bad_table_gives_the_readers_message(tmp_path):
    path = tmp_path / "loss.csv"
    path.write_text("Frequency (MHz);Loss (dB)\n30;1,2\n100;x\n")
    with pytest.raises(TraceError) as err:
        read_correction_table(path, kind="cable_loss")
    assert str(err.value) == "loss.csv line 3: 'x' is not a number in column Loss (dB)"
    path.write_text("Frequency (MHz),Loss (dB)\n0,1\n100,2\n")
    with pytest.raises(TraceError, match="line 2: frequency 0 Hz is not positive"):
        read_correction_table(path, kind="cable_loss")


def _reading():
    f = np.array([30e6, 94.868e6, 300e6])
    return Spectrum(frequency_hz=f, level=np.array([40.0, 40.0, 40.0]), unit="dBuV", rbw_hz=120e3)


def test_an_antenna_reading_becomes_a_field_strength():
    # standard measurement practice (DOMAIN.md): dBµV/m = dBµV + AF + cable loss − preamp gain
    af = _table()
    cable = _table(kind="cable_loss", v=(1.0, 3.0), name="cable.csv")
    field = apply_corrections(_reading(), antenna_factor=af, cable_loss=cable, preamp_gain=20.0)
    assert field.unit == "dBuV/m"
    assert field.rbw_hz == 120e3
    np.testing.assert_allclose(
        field.level, [40 + 10 + 1 - 20, 40 + 15 + 2 - 20, 40 + 20 + 3 - 20], atol=1e-3
    )


def test_a_probe_factor_adds_like_an_antenna_factor_and_keeps_dbuv_unless_told():
    pf = _table(kind="probe_factor", v=(-20.0, -20.0), name="probe.csv")
    relative = apply_corrections(_reading(), probe_factor=pf)
    assert relative.unit == "dBuV"
    np.testing.assert_allclose(relative.level, 20.0)
    # a current probe of 20 dBΩ transfer impedance: dBµA = dBµV − 20 (probe makers' notes via DOMAIN.md)
    current = apply_corrections(_reading(), probe_factor=pf, probe_unit="dBµA")
    assert current.unit == "dBuA"


def test_a_dbm_reading_is_corrected_through_50_ohm():
    s = Spectrum(frequency_hz=np.array([30e6, 300e6]), level=np.array([0.0, 0.0]), unit="dBm")
    out = apply_corrections(s, antenna_factor=_table())
    # P = V²/R: 0 dBm = 106.99 dBµV in 50 Ω (DOMAIN.md), then + AF
    np.testing.assert_allclose(out.level, [116.99, 126.99], atol=0.005)


def test_corrections_refuse_what_they_cannot_do():
    with pytest.raises(TraceError, match="not both"):
        apply_corrections(
            _reading(), antenna_factor=_table(), probe_factor=_table(kind="probe_factor")
        )
    with pytest.raises(TraceError, match="was given a cable_loss table"):
        apply_corrections(_reading(), antenna_factor=_table(kind="cable_loss"))
    narrow = _table(f=(50e6, 300e6))
    with pytest.raises(TraceError, match="30 MHz is outside"):
        apply_corrections(_reading(), antenna_factor=narrow)
    field = Spectrum(frequency_hz=np.array([30e6, 300e6]), level=np.zeros(2), unit="dBuV/m")
    with pytest.raises(TraceError, match="not to levels in dBuV/m"):
        apply_corrections(field, cable_loss=1.0)
