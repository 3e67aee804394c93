import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from analysis.errors import TraceError
from analysis.harmonics import find_families
from analysis.types import Peak

MHZ = 1e6


def peaks_at(frequencies_hz, *, width_hz=10e3, level=40.0):
    return [Peak(float(f), level, 20.0, float(width_hz)) for f in frequencies_hz]


def square_wave_peaks(duty, *, f0_hz=25 * MHZ, max_order=9):
    """Peaks of a sampled square wave's spectrum, read from numpy's FFT.

    The spectrum comes from the FFT (an outside reference), not from the
    Fourier-series formula the test then checks against.
    """
    per_period, periods = 40, 100  # whole periods: no leakage between bins
    n = per_period * periods
    fs_hz = per_period * f0_hz
    high = round(duty * per_period)
    wave = np.where(np.arange(n) % per_period < high, 1.0, -1.0)
    amplitude = 2 * np.abs(np.fft.rfft(wave)) / n
    frequency = np.fft.rfftfreq(n, 1 / fs_hz)
    band = (frequency > 0) & (frequency <= max_order * f0_hz + 1)
    lines = band & (amplitude > 1e-9)
    return peaks_at(frequency[lines]), amplitude, frequency


def test_a_50_percent_clock_forms_an_odd_only_family():
    peaks, amplitude, frequency = square_wave_peaks(0.5)
    # Fourier series of a square wave: only odd n, amplitude 4A/(πn)
    # (standard EMC textbook result, DOMAIN.md); checked here on the FFT.
    first = amplitude[np.argmin(np.abs(frequency - 25 * MHZ))]
    assert first == pytest.approx(4 / np.pi, rel=0.01)
    (family,) = find_families(peaks)
    assert family.fundamental_hz == pytest.approx(25 * MHZ)
    assert family.orders == (1, 3, 5, 7, 9)
    assert family.odd_only
    assert not family.spread_spectrum


def test_an_asymmetric_duty_cycle_brings_all_orders():
    # Duty D ≠ 50 %: the n-th harmonic ∝ |sin(πnD)|/n, non-zero for even n too
    # (Fourier series of a pulse train, standard EMC textbook result, DOMAIN.md).
    peaks, _, _ = square_wave_peaks(0.3)
    (family,) = find_families(peaks)
    assert family.fundamental_hz == pytest.approx(25 * MHZ)
    assert family.orders == tuple(range(1, 10))
    assert not family.odd_only


def test_a_missing_first_order_still_gives_the_true_fundamental():
    # 96, 144, 192 MHz = orders 2, 3, 4 of 48 MHz (worked example).
    (family,) = find_families(peaks_at([96 * MHZ, 144 * MHZ, 192 * MHZ]))
    assert family.fundamental_hz == pytest.approx(48 * MHZ)
    assert family.orders == (2, 3, 4)
    assert family.peak_frequencies_hz == (96 * MHZ, 144 * MHZ, 192 * MHZ)


def test_it_reports_no_family_at_half_the_fundamental():
    families = find_families(peaks_at([25 * MHZ, 75 * MHZ, 125 * MHZ, 175 * MHZ]))
    assert [f.fundamental_hz for f in families] == [pytest.approx(25 * MHZ)]


def test_a_lone_round_number_peak_does_not_pull_a_family_to_a_sub_harmonic():
    # 40 MHz is 5 × 8 MHz, but 8 MHz would leave orders 3 and 7 empty; the
    # simpler 16 MHz comb keeps its four peaks and 40 MHz stays unexplained
    # (worked example of the documented rule).
    families = find_families(peaks_at([16 * MHZ, 32 * MHZ, 40 * MHZ, 48 * MHZ, 64 * MHZ]))
    (family,) = families
    assert family.fundamental_hz == pytest.approx(16 * MHZ)
    assert 40 * MHZ not in family.peak_frequencies_hz


def test_a_sub_harmonic_that_explains_strictly_more_peaks_wins():
    # 16, 24, 32, 40, 48 MHz are orders 2..6 of 8 MHz; 16 MHz explains only three.
    (family,) = find_families(peaks_at([16 * MHZ, 24 * MHZ, 32 * MHZ, 40 * MHZ, 48 * MHZ]))
    assert family.fundamental_hz == pytest.approx(8 * MHZ)
    assert family.orders == (2, 3, 4, 5, 6)


@pytest.mark.parametrize(
    ("drift", "joins"),
    [(+0.0015, True), (-0.0019, True), (+0.004, False), (-0.003, False)],
)
def test_drift_within_the_tolerance_joins_and_outside_does_not(drift, joins):
    # Tolerance 0.2 % of the peak frequency (the rule), no resolution.
    freqs = [25 * MHZ, 75 * MHZ, 125 * MHZ, 175 * MHZ * (1 + drift)]
    (family,) = find_families(peaks_at(freqs), rel_tol=0.002)
    assert (7 in family.orders) is joins


def test_the_tolerance_is_at_least_two_resolution_steps():
    # 175.5 MHz is 0.29 % off order 7: outside 0.2 %, inside 2 × 300 kHz.
    freqs = [25 * MHZ, 75 * MHZ, 125 * MHZ, 175.5 * MHZ]
    (coarse,) = find_families(peaks_at(freqs), resolution_hz=300e3)
    assert 7 in coarse.orders
    (fine,) = find_families(peaks_at(freqs), resolution_hz=[10e3, 10e3, 10e3, 10e3])
    assert 7 not in fine.orders


def test_two_interleaved_families_are_separated():
    # The demo board's 16 MHz MCU crystal and 25 MHz PHY clock (DOMAIN.md).
    mcu = [16 * MHZ * n for n in range(1, 7)]
    phy = [25 * MHZ * n for n in (1, 3, 5, 7, 9)]
    families = find_families(peaks_at(sorted(mcu + phy)))
    by_f0 = {round(f.fundamental_hz / MHZ, 6): f for f in families}
    assert set(by_f0) == {16.0, 25.0}
    assert by_f0[16.0].orders == (1, 2, 3, 4, 5, 6)
    assert by_f0[25.0].orders == (1, 3, 5, 7, 9)
    assert by_f0[25.0].odd_only and not by_f0[16.0].odd_only


def test_each_peak_belongs_to_one_family_only():
    # 48 MHz is 3 × 16 MHz and 2 × 24 MHz (worked example).
    freqs = [16 * MHZ, 32 * MHZ, 48 * MHZ, 64 * MHZ, 24 * MHZ * 5, 24 * MHZ * 7, 24 * MHZ * 9]
    families = find_families(peaks_at(freqs))
    claimed = [f for family in families for f in family.peak_frequencies_hz]
    assert len(claimed) == len(set(claimed))


def test_one_peak_per_order_even_with_a_peak_out_of_reach_between_two_in_reach():
    # Order 5 of 10 MHz: a wide peak at 49.80 MHz (reach: half its 1 MHz width) and a
    # narrow one at 50.05 MHz (reach 0.2 %) both fall on it; 49.88 MHz, narrow and
    # 0.24 % off, falls on nothing. The closest of the two in reach is order 5 (worked example).
    widths_mhz = [(10, 0.02), (20, 0.02), (30, 0.02), (40, 0.02), (49.80, 1.0), (49.88, 0.02),
                  (50.05, 0.02), (60, 0.02)]
    peaks = [Peak(f * MHZ, 40.0, 20.0, w * MHZ) for f, w in widths_mhz]
    (family,) = find_families(peaks, resolution_hz=1e3)
    assert family.orders == (1, 2, 3, 4, 5, 6)
    assert 50.05 * MHZ in family.peak_frequencies_hz
    assert 49.80 * MHZ not in family.peak_frequencies_hz


def test_widths_growing_with_order_flag_spread_spectrum():
    # Down-spread 1 %: harmonic n is a plateau from 0.99·n·f0 to n·f0, centred
    # at 0.995·n·f0, width 1 % of n·f0 (DOMAIN.md, spread-spectrum clocking).
    f0 = 40 * MHZ
    spread = [Peak(0.995 * n * f0, 40.0, 6.0, 0.01 * n * f0) for n in (1, 3, 5, 7)]
    (family,) = find_families(spread, resolution_hz=120e3)
    assert family.spread_spectrum
    assert family.fundamental_hz == pytest.approx(0.995 * f0)
    assert family.odd_only


def test_narrow_or_constant_width_harmonics_are_not_spread():
    f0 = 40 * MHZ
    # Narrow lines: width = the 120 kHz RBW at every order (CISPR 16-1-1 band C via DOMAIN.md).
    narrow = [Peak(n * f0, 40.0, 20.0, 120e3) for n in (1, 3, 5, 7)]
    (family,) = find_families(narrow, resolution_hz=120e3)
    assert not family.spread_spectrum
    # Wide but constant width: not growing with the order, so not a spread clock.
    constant = [Peak(n * f0, 40.0, 20.0, 2e6) for n in (1, 3, 5, 7)]
    (family,) = find_families(constant, resolution_hz=120e3)
    assert not family.spread_spectrum
    # Growing but tiny (0.05 % of n·f0, below the 0.2 % criterion).
    tiny = [Peak(n * f0, 40.0, 20.0, 0.0005 * n * f0) for n in (1, 3, 5, 7)]
    (family,) = find_families(tiny, resolution_hz=1e3)
    assert not family.spread_spectrum


def test_a_comb_of_chance_coincidences_is_rejected():
    # Orders 17, 23, 31, 41, 47 of 1 MHz: every peak is a multiple, but the
    # comb is mostly holes (worked example of the documented rule).
    assert find_families(peaks_at([n * MHZ for n in (17, 23, 31, 41, 47)])) == ()


def test_min_peaks_and_max_families_are_respected():
    freqs = [16 * MHZ * n for n in range(1, 4)] + [25 * MHZ * n for n in (1, 3)]
    assert [len(f.orders) for f in find_families(peaks_at(freqs))] == [3]
    assert len(find_families(peaks_at(freqs), min_peaks=2)) == 2
    assert len(find_families(peaks_at(freqs), min_peaks=2, max_families=1)) == 1
    assert find_families([]) == ()


def test_bad_input_raises_a_trace_error():
    with pytest.raises(TraceError, match="peak 2"):
        find_families(peaks_at([25 * MHZ, -1.0, 75 * MHZ]))
    with pytest.raises(TraceError, match="resolution"):
        find_families(peaks_at([25 * MHZ, 75 * MHZ]), resolution_hz=[1.0, 2.0, 3.0])
    with pytest.raises(TraceError):
        find_families(peaks_at([25 * MHZ]), rel_tol=-0.1)


@settings(max_examples=40, deadline=None)
@given(
    f0_hz=st.floats(min_value=1e5, max_value=1e8),
    orders=st.sets(st.integers(min_value=1, max_value=20), min_size=3, max_size=8),
    scale=st.floats(min_value=0.1, max_value=10.0),
)
def test_scaling_all_frequencies_scales_the_fundamentals_and_keeps_the_orders(f0_hz, orders, scale):
    # Scale invariance of the matching rule with a purely relative tolerance
    # (worked property: |f − n·f0| ≤ rel_tol·f is homogeneous in f).
    freqs = np.array(sorted(orders), dtype=float) * f0_hz
    base = find_families([Peak(float(f), 40.0, 20.0, 0.0) for f in freqs])
    scaled = find_families([Peak(float(f * scale), 40.0, 20.0, 0.0) for f in freqs])
    assert [f.orders for f in scaled] == [f.orders for f in base]
    assert [f.odd_only for f in scaled] == [f.odd_only for f in base]
    for a, b in zip(base, scaled, strict=True):
        assert b.fundamental_hz == pytest.approx(a.fundamental_hz * scale, rel=1e-9)
