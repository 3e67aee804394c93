"""Noise floor, peaks and readings, checked against worked examples,
scipy.signal.find_peaks and brute-force numpy."""

import math

import numpy as np
import pytest
import scipy.signal
from hypothesis import given, settings
from hypothesis import strategies as st

from analysis.errors import TraceError
from analysis.fft import aggregate_rbw, amplitude_spectrum
from analysis.peaks import (
    _SCIPY_PROMINENCE_MAXIMA,
    _prominences,
    detection_threshold_db,
    find_peaks,
    noise_floor,
    readings_at,
)
from analysis.types import Spectrum, TimeRecord

FLOOR_DB = 20.0
RBW_HZ = 120e3
# (index into the 10,001-point grid, height above the floor in dB)
EMISSIONS = [
    (300, 10.0),
    (1200, 13.0),
    (2500, 16.0),
    (3800, 19.0),
    (5100, 22.0),
    (6400, 25.0),
    (7700, 28.0),
    (9300, 30.0),
]


def receiver_grid():
    return np.geomspace(30e6, 1e9, 10_001)


def receiver_trace(seed=7, noise_db=1.5, emissions=EMISSIONS):
    """A radiated scan: 20 dBµV floor with Gaussian noise in dB, plus narrow
    emissions of a 120 kHz RBW's shape added in power."""
    f = receiver_grid()
    rng = np.random.default_rng(seed)
    power = 10 ** ((FLOOR_DB + noise_db * rng.standard_normal(f.size)) / 10)
    sigma_hz = RBW_HZ / 2.355
    for i, height_db in emissions:
        power += 10 ** ((FLOOR_DB + height_db) / 10) * np.exp(-0.5 * ((f - f[i]) / sigma_hz) ** 2)
    return Spectrum(f, 10 * np.log10(power), "dBuV", rbw_hz=RBW_HZ)


def sine_record(n, fs, sines, noise_v, seed):
    t = np.arange(n) / fs
    rng = np.random.default_rng(seed)
    x = noise_v * rng.standard_normal(n)
    for frequency_hz, amplitude_v in sines:
        x += amplitude_v * np.sin(2 * np.pi * frequency_hz * t + rng.uniform(0, 2 * np.pi))
    return TimeRecord(t, x)


def dbuv_rms(amplitude_v):
    # definition (DOMAIN.md): dBµV = 20·log10(V/1 µV); rms of a sinusoid = A/√2
    return 20 * math.log10(amplitude_v / math.sqrt(2) / 1e-6)


# --- receiver traces -------------------------------------------------------------------


def test_a_noisy_receiver_trace_yields_exactly_its_emissions():
    spectrum = receiver_trace()
    f = spectrum.frequency_hz
    peaks = find_peaks(spectrum)
    assert len(peaks) == len(EMISSIONS)
    for peak, (i, height_db) in zip(peaks, EMISSIONS, strict=True):
        step_hz = f[i + 1] - f[i]
        assert abs(peak.frequency_hz - f[i]) <= step_hz
        # worked example: emission and floor add in power at the emission's point
        expected_db = 10 * math.log10(10 ** (FLOOR_DB / 10) + 10 ** ((FLOOR_DB + height_db) / 10))
        assert peak.level == pytest.approx(expected_db, abs=0.5)
        assert peak.prominence_db >= 6.0


@pytest.mark.parametrize("seed", range(5))
def test_receiver_noise_alone_gives_no_peaks(seed):
    # 1.5 dB noise reaches 6 dB (4σ) a few times in 10,001 points by chance;
    # the noise-scaled threshold (5.6σ, normal quantile of 1e-4/10,001) does not
    spectrum = receiver_trace(seed=seed, emissions=[])
    assert find_peaks(spectrum) == ()
    assert detection_threshold_db(spectrum) == pytest.approx(5.61 * 1.5, rel=0.1)


def test_the_floor_of_a_receiver_trace_follows_its_noise_not_its_emissions():
    spectrum = receiver_trace()
    floor = noise_floor(spectrum)
    assert floor.shape == spectrum.level.shape
    # median of N(20, 1.5) is 20 (definition); emissions do not lift it
    assert np.abs(floor - FLOOR_DB).max() < 0.6
    at_emissions = floor[[i for i, _ in EMISSIONS]]
    assert np.abs(at_emissions - FLOOR_DB).max() < 0.6


def test_a_spread_spectrum_plateau_is_one_wide_peak_on_an_unlifted_floor():
    # common practice: spread-spectrum clocking spreads a harmonic over ±0.5 %,
    # here 99.5–100.5 MHz, 15 dB above the floor with 1.5 dB noise on top
    spectrum = receiver_trace(emissions=[(9300, 30.0)])
    f, level = spectrum.frequency_hz, spectrum.level.copy()
    plateau = (f > 99.5e6) & (f < 100.5e6)
    level[plateau] = 35.0 + 1.5 * np.random.default_rng(1).standard_normal(plateau.sum())
    spectrum = Spectrum(f, level, "dBuV", rbw_hz=RBW_HZ)
    peaks = find_peaks(spectrum)
    assert len(peaks) == 2
    wide, narrow = peaks
    assert 99.5e6 < wide.frequency_hz < 100.5e6
    assert wide.width_hz > 0.7e6
    assert narrow.width_hz < 3 * RBW_HZ
    assert noise_floor(spectrum)[np.searchsorted(f, 100e6)] == pytest.approx(FLOOR_DB, abs=1.0)


# --- cross-check against scipy on clean traces -----------------------------------------


@st.composite
def clean_traces(draw):
    """Noise-free traces: a flat floor with separated emissions, some with a
    shoulder a few points away; heights keep clear of the 6 dB boundary."""
    n = 4001
    level = np.full(n, FLOOR_DB)
    k = np.arange(n)
    count = draw(st.integers(1, 8))
    centres = np.linspace(150, n - 150, count).astype(int) + draw(
        st.lists(st.integers(-40, 40), min_size=count, max_size=count)
    )
    for centre in centres:
        height = draw(st.one_of(st.floats(1.0, 5.0), st.floats(7.0, 40.0)))
        width = draw(st.floats(0.5, 1.5))
        level = np.maximum(level, FLOOR_DB + height - ((k - centre) / width) ** 2)
        if draw(st.booleans()):
            shoulder = centre + draw(st.sampled_from([-8, -6, -4, 4, 6, 8]))
            drop = draw(st.one_of(st.floats(0.5, 4.0), st.floats(8.0, 20.0)))
            level = np.maximum(level, FLOOR_DB + height - drop - ((k - shoulder) / width) ** 2)
    return level


@settings(max_examples=60, deadline=None)
@given(clean_traces())
def test_clean_traces_give_the_same_peaks_as_scipy_find_peaks(level):
    # reference: scipy.signal.find_peaks(level, prominence=6)
    f = receiver_grid()[:4001]
    expected, _ = scipy.signal.find_peaks(level, prominence=6.0)
    peaks = find_peaks(Spectrum(f, level, "dBuV"))
    found = np.searchsorted(f, [p.frequency_hz for p in peaks])
    np.testing.assert_array_equal(found, expected)


def test_a_flat_topped_peak_reports_its_middle_like_scipy():
    # reference: scipy.signal.find_peaks gives a plateau's middle sample
    level = np.full(1001, 10.0)
    level[500:505] = 30.0
    expected, _ = scipy.signal.find_peaks(level, prominence=6.0)
    f = np.linspace(1e6, 2e6, 1001)
    (peak,) = find_peaks(Spectrum(f, level, "dBuV"))
    assert peak.frequency_hz == f[expected[0]] == f[502]


def test_the_first_and_last_points_are_never_peaks():
    # reference: scipy.signal.find_peaks never reports an end point
    level = np.full(1001, 10.0)
    level[0] = level[-1] = 40.0
    assert scipy.signal.find_peaks(level, prominence=6.0)[0].size == 0
    assert find_peaks(Spectrum(np.linspace(1e6, 2e6, 1001), level, "dBuV")) == ()


def test_widths_of_clean_peaks_match_scipy_peak_widths():
    # reference: scipy.signal.peak_widths at 6 dB below each peak (rel_height=1
    # with a prominence of 6), converted to Hz on the 1 kHz grid
    k = np.arange(20_001)
    f = 1e6 + 1e3 * k
    level = np.full(k.size, 10.0)
    shapes = [(2_000, 30.0, 1.0), (6_000, 40.0, 3.5), (10_000, 25.0, 12.0)]
    for centre, height, width in shapes:
        level = np.maximum(level, height - ((k - centre) / width) ** 2)
    # a 1 % plateau (160 points at 16 MHz), wider than the first ±64-point search
    level[15_000:15_160] = 40.0
    peaks = find_peaks(Spectrum(f, level, "dBuV"))
    index = np.searchsorted(f, [p.frequency_hz for p in peaks])
    assert index.tolist() == [2_000, 6_000, 10_000, 15_079]  # scipy: a plateau's middle
    widths, _, _, _ = scipy.signal.peak_widths(
        level,
        index,
        rel_height=1.0,
        prominence_data=(np.full(4, 6.0), np.zeros(4, int), np.full(4, k.size - 1)),
    )
    np.testing.assert_allclose([p.width_hz for p in peaks], widths * 1e3, rtol=1e-9)
    # worked example: the plateau's edges fall 40 → 10 dB in one step, so the
    # 34 dB crossings lie 0.2 step outside its 160 points: 159.4 steps
    assert peaks[-1].width_hz == pytest.approx(159.4e3)


@st.composite
def tied_levels(draw):
    """Levels on a coarse grid (many equal maxima, plateaus, equal valleys)."""
    n = draw(st.integers(3, 300))
    values = draw(st.lists(st.integers(0, draw(st.integers(1, 6))), min_size=n, max_size=n))
    return np.asarray(values, dtype=float) * draw(st.sampled_from([1.0, 0.5, 6.0]))


@settings(max_examples=300, deadline=None)
@given(tied_levels())
def test_prominences_of_many_maxima_equal_scipys(level):
    # reference: scipy.signal.peak_prominences, over every local maximum of
    # scipy.signal.find_peaks (the input find_peaks gives _prominences)
    maxima, _ = scipy.signal.find_peaks(level)
    if maxima.size:
        expected = scipy.signal.peak_prominences(level, maxima)[0]
        np.testing.assert_array_equal(_prominences(level, maxima), expected)


def test_thousands_of_equal_maxima_give_the_same_peaks_as_scipy_find_peaks():
    # reference: scipy.signal.find_peaks(level, prominence=6). 2,500 maxima of
    # one height (more than _SCIPY_PROMINENCE_MAXIMA, so _prominences decides),
    # 8 points apart: none merges and each width is found in the first window
    level = np.full(20_201, 10.0)
    level[100:20_100:8] = 40.0
    expected, _ = scipy.signal.find_peaks(level, prominence=6.0)
    assert expected.size == 2_500 > _SCIPY_PROMINENCE_MAXIMA
    f = np.linspace(1e6, 3e6, level.size)
    peaks = find_peaks(Spectrum(f, level, "dBuV"), max_peaks=3_000)
    np.testing.assert_array_equal(np.searchsorted(f, [p.frequency_hz for p in peaks]), expected)
    assert {p.prominence_db for p in peaks} == {30.0}


@pytest.mark.parametrize("from_fft", [False, True])
def test_a_plateau_of_deep_dipped_maxima_gives_a_few_peaks_as_wide_as_the_plateau(from_fft):
    # worked example: the upper half alternates 60 / 20 dB point by point, one
    # −6 dB run (its 1-point dips bridged) from its first 60 dB point to the
    # end. 25,000 maxima merge into a few kept peaks (maxima two steps apart
    # merge); each kept peak's width is that whole run, to the last point,
    # with its left edge 0.15 step outside the first 60 dB point (20 → 60 dB
    # in one step crosses 54 dB at (54 − 20)/40 = 0.85 of the step).
    n = 100_000
    f = np.linspace(1e5, 1e9, n)
    level = np.full(n, 20.0)
    level[n // 2 + 1 :: 2] = 60.0
    peaks = find_peaks(Spectrum(f, level, "dBuV", from_fft=from_fft))
    step = f[1] - f[0]
    expected_width = f[-1] - f[n // 2 + 1] + 0.15 * step
    assert 1 <= len(peaks) <= 10
    for peak in peaks:
        assert peak.level == 60.0
        assert peak.width_hz == pytest.approx(expected_width, rel=1e-9)


# --- merging and capping ---------------------------------------------------------------


def test_maxima_two_steps_apart_merge_into_the_higher():
    level = np.full(2001, 10.0)
    level[1000], level[1002] = 40.0, 38.0
    f = np.linspace(1e6, 3e6, 2001)
    assert scipy.signal.find_peaks(level, prominence=6.0)[0].tolist() == [1000, 1002]
    (peak,) = find_peaks(Spectrum(f, level, "dBuV"))
    assert peak.frequency_hz == f[1000]
    assert peak.level == 40.0


def test_the_resolution_decides_which_close_peaks_merge():
    level = np.full(2001, 10.0)
    level[1000], level[1005] = 38.0, 40.0  # 5 kHz apart on a 1 kHz grid
    f = np.arange(2001) * 1e3 + 1e6
    assert len(find_peaks(Spectrum(f, level, "dBuV"), resolution_hz=4e3)) == 2
    (merged,) = find_peaks(Spectrum(f, level, "dBuV"), resolution_hz=6e3)
    assert merged.frequency_hz == f[1005]
    # the spectrum's RBW is the default resolution
    assert len(find_peaks(Spectrum(f, level, "dBuV", rbw_hz=6e3))) == 1


def test_a_shoulder_on_a_higher_peaks_flank_is_not_a_peak():
    # reference: scipy.signal.find_peaks' prominence; the shoulder dips only 2 dB
    level = np.full(2001, 10.0)
    level[995:1006] = [20, 24, 26, 24, 30, 34, 37, 40, 37, 30, 20]
    expected, _ = scipy.signal.find_peaks(level, prominence=6.0)
    f = np.linspace(1e6, 3e6, 2001)
    peaks = find_peaks(Spectrum(f, level, "dBuV"), resolution_hz=1.0)
    assert expected.tolist() == [1002]
    assert [p.frequency_hz for p in peaks] == [f[1002]]


def test_max_peaks_keeps_the_most_prominent_in_frequency_order():
    level = np.full(5001, 10.0)
    heights = [20, 45, 30, 50, 25]
    for i, height in enumerate(heights):
        level[500 + 1000 * i] = height
    f = np.linspace(1e6, 6e6, 5001)
    peaks = find_peaks(Spectrum(f, level, "dBuV"), max_peaks=3)
    assert [p.level for p in peaks] == [45, 30, 50]
    assert [p.frequency_hz for p in peaks] == sorted(p.frequency_hz for p in peaks)


# --- FFT spectra -----------------------------------------------------------------------

SINES = [(25.1234e6, 5e-3), (75.00037e6, 1e-3), (125.5e6, 2e-4), (333.3e6, 5e-4)]


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_an_fft_spectrum_yields_exactly_its_sines_and_no_rayleigh_false_alarms(seed):
    # worked example: 1e6 samples at 1 GS/s, 1 mV rms white noise (floor near
    # 7 dBµV per bin), sines from 0.2 to 5 mV; 500,000 Rayleigh bins put about
    # 490 bins 10 dB above the median (DOMAIN.md), none of which may show
    fs, n = 1e9, 1_000_000
    spectrum = amplitude_spectrum(sine_record(n, fs, SINES, 1e-3, seed))
    peaks = find_peaks(spectrum)
    assert len(peaks) == len(SINES)
    bin_hz = fs / n
    for peak, (frequency_hz, amplitude_v) in zip(peaks, SINES, strict=True):
        assert abs(peak.frequency_hz - frequency_hz) <= 0.05 * bin_hz
        assert peak.level == pytest.approx(dbuv_rms(amplitude_v), abs=0.3)


@pytest.mark.parametrize("seed", range(4))
def test_fft_noise_alone_gives_no_peaks(seed):
    spectrum = amplitude_spectrum(sine_record(1_000_000, 1e9, [], 1e-3, seed))
    assert find_peaks(spectrum) == ()


def test_rayleigh_noise_exceeds_the_floor_as_often_as_the_distribution_says():
    # DOMAIN.md: a Rayleigh bin exceeds k× the median magnitude with probability
    # exp(−ln2·k²); 10 dB (k² = 10) → 2^−10 ≈ 0.098 % of bins
    spectrum = amplitude_spectrum(sine_record(1_000_000, 1e9, [], 1e-3, 8))
    excess = spectrum.level - noise_floor(spectrum)
    assert np.mean(excess > 10.0) == pytest.approx(2.0**-10, rel=0.15)
    # and exactly at the median: half the bins (definition of the median)
    assert np.mean(excess > 0.0) == pytest.approx(0.5, abs=0.01)


def test_the_floor_of_an_fft_spectrum_is_the_rayleigh_median():
    # worked example: a bin's noise power is exponential with mean 2σ²·ENBW/fs
    # (Parseval); its median is ln 2 times the mean (Rayleigh magnitude, DOMAIN.md)
    fs, n, sigma = 1e9, 1_000_000, 1e-3
    spectrum = amplitude_spectrum(sine_record(n, fs, SINES, sigma, 5))
    expected_db = 10 * math.log10(2 * sigma**2 * spectrum.rbw_hz / fs * math.log(2)) + 120
    error_db = noise_floor(spectrum)[spectrum.frequency_hz > 1e6] - expected_db
    # unbiased; a bucket's median of 512 window-correlated bins scatters by
    # about 0.5 dB, of 1024 sampled bins by 0.2 dB
    assert abs(error_db.mean()) < 0.1
    assert np.sqrt(np.mean(error_db**2)) < 0.3
    assert np.abs(error_db).max() < 2.0


def test_a_scope_capture_aggregated_to_a_receiver_rbw_shows_its_sines():
    # the scope-to-receiver path: FFT, 120 kHz RBW (CISPR 16-1-1 bands C/D via
    # DOMAIN.md), then the receiver-trace branch of the peak finder
    fs, n = 1e9, 1_000_000
    spectrum = aggregate_rbw(amplitude_spectrum(sine_record(n, fs, SINES, 1e-3, 6)), 120e3)
    peaks = find_peaks(spectrum)
    assert len(peaks) == len(SINES)
    for peak, (frequency_hz, amplitude_v) in zip(peaks, SINES, strict=True):
        assert abs(peak.frequency_hz - frequency_hz) <= 60e3  # half the RBW
        assert peak.level == pytest.approx(dbuv_rms(amplitude_v), abs=0.5)


def test_the_fft_threshold_holds_the_false_alarm_rate():
    # Rayleigh (DOMAIN.md): n·2^(−k²) = false_alarm → 10·log10(log2(n/p)) dB,
    # plus the 1 dB the module adds for the floor estimate's scatter
    spectrum = amplitude_spectrum(sine_record(100_000, 1e8, [], 1e-3, 0))
    n = len(spectrum)
    rayleigh_db = 10 * math.log10(math.log2(n / 1e-4))
    assert detection_threshold_db(spectrum) == pytest.approx(rayleigh_db + 1.0)
    # empirically, the bins of noise stay below it (the largest of 50,000
    # Rayleigh bins stands about 12 dB above the median: 2^(−k²)·n ≈ 1)
    excess = spectrum.level - noise_floor(spectrum)
    assert excess.max() < detection_threshold_db(spectrum)


@pytest.mark.parametrize("window", ["flattop", "hann", "blackmanharris", "hamming"])
@pytest.mark.parametrize("offset_bins", [0.0, 0.13, 0.37, 0.5, 0.81])
def test_refinement_puts_a_between_bin_sine_within_005_bin(window, offset_bins):
    # worked example: 10 mV at bin 20,000 + offset reads 77.0 dBµV
    fs, n = 1e8, 200_000
    bin_hz = fs / n
    frequency_hz = (20_000 + offset_bins) * bin_hz
    rec = sine_record(n, fs, [(frequency_hz, 1e-2)], 1e-5, 0)
    (peak,) = find_peaks(amplitude_spectrum(rec, window=window))
    assert abs(peak.frequency_hz - frequency_hz) <= 0.05 * bin_hz
    assert peak.level == pytest.approx(dbuv_rms(1e-2), abs=0.1)


def test_without_a_known_window_a_parabola_refines_the_frequency():
    fs, n = 1e8, 200_000
    bin_hz = fs / n
    frequency_hz = (20_000 + 0.37) * bin_hz
    spectrum = amplitude_spectrum(
        sine_record(n, fs, [(frequency_hz, 1e-2)], 1e-5, 0), window="hann"
    )
    unknown = Spectrum(spectrum.frequency_hz, spectrum.level, "dBuV", rbw_hz=None, from_fft=True)
    (peak,) = find_peaks(unknown)
    # parabolic interpolation on dB values; its bias for Hann is 0.016 bin
    assert abs(peak.frequency_hz - frequency_hz) <= 0.05 * bin_hz


@pytest.mark.parametrize("window", ["hann", "hamming", "rectangular", "flattop"])
def test_a_strong_sines_sidelobes_are_not_peaks(window):
    # worked example: a 1 V sine ~120 dB above a 1 µV noise floor; Hann's
    # sidelobes (−31 dB at 1.5 bins, Harris 1978) and the rectangular window's
    # (−13 dB) stand far above the floor, yet only that sine and a genuine
    # 10 mV sine 300 bins away (above the rectangular window's −59.5 dB
    # leakage there, 1/(π·300)) are emissions
    fs, n = 1e8, 200_000
    bin_hz = fs / n
    positions = [20_000.5, 20_300.25]
    sines = [(positions[0] * bin_hz, 1.0), (positions[1] * bin_hz, 1e-2)]
    spectrum = amplitude_spectrum(sine_record(n, fs, sines, 1e-6, 0), window=window)
    peaks = find_peaks(spectrum)
    assert len(peaks) == 2
    # the rectangular window's lobe is too narrow to refine: a sine half a
    # bin off reads as its nearer bin
    tolerance_bins = 0.5 if window == "rectangular" else 0.05
    for peak, position in zip(peaks, positions, strict=True):
        assert abs(peak.frequency_hz / bin_hz - position) <= tolerance_bins
    if window != "rectangular":  # 3.9 dB scalloping (Harris 1978) is not fully undone
        assert peaks[0].level == pytest.approx(dbuv_rms(1.0), abs=0.1)
        assert peaks[1].level == pytest.approx(dbuv_rms(1e-2), abs=0.1)


# --- invariance ------------------------------------------------------------------------

_BASE = receiver_trace(seed=3)
_BASE_PEAKS = find_peaks(_BASE)


@settings(max_examples=25, deadline=None)
@given(st.floats(-150.0, 150.0, allow_nan=False))
def test_adding_a_constant_shifts_peak_levels_and_keeps_frequencies(offset_db):
    shifted = Spectrum(_BASE.frequency_hz, _BASE.level + offset_db, "dBuV", rbw_hz=RBW_HZ)
    peaks = find_peaks(shifted)
    assert len(peaks) == len(_BASE_PEAKS) == len(EMISSIONS)
    for moved, original in zip(peaks, _BASE_PEAKS, strict=True):
        assert moved.frequency_hz == original.frequency_hz
        assert moved.level == pytest.approx(original.level + offset_db, abs=1e-9)
        assert moved.prominence_db == pytest.approx(original.prominence_db, abs=1e-9)


# --- readings --------------------------------------------------------------------------


@pytest.mark.parametrize("seed", range(5))
def test_readings_match_a_brute_force_maximum_over_masks(seed):
    rng = np.random.default_rng(seed)
    f = np.sort(rng.uniform(1e6, 1e9, 3000))
    level = rng.normal(30, 10, f.size)
    query = rng.uniform(0.5e6, 1.05e9, (40, 3))
    tolerance = rng.choice([0.0, 1e3, 1e5, 3e6, 2e8], size=(40, 3))
    got = readings_at(Spectrum(f, level, "dBuV"), query, tolerance)
    # reference: direct numpy max over the points inside each window
    expected = np.full(query.shape, np.nan)
    for idx in np.ndindex(query.shape):
        inside = (f >= query[idx] - tolerance[idx]) & (f <= query[idx] + tolerance[idx])
        if inside.any():
            expected[idx] = level[inside].max()
    np.testing.assert_array_equal(got, expected)


def test_readings_at_exact_points_and_outside_the_spectrum():
    f = np.array([1e6, 2e6, 3e6, 4e6])
    level = np.array([10.0, 40.0, 20.0, 30.0])
    spectrum = Spectrum(f, level, "dBuV")
    np.testing.assert_array_equal(
        readings_at(spectrum, [2e6, 2.5e6, 9e6], 0.0), [40.0, np.nan, np.nan]
    )
    np.testing.assert_array_equal(
        readings_at(spectrum, [2.5e6, 3.5e6], [0.6e6, 0.5e6]), [40.0, 30.0]
    )
    assert readings_at(spectrum, 3e6, 5e6) == 40.0


# --- bad input -------------------------------------------------------------------------


def test_bad_input_raises_trace_errors():
    f = np.linspace(1e6, 2e6, 100)
    level = np.zeros(100)
    level[50] = np.nan
    with pytest.raises(TraceError, match="not numbers"):
        find_peaks(Spectrum(f, level, "dBuV"))
    with pytest.raises(TraceError, match="not numbers"):
        noise_floor(Spectrum(f, level, "dBuV"))
    with pytest.raises(TraceError, match="one frequency per level"):
        find_peaks(Spectrum(f, np.zeros(99), "dBuV"))
    good = Spectrum(f, np.zeros(100), "dBuV")
    with pytest.raises(TraceError, match="false_alarm"):
        find_peaks(good, false_alarm=0.0)
    with pytest.raises(TraceError, match="prominence_db"):
        find_peaks(good, prominence_db=-1.0)
    with pytest.raises(TraceError, match="tolerances"):
        readings_at(good, [1.5e6], [-1.0])
