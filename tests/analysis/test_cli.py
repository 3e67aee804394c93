"""The command line is a contract: CI, bench scripts and the worker rely on its JSON and exit codes."""

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from analysis.__main__ import parse_frequency, parse_source

ROOT = Path(__file__).resolve().parents[2]


def run(*args):
    return subprocess.run([sys.executable, "-m", "analysis", *map(str, args)], cwd=ROOT, capture_output=True,
                          text=True, timeout=120)


@pytest.fixture
def scan_file(tmp_path):
    # A receiver-like trace: 15 dBµV/m floor, a 36 dBµV/m tone at 75 MHz and a 34 dBµV/m tone at 125 MHz.
    f = np.geomspace(30e6, 1e9, 4001)
    rng = np.random.default_rng(3)
    p = 10 ** ((15 + rng.normal(0, 0.3, f.size)) / 10)
    for fc, level in ((75e6, 36.0), (125e6, 34.0), (175e6, 32.0)):
        p += 10 ** (level / 10) * np.exp(-(((f - fc) / (fc * 4e-3)) ** 2))
    path = tmp_path / "scan.csv"
    np.savetxt(path, np.column_stack([f / 1e6, 10 * np.log10(p)]), fmt="%.6f", delimiter=",",
               header="Frequency (MHz),Level (dBµV/m)", comments="")
    return path


@pytest.fixture
def scope_file(tmp_path):
    fs, n = 1e9, 100_000
    t = np.arange(n) / fs
    v = 0.002 * np.sin(2 * np.pi * 25e6 * t) + np.random.default_rng(1).normal(0, 1e-6, n)
    path = tmp_path / "scope.csv"
    np.savetxt(path, np.column_stack([t, v]), fmt=["%.12e", "%.9e"], delimiter=",", header="Time (s),Voltage (V)",
               comments="")
    return path


def test_json_carries_peaks_families_exceedances_and_attributions(scan_file):
    out = run(scan_file, "--limit", "cispr32-b-rad-10m", "--source", "PHY=25MHz:50ppm", "--guard", "3", "--json")
    assert out.returncode == 0, out.stderr
    doc = json.loads(out.stdout)
    assert doc["unit"] == "dBuV/m" and doc["domain"] == "spectrum"
    assert {round(p["frequency_hz"] / 1e6) for p in doc["peaks"]} == {75, 125, 175}
    # CISPR 32 Table A.4 via DOMAIN.md: class B at 10 m is 30 dBµV/m below 230 MHz; margin = limit − level.
    margins = {round(e["frequency_hz"] / 1e6): e["margin_db"] for e in doc["exceedances"]}
    assert margins == {75: pytest.approx(-6.0, abs=0.2), 125: pytest.approx(-4.0, abs=0.2),
                       175: pytest.approx(-2.0, abs=0.2)}
    assert all(e["limit"] == 30.0 for e in doc["exceedances"])
    orders = {round(a["frequency_hz"] / 1e6): a["terms"] for a in doc["attributions"]}
    assert orders[75] == [{"source": "PHY", "order": 3}] and orders[125] == [{"source": "PHY", "order": 5}]
    family = doc["families"][0]
    assert family["fundamental_hz"] == pytest.approx(25e6, rel=2e-3)
    assert family["orders"] == [3, 5, 7] and family["odd_only"] is True


def test_a_time_record_reads_the_rms_of_its_sine(scope_file):
    out = run(scope_file, "--json")
    assert out.returncode == 0, out.stderr
    doc = json.loads(out.stdout)
    assert doc["domain"] == "time" and doc["unit"] == "dBuV"
    top = max(doc["peaks"], key=lambda p: p["level"])
    # 2 mV amplitude: 20·log10(0.002/√2 / 1 µV) = 63.01 dBµV (definition of dBµV; rms of a sinusoid is A/√2).
    assert top["frequency_hz"] == pytest.approx(25e6, rel=1e-4)
    assert top["level"] == pytest.approx(20 * np.log10(0.002 / np.sqrt(2) / 1e-6), abs=0.1)


def test_bad_input_exits_2_with_one_line_and_no_traceback(tmp_path):
    bad = tmp_path / "broken.csv"
    bad.write_text("Frequency (MHz),Level (dBuV)\n" + "".join(f"{30 + i},20\n" for i in range(30)) + "31.5,abc\n")
    out = run(bad)
    assert out.returncode == 2
    assert out.stdout == ""
    lines = out.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in out.stderr
    assert lines[0].startswith("broken.csv line 32:") and "abc" in lines[0]


def test_a_missing_file_and_an_unknown_limit_are_bad_input_too(scan_file, tmp_path):
    assert run(tmp_path / "nope.csv").returncode == 2
    out = run(scan_file, "--limit", "no-such-line")
    assert out.returncode == 2 and "cispr32-b-rad-10m" in out.stderr  # the message lists the known ids


def test_the_human_report_shows_the_tables(scan_file):
    out = run(scan_file, "--limit", "cispr32-b-rad-10m")
    assert out.returncode == 0
    assert "3 peaks" in out.stdout and "exceedances" in out.stdout and "orders 3, 5, 7" in out.stdout


def test_limits_lists_every_built_in_line():
    out = run("limits")
    assert out.returncode == 0
    for limit_id in ("cispr32-a-rad-10m", "cispr32-b-cond-av", "fcc15-b-rad-3m", "fcc15-a-cond-qp"):
        assert limit_id in out.stdout


@pytest.mark.parametrize("text,hz", [("25e6", 25e6), ("25MHz", 25e6), ("2.2 MHz", 2.2e6), ("125k", 125e3),
                                     ("1.5GHz", 1.5e9)])
def test_frequencies_take_si_prefixes(text, hz):
    assert parse_frequency(text) == pytest.approx(hz)


def test_source_tolerances_in_hz_percent_and_ppm():
    assert parse_source("PHY=25MHz:50ppm").tolerance_hz == pytest.approx(1250.0)
    assert parse_source("BUCK=2.2MHz:5%").tolerance_hz == pytest.approx(110e3)
    assert parse_source("X=10MHz:300").tolerance_hz == pytest.approx(300.0)
    for bad in ("PHY", "=25MHz", "PHY=fast", "PHY=-3MHz"):
        with pytest.raises(ValueError):
            parse_source(bad)
