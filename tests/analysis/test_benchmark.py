"""Smoke test of the benchmark script at tiny sizes: it runs, measures every
part and reports in the expected shape. Not a timing test: no assertion here
depends on how fast anything is."""

import json
import math

import numpy as np
import pytest
import scipy.signal

from analysis import benchmark
from analysis.peaks import find_peaks
from analysis.types import Spectrum, TimeRecord

TINY = 10_000


def positive_finite(seconds):
    return isinstance(seconds, float) and math.isfinite(seconds) and seconds > 0


def test_the_synthetic_record_holds_the_sines_it_was_built_from():
    record = benchmark.synthetic_record(TINY)
    assert isinstance(record, TimeRecord) and len(record) == TINY
    assert record.sample_rate_hz == pytest.approx(1e9)
    # worked example: a 10 mV sine at 25 MHz reads its rms, 20·log10(0.01/√2/1 µV)
    # = 77.0 dBµV, in numpy's FFT of the record (reference: numpy.fft.rfft, flat-top
    # window from scipy.signal.get_window)
    window = scipy.signal.get_window("flattop", TINY, fftbins=True)
    amplitude = 2 * np.abs(np.fft.rfft(record.volts * window)) / window.sum()
    frequency = np.fft.rfftfreq(TINY, 1 / record.sample_rate_hz)
    at_25mhz = amplitude[np.argmin(np.abs(frequency - 25e6))]
    assert 20 * np.log10(at_25mhz / np.sqrt(2) / 1e-6) == pytest.approx(77.0, abs=0.1)


def test_the_synthetic_spectrum_is_a_receiver_trace_with_its_emissions():
    spectrum = benchmark.synthetic_receiver_spectrum(TINY)
    assert isinstance(spectrum, Spectrum) and len(spectrum) == TINY
    assert np.all(np.diff(spectrum.frequency_hz) > 0)
    assert spectrum.frequency_hz[0] == pytest.approx(150e3)
    assert spectrum.frequency_hz[-1] == pytest.approx(1e9)
    # 20 emissions 15–45 dB above a 1 dB-noise floor (as built): most are found
    found = find_peaks(spectrum)
    assert 12 <= len(found) <= 25
    assert any(abs(p.frequency_hz - 24e6) <= 120e3 for p in found)


def test_best_of_keeps_the_smallest_time_of_each_function():
    calls = {"a": 0, "b": 0}

    def bump(key):
        calls[key] += 1

    best = benchmark.best_of({"a": lambda: bump("a"), "b": lambda: bump("b")}, 3)
    assert calls == {"a": 4, "b": 4}  # one warm-up call, then three timed
    assert set(best) == {"a", "b"} and all(positive_finite(v) for v in best.values())


def test_the_analysis_timing_compares_against_rfft_at_a_tiny_size():
    (row,) = benchmark.bench_analysis((TINY,), repeats=1)
    assert row.samples == TINY and row.repeats == 1
    assert positive_finite(row.analyse_s) and positive_finite(row.rfft_s)
    assert row.ratio == pytest.approx(row.analyse_s / row.rfft_s)
    assert row.target is None and row.met is None  # the target starts at 1e6
    assert row.peaks_found > 0


def test_the_peak_timing_compares_against_scipy_at_a_tiny_size():
    (row,) = benchmark.bench_peaks((TINY,), repeats=1)
    assert positive_finite(row.peaks_families_s) and positive_finite(row.scipy_s)
    assert row.ratio == pytest.approx(row.peaks_families_s / row.scipy_s)
    assert row.met == (row.ratio <= benchmark.PEAKS_TARGET)
    assert row.peaks_found > 0 and row.families_found >= 1  # the 24 MHz comb


def test_the_csv_timing_reads_back_every_row(tmp_path):
    row = benchmark.bench_csv(TINY, repeats=1, directory=tmp_path)
    assert row.rows == TINY and row.file_bytes > 0
    assert positive_finite(row.read_trace_s)
    assert row.read_trace_rows_per_s == pytest.approx(TINY / row.read_trace_s)
    if row.pandas_s is None:
        assert "pandas" in row.note and row.met is None
    else:
        assert positive_finite(row.pandas_s)
        assert row.ratio == pytest.approx(row.read_trace_s / row.pandas_s)
    assert list(tmp_path.iterdir()) == []  # the temporary file is gone


def test_the_memory_figure_is_the_traced_peak_over_the_input():
    (row,) = benchmark.bench_memory((TINY,))
    assert row.input_bytes == TINY * 8
    # the analysis returns a spectrum of N/2 levels and N/2 frequencies, so its
    # peak is at least the input's size
    assert row.peak_bytes >= row.input_bytes
    assert row.ratio == pytest.approx(row.peak_bytes / row.input_bytes)
    assert row.target is None and row.met is None  # judged from 1e6 samples only


def test_the_report_has_a_summary_line_per_target_and_valid_json():
    report = benchmark.run(
        analysis_sizes=(TINY,),
        spectrum_sizes=(TINY,),
        csv_rows=TINY,
        memory_sizes=(TINY,),
        repeats=1,
    )
    text = benchmark.format_report(report)
    summary = text.split("Summary\n")[1].splitlines()
    assert len(summary) == len(report.summary) == 4
    # the analysis and memory targets are judged from 1e6 samples only
    assert summary[0].strip().startswith("NOT MEASURED")
    assert summary[3].strip().startswith("NOT MEASURED")
    assert all(line.strip().split(":")[0] in {"MET", "NOT MET", "NOT MEASURED"} for line in summary)
    data = json.loads(json.dumps(report.to_json(), allow_nan=False))
    assert data["analysis"][0]["samples"] == TINY
    assert {t["target"] for t in data["summary"]} == {t.target for t in report.summary}
