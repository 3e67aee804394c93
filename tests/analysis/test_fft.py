"""Time record → calibrated spectrum, checked against published window figures,
scipy's periodogram and worked examples."""

import math
import tracemalloc

import numpy as np
import pytest
import scipy.signal

from analysis.errors import TraceError
from analysis.fft import (
    FLOOR_DBUV,
    SCIPY_WINDOW_NAMES,
    WINDOWS,
    aggregate_rbw,
    amplitude_spectrum,
    figures_of_samples,
    leakage_envelope_db,
    periodic_window,
    window_figures,
)
from analysis.types import Spectrum, TimeRecord


def record(volts, sample_rate_hz):
    return TimeRecord(time_s=np.arange(len(volts)) / sample_rate_hz, volts=np.asarray(volts))


def sine(n, sample_rate_hz, frequency_hz, amplitude_v, phase=0.3):
    t = np.arange(n) / sample_rate_hz
    return amplitude_v * np.sin(2 * np.pi * frequency_hz * t + phase)


def dbuv_rms(amplitude_v):
    # definition (DOMAIN.md): dBµV = 20·log10(V/1 µV); rms of a sinusoid = A/√2
    return 20 * math.log10(amplitude_v / math.sqrt(2) / 1e-6)


# --- windows ---------------------------------------------------------------------------


@pytest.mark.parametrize("window", WINDOWS)
@pytest.mark.parametrize("n", [2, 3, 4, 7, 8, 1000, 1001, 65537])
def test_window_samples_are_scipys_periodic_windows(window, n):
    # reference: scipy.signal.get_window(name, N, fftbins=True)
    expected = scipy.signal.get_window(SCIPY_WINDOW_NAMES[window], n, fftbins=True)
    np.testing.assert_allclose(periodic_window(window, n), expected, rtol=0, atol=1e-13)


# Harris 1978, Proc. IEEE 66(1), Table I, as quoted in DOMAIN.md (values from
# memory and secondary sources there). Tolerance: half a unit in the table's
# last digit; Hamming's scalloping ±0.05 dB as DOMAIN.md says (1.78 in the
# table, 1.75 computed exactly).
HARRIS_TABLE_I = {
    "rectangular": ((1.00, 0.005), (1.00, 0.005), (3.92, 0.005)),
    "hann": ((0.50, 0.005), (1.50, 0.005), (1.42, 0.005)),
    "hamming": ((0.54, 0.005), (1.36, 0.005), (1.75, 0.05)),
    "blackmanharris": ((0.36, 0.005), (2.00, 0.005), (0.83, 0.005)),
    "flattop": ((0.2156, 0.00005), (3.770, 0.0005), (0.0098, 0.00005)),
}


@pytest.mark.parametrize("window", sorted(HARRIS_TABLE_I))
def test_window_figures_match_harris_table_i(window):
    (cg, cg_tol), (enbw, enbw_tol), (scallop, scallop_tol) = HARRIS_TABLE_I[window]
    figures = window_figures(window, 4096)
    assert figures.coherent_gain == pytest.approx(cg, abs=cg_tol)  # Harris 1978 Table I
    assert figures.enbw_bins == pytest.approx(enbw, abs=enbw_tol)  # Harris 1978 Table I
    assert figures.scalloping_loss_db == pytest.approx(
        scallop, abs=scallop_tol
    )  # Harris 1978 Table I


def test_enbw_reproduces_mathworks_reference_vectors():
    # From MathWorks' enbw documentation (its windows are symmetric, as scipy's
    # with fftbins=False), quoted in DOMAIN.md.
    hamming = scipy.signal.get_window("hamming", 1000, fftbins=False)
    assert figures_of_samples(hamming).enbw_bins == pytest.approx(1.3638, abs=5e-5)
    hann = scipy.signal.get_window("hann", 1000, fftbins=False)
    assert figures_of_samples(hann).enbw_bins * 10e3 / 1000 == pytest.approx(15.0150, abs=5e-5)
    flattop = scipy.signal.get_window("flattop", 10000, fftbins=False)
    assert figures_of_samples(flattop).enbw_bins * 44.1e3 / 10000 == pytest.approx(
        16.6285, abs=5e-5
    )


@pytest.mark.parametrize(
    ("window", "main_lobe_bins", "sidelobe_db"),
    [
        ("rectangular", 1, -13.0),
        ("hann", 2, -32.0),
        ("hamming", 2, -43.0),
        ("blackmanharris", 4, -92.0),
    ],
)
def test_the_leakage_envelope_beyond_the_main_lobe_is_the_highest_sidelobe(
    window, main_lobe_bins, sidelobe_db
):
    # Harris 1978 Table I, highest side-lobe level (from memory; DOMAIN.md
    # quotes only that table's gain, ENBW and scalloping columns)
    enbw_bins = window_figures(window, 4096).enbw_bins
    envelope = leakage_envelope_db(enbw_bins, np.array([0.0, main_lobe_bins, 4000.0]))
    assert envelope[0] == pytest.approx(0.0)
    assert envelope[1] == pytest.approx(sidelobe_db, abs=0.7)
    assert envelope[2] < envelope[1]
    assert leakage_envelope_db(2.5, np.array([3.0])) is None  # no window has that ENBW


def test_it_rejects_an_unknown_window():
    with pytest.raises(TraceError, match="unknown window"):
        window_figures("kaiser", 64)
    with pytest.raises(TraceError, match="unknown window"):
        amplitude_spectrum(record(np.zeros(64), 1e6), window="kaiser")


# --- amplitude spectrum ----------------------------------------------------------------


@pytest.mark.parametrize("n", [100_000, 100_001])
@pytest.mark.parametrize("offset_bins", [0.0, 0.37, 0.5])
@pytest.mark.parametrize("phase", [0.0, 1.1])
def test_a_sine_reads_its_rms_wherever_it_falls_between_bins(n, offset_bins, phase):
    # worked example: A = 0.25 V reads 20·log10(0.25/√2/1 µV) = 104.95 dBµV;
    # flat-top scalloping is 0.0098 dB (Harris 1978 Table I), so 0.02 dB covers it
    fs = 1e6
    frequency_hz = (12_345 + offset_bins) * fs / n
    spectrum = amplitude_spectrum(record(sine(n, fs, frequency_hz, 0.25, phase), fs))
    assert spectrum.level.max() == pytest.approx(dbuv_rms(0.25), abs=0.02)
    assert abs(spectrum.frequency_hz[spectrum.level.argmax()] - frequency_hz) <= fs / n


@pytest.mark.parametrize("window", ["flattop", "hann", "rectangular", "blackmanharris", "hamming"])
@pytest.mark.parametrize("n", [4096, 4097])
def test_every_bin_agrees_with_scipys_periodogram(window, n):
    # reference: scipy.signal.periodogram(scaling='spectrum') gives each one-sided
    # bin's power as an rms², so 10·log10(P) + 120 is the dBµV reading
    fs = 2.5e6
    rng = np.random.default_rng(11)
    x = 0.01 * rng.standard_normal(n) + sine(n, fs, 123_456.7, 0.3) + 0.05
    spectrum = amplitude_spectrum(record(x, fs), window=window)
    f, power = scipy.signal.periodogram(
        x, fs, window=SCIPY_WINDOW_NAMES[window], scaling="spectrum", detrend=False
    )
    np.testing.assert_allclose(spectrum.frequency_hz, f[1:], rtol=1e-12)
    reference_db = 10 * np.log10(power[1:]) + 120
    above_floor = reference_db > FLOOR_DBUV
    assert above_floor.all()
    np.testing.assert_allclose(spectrum.level, reference_db, rtol=0, atol=1e-6)


def test_odd_lengths_give_the_right_bins_and_no_nyquist_bin():
    fs, n = 1e3, 101
    spectrum = amplitude_spectrum(record(sine(n, fs, 10 * fs / n, 1.0), fs))
    # rfft of N real samples has N//2 + 1 bins; DC is dropped
    assert len(spectrum) == n // 2
    np.testing.assert_allclose(spectrum.frequency_hz, np.arange(1, n // 2 + 1) * fs / n)
    assert spectrum.level.max() == pytest.approx(dbuv_rms(1.0), abs=0.02)


def test_the_dc_bin_is_dropped_and_frequencies_are_positive_and_increasing():
    fs, n = 1e6, 4096
    x = np.full(n, 2.0) + sine(n, fs, 100 * fs / n, 1e-3)
    spectrum = amplitude_spectrum(record(x, fs))
    assert spectrum.frequency_hz[0] == pytest.approx(fs / n)
    assert (np.diff(spectrum.frequency_hz) > 0).all()
    # a 2 V offset leaks only into the flat-top's main lobe (±4 bins): a 1 mV
    # sine 100 bins away still reads its own rms (definition)
    assert spectrum.level[99] == pytest.approx(dbuv_rms(1e-3), abs=0.02)
    assert spectrum.level[5:90].max() < dbuv_rms(1e-3) - 40


def test_the_spectrum_carries_its_unit_and_noise_bandwidth():
    fs, n = 1e9, 100_000
    spectrum = amplitude_spectrum(record(np.ones(n), fs), window="hann")
    assert spectrum.unit == "dBuV"
    assert spectrum.from_fft is True
    # Harris 1978 Table I: Hann ENBW 1.50 bins, so 1.5·fs/N
    assert spectrum.rbw_hz == pytest.approx(1.5 * fs / n, rel=1e-9)


def test_white_noise_reads_its_power_in_the_enbw():
    # worked example (Parseval): white noise of variance σ² has a one-sided
    # density 2σ²/fs V²/Hz, so each bin's mean power is 2σ²·ENBW_hz/fs
    fs, n, sigma = 1e8, 1_000_000, 1e-3
    x = sigma * np.random.default_rng(5).standard_normal(n)
    spectrum = amplitude_spectrum(record(x, fs))
    mean_power_db = 10 * np.log10(np.mean(10 ** (spectrum.level / 10)))
    expected_db = 10 * math.log10(2 * sigma**2 * spectrum.rbw_hz / fs) + 120
    assert mean_power_db == pytest.approx(expected_db, abs=0.05)


def test_an_all_zero_record_reads_the_floor():
    spectrum = amplitude_spectrum(record(np.zeros(256), 1e6))
    assert (spectrum.level == FLOOR_DBUV).all()


def test_float32_and_integer_samples_are_accepted():
    fs, n = 1e6, 10_000
    x = sine(n, fs, 1234 * fs / n, 100.0)
    as_float = amplitude_spectrum(record(x, fs))
    as_single = amplitude_spectrum(record(x.astype(np.float32), fs))
    as_counts = amplitude_spectrum(record(np.round(x).astype(np.int16), fs), window="rectangular")
    assert as_single.level.max() == pytest.approx(as_float.level.max(), abs=1e-4)
    assert as_counts.level.max() == pytest.approx(dbuv_rms(100.0), abs=0.01)


def test_progress_is_reported_in_increasing_fractions_ending_at_one():
    seen = []
    amplitude_spectrum(record(np.ones(1024), 1e6), progress=seen.append)
    assert len(seen) >= 3
    assert all(a < b for a, b in zip(seen, seen[1:], strict=False))
    assert 0 < seen[0] and seen[-1] == 1.0


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
def test_non_finite_samples_are_rejected(bad):
    x = np.ones(1000)
    x[500] = bad
    with pytest.raises(TraceError, match="not finite"):
        amplitude_spectrum(record(x, 1e6))
    x[500] = 1.0
    x[0] = bad  # where the Hann window is zero
    with pytest.raises(TraceError, match="not finite"):
        amplitude_spectrum(record(x, 1e6), window="hann")


def test_short_records_and_records_without_a_sample_rate_are_rejected():
    with pytest.raises(TraceError, match="at least 4 samples"):
        amplitude_spectrum(record(np.ones(3), 1e6))
    with pytest.raises(TraceError, match="sample rate"):
        amplitude_spectrum(TimeRecord(time_s=np.zeros(16), volts=np.ones(16)))
    with pytest.raises(TraceError, match="real numbers"):
        amplitude_spectrum(TimeRecord(time_s=np.arange(16.0), volts=np.ones(16, dtype=complex)))


def test_peak_memory_stays_within_four_times_the_record():
    # benchmark target of the engine: peak ≤ 4× the input array (measured with
    # tracemalloc, to which numpy reports its allocations)
    rec = record(np.random.default_rng(0).standard_normal(1_000_000), 1e9)
    tracemalloc.start()
    try:
        tracemalloc.reset_peak()
        spectrum = amplitude_spectrum(rec)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert len(spectrum) == 500_000
    assert peak <= 4 * rec.volts.nbytes


# --- receiver bandwidth emulation ------------------------------------------------------


def fft_of(x, fs, window="flattop"):
    return amplitude_spectrum(record(x, fs), window=window)


@pytest.mark.parametrize("rbw_hz", [9e3, 120e3])
@pytest.mark.parametrize("offset_bins", [0.0, 0.37, 0.5])
@pytest.mark.parametrize("bin_index", [50_000, 50_030, 50_059, 50_061])
def test_aggregation_keeps_a_sines_level(rbw_hz, offset_bins, bin_index):
    # worked example: 0.1 V reads 77.0 dBµV in any bandwidth that holds it
    # (Parseval: its lobe's power / ENBW is its power); bin positions cover
    # group starts, middles and ends of 120-bin groups every 60 bins, and
    # 9-bin groups (the flat-top's whole lobe) every bin
    fs, n = 200e6, 200_000  # 1 kHz bins, 3.77 kHz ENBW
    x = sine(n, fs, (bin_index + offset_bins) * fs / n, 0.1)
    wide = aggregate_rbw(fft_of(x, fs), rbw_hz)
    assert wide.level.max() == pytest.approx(dbuv_rms(0.1), abs=0.1)
    assert wide.rbw_hz == pytest.approx(rbw_hz)
    assert wide.from_fft is False
    assert (np.diff(wide.frequency_hz) > 0).all()


@pytest.mark.parametrize("rbw_hz", [9e3, 30e3, 120e3, 1e6])
def test_aggregated_noise_reads_its_power_in_the_rbw(rbw_hz):
    # worked example: white noise of variance σ² puts 2σ²·B/fs V² into a
    # bandwidth B (one-sided density 2σ²/fs), so 10 dB more per decade of RBW
    fs, n, sigma = 200e6, 200_000, 1e-3
    x = sigma * np.random.default_rng(9).standard_normal(n)
    aggregated = aggregate_rbw(fft_of(x, fs), rbw_hz)
    mean_power_db = 10 * np.log10(np.mean(10 ** (aggregated.level / 10)))
    expected_db = 10 * math.log10(2 * sigma**2 * aggregated.rbw_hz / fs) + 120
    assert aggregated.rbw_hz == pytest.approx(rbw_hz, rel=0.06)
    assert mean_power_db == pytest.approx(expected_db, abs=0.1)


def test_aggregation_matches_a_direct_sum_of_bin_powers():
    # reference: direct numpy sum of 10^(L/10) over each group / ENBW
    fs, n = 1e6, 10_000
    spectrum = fft_of(np.random.default_rng(2).standard_normal(n), fs)
    aggregated = aggregate_rbw(spectrum, 2e3)  # 20-bin groups
    enbw_bins = spectrum.rbw_hz / (fs / n)
    power = 10 ** (spectrum.level / 10)
    group = 20
    for point_hz, level in zip(aggregated.frequency_hz[:50], aggregated.level[:50], strict=True):
        start = int(round(point_hz / (fs / n) - (group - 1) / 2)) - 1
        direct = 10 * np.log10(power[start : start + group].sum() / enbw_bins)
        assert level == pytest.approx(direct, abs=1e-9)


def test_cispr16_aggregates_each_band_with_its_own_rbw():
    # CISPR 16-1-1 via DOMAIN.md: band B 9 kHz, band C 120 kHz; band A's 200 Hz is
    # finer than a 1 kHz-bin record resolves, so those bins stay as they are
    fs, n, sigma = 200e6, 200_000, 1e-3
    x = sigma * np.random.default_rng(4).standard_normal(n) + sine(n, fs, 50.0003e6, 0.1)
    spectrum = fft_of(x, fs)
    scan = aggregate_rbw(spectrum, "cispr16")
    assert scan.rbw_hz is None
    assert scan.frequency_hz[0] >= 9e3  # bins below band A are dropped
    assert (np.diff(scan.frequency_hz) > 0).all()
    band_a = scan.frequency_hz < 150e3
    np.testing.assert_array_equal(
        scan.level[band_a],
        spectrum.level[(spectrum.frequency_hz >= 9e3) & (spectrum.frequency_hz < 150e3)],
    )
    in_b = (scan.frequency_hz > 1e6) & (scan.frequency_hz < 29e6)
    in_c = (scan.frequency_hz > 31e6) & (scan.frequency_hz < 49e6)
    noise_b = 10 * np.log10(np.mean(10 ** (scan.level[in_b] / 10)))
    noise_c = 10 * np.log10(np.mean(10 ** (scan.level[in_c] / 10)))
    # noise power scales with bandwidth: 10·log10(120/9) = 11.25 dB
    assert noise_c - noise_b == pytest.approx(10 * math.log10(120 / 9), abs=0.15)
    assert scan.level[scan.frequency_hz > 30e6].max() == pytest.approx(dbuv_rms(0.1), abs=0.1)


def test_aggregation_refuses_what_it_cannot_do():
    spectrum = fft_of(np.ones(10_000), 1e6)  # 100 Hz bins, ENBW 377 Hz
    with pytest.raises(TraceError, match="finer than this record resolves"):
        aggregate_rbw(spectrum, 200.0)
    with pytest.raises(TraceError, match="'cispr16'"):
        aggregate_rbw(spectrum, "cispr22")
    with pytest.raises(TraceError, match="positive"):
        aggregate_rbw(spectrum, -9e3)
    receiver = Spectrum(np.linspace(30e6, 1e9, 101), np.zeros(101), "dBuV", rbw_hz=120e3)
    with pytest.raises(TraceError, match="FFT spectrum"):
        aggregate_rbw(receiver, 1e6)
