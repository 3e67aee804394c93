import pytest

from analysis.attribution import attribute
from analysis.errors import TraceError
from analysis.types import Peak, Source, Term

MHZ = 1e6

# The demo board of DOMAIN.md: a 16 MHz MCU crystal and a 2.2 MHz buck.
# Tolerances: 50 ppm for the crystal (common practice for a crystal), 20 kHz
# (about 1 %) for the buck's oscillator (common practice).
MCU = Source("MCU crystal", 16 * MHZ, 800.0)
BUCK = Source("buck", 2.2 * MHZ, 20e3)


def peak(frequency_hz):
    return Peak(float(frequency_hz), 40.0, 10.0, 10e3)


def by_frequency(result):
    return {round(a.frequency_hz): a for a in result}


def test_a_clock_harmonic_is_labelled_with_its_order():
    (a,) = attribute([peak(48 * MHZ)], [MCU, BUCK])
    # 48 MHz = 3 × 16 MHz (worked example).
    assert a.terms == (Term("MCU crystal", 3),)
    assert a.error_hz == pytest.approx(0.0)


def test_a_sideband_of_the_clock_is_labelled_as_mixing_with_the_buck():
    # Amplitude modulation of a clock by a switching converter shows as
    # sidebands f_clock ± f_sw (DOMAIN.md, "Mixing"): 16 ± 2.2 MHz.
    result = by_frequency(attribute([peak(18.2 * MHZ), peak(13.8 * MHZ)], [MCU, BUCK]))
    assert result[18_200_000].terms == (Term("MCU crystal", 1), Term("buck", 1))
    assert result[13_800_000].terms == (Term("MCU crystal", 1), Term("buck", -1))
    # error_hz = f_peak − Σ order·f_source.
    assert result[18_200_000].error_hz == pytest.approx(0.0, abs=1e-6)


def test_high_clock_harmonics_are_allowed_beyond_the_mixing_order():
    # The 25th harmonic of 16 MHz at 400 MHz: a single-source harmonic may go
    # far above max_order (worked example).
    (a,) = attribute([peak(400 * MHZ + 10e3)], [MCU], max_order=5)
    assert a.terms == (Term("MCU crystal", 25),)
    assert a.error_hz == pytest.approx(10e3)


def test_a_peak_far_from_every_source_stays_unexplained():
    # 7.3 MHz: nearest buck harmonic 6.6 or 8.8 MHz, nearest mixing product
    # 16 − 4 × 2.2 = 7.2 MHz (100 kHz off, tolerance 800 Hz + 4 × 20 kHz).
    result = attribute([peak(48 * MHZ), peak(7.3 * MHZ)], [MCU, BUCK])
    assert [round(a.frequency_hz) for a in result] == [48_000_000]


def test_the_tolerance_scales_with_the_order():
    # 10 kHz off: the crystal's tolerance is 800 Hz at order 1 and
    # 30 × 800 Hz = 24 kHz at order 30 (tolerance × order, worked example).
    crystal = Source("crystal", 16 * MHZ, 800.0)
    assert attribute([peak(16 * MHZ + 10e3)], [crystal]) == ()
    (a,) = attribute([peak(480 * MHZ + 10e3)], [crystal])
    assert a.terms == (Term("crystal", 30),)
    # Mixing: |n|·tol_a + |m|·tol_b = 800 + 20e3 Hz for 16 + 2.2 MHz.
    assert attribute([peak(18.2 * MHZ + 20.5e3)], [MCU, BUCK])
    assert attribute([peak(18.2 * MHZ + 21.5e3)], [MCU, BUCK]) == ()


def test_the_peak_resolution_widens_the_tolerance():
    crystal = Source("crystal", 16 * MHZ, 800.0)
    assert attribute([peak(16 * MHZ + 5e3)], [crystal]) == ()
    assert attribute([peak(16 * MHZ + 5e3)], [crystal], resolution_hz=9e3)


def test_the_simplest_expression_wins_when_two_fit():
    # 48 MHz = 3 × 16 MHz = 2 × 24 MHz = 16 + 32 MHz: a single harmonic before
    # mixing, then the lower order (worked example of the documented order).
    sources = [Source("a", 16 * MHZ, 0.0), Source("b", 24 * MHZ, 0.0), Source("c", 32 * MHZ, 0.0)]
    (a,) = attribute([peak(48 * MHZ)], sources)
    assert a.terms == (Term("b", 2),)
    # Same complexity, smaller |error| wins: 33 MHz is 1 × 32.9 or 1 × 33.05.
    near = [Source("x", 32.9 * MHZ, 200e3), Source("y", 33.05 * MHZ, 200e3)]
    (a,) = attribute([peak(33 * MHZ)], near)
    assert a.terms == (Term("y", 1),)
    assert a.error_hz == pytest.approx(-50e3)


def test_a_single_harmonic_beats_a_lower_order_mixing_product():
    # 11 MHz = 11 × 1 MHz = 10 MHz + 1 MHz: the documented order puts a single
    # harmonic before any mixing product, whatever their orders.
    sources = [Source("ten", 10 * MHZ, 0.0), Source("one", 1 * MHZ, 0.0)]
    (a,) = attribute([peak(11 * MHZ)], sources)
    assert a.terms == (Term("one", 11),)


def test_orders_that_cannot_be_told_apart_are_not_used():
    # A ±10 % buck (common practice for converter oscillators): at order 5 its
    # tolerance (1.1 MHz) reaches half its frequency, so orders ≥ 5 say nothing.
    loose = Source("loose buck", 2.2 * MHZ, 220e3)
    assert attribute([peak(8.8 * MHZ)], [loose])  # order 4: 0.88 MHz < 1.1 MHz
    assert attribute([peak(11 * MHZ)], [loose]) == ()  # order 5: 1.1 MHz, not < 1.1 MHz
    # A source known only to ± half its frequency explains nothing at all.
    assert attribute([peak(2.2 * MHZ)], [Source("vague", 2.2 * MHZ, 1.1 * MHZ)]) == ()


def test_results_keep_the_peak_order_and_skip_the_unexplained():
    peaks = [peak(f) for f in (18.2 * MHZ, 7.3 * MHZ, 4.4 * MHZ, 32 * MHZ)]
    result = attribute(peaks, [MCU, BUCK])
    assert [round(a.frequency_hz) for a in result] == [18_200_000, 4_400_000, 32_000_000]


def test_max_terms_one_disables_mixing():
    assert attribute([peak(18.2 * MHZ)], [MCU, BUCK], max_terms=1) == ()


def test_three_source_products_when_asked():
    # 16 + 2.2 + 0.125 MHz with the demo's 125 kHz tag reader (DOMAIN.md).
    tag = Source("tag reader", 125e3, 10.0)
    (a,) = attribute([peak(18.325 * MHZ)], [MCU, BUCK, tag], max_terms=3, max_harmonic=5)
    assert a.terms == (Term("MCU crystal", 1), Term("buck", 1), Term("tag reader", 1))


def test_bad_sources_raise_a_trace_error():
    with pytest.raises(TraceError, match="unique"):
        attribute([peak(1e6)], [MCU, MCU])
    with pytest.raises(TraceError, match="frequency"):
        attribute([peak(1e6)], [Source("dead", 0.0, 1.0)])
    with pytest.raises(TraceError, match="tolerance"):
        attribute([peak(1e6)], [Source("odd", 1e6, -1.0)])
    assert attribute([], [MCU]) == ()
    assert attribute([peak(1e6)], []) == ()
