import numpy as np
import pytest

from analysis.envelope import bucket_starts, envelope
from analysis.errors import TraceError

N = 1_000_000


@pytest.fixture(scope="module")
def fft_like_trace():
    """A linearly spaced spectrum from DC to 1 GHz: Rayleigh noise floor plus
    isolated one-sample spikes (a comb of narrow lines), as an FFT gives."""
    rng = np.random.default_rng(42)
    x = np.linspace(0.0, 1e9, N)
    # Rayleigh-distributed bin magnitudes (DOMAIN.md, FFT noise floor), in dB.
    y = 20 * np.log10(rng.rayleigh(1.0, N))
    spikes = np.unique(rng.integers(10, N - 10, 300))
    y[spikes] = 60.0 + rng.uniform(0, 20, spikes.size)
    return x, y, spikes


def brute_force_extremes(y, starts):
    """Reference: each bucket's min and max with a plain loop (test only)."""
    ends = list(starts[1:]) + [y.size]
    return (
        np.array([y[s:e].min() for s, e in zip(starts, ends, strict=True)]),
        np.array([y[s:e].max() for s, e in zip(starts, ends, strict=True)]),
    )


@pytest.mark.parametrize("log_x", [True, False])
def test_every_spike_and_the_global_maximum_survive(fft_like_trace, log_x):
    x, y, spikes = fft_like_trace
    xe, ye = envelope(x, y, max_points=4000, log_x=log_x)
    assert ye.max() == y.max()
    assert xe.size <= 4000
    kept = set(zip(xe.tolist(), ye.tolist(), strict=True))
    missing = [i for i in spikes if (x[i], y[i]) not in kept]
    # Two spikes sharing a bucket keep only the taller; none may vanish otherwise.
    starts = bucket_starts(x, max_points=4000, log_x=log_x)
    bucket = np.searchsorted(starts, spikes, side="right") - 1
    for i in missing:
        same = spikes[bucket == bucket[np.searchsorted(spikes, i)]]
        assert y[same].max() > y[i], f"spike at {x[i]:.0f} Hz was dropped"


@pytest.mark.parametrize("log_x", [True, False])
def test_the_output_is_ordered_and_made_of_input_samples(fft_like_trace, log_x):
    x, y, _ = fft_like_trace
    xe, ye = envelope(x, y, max_points=1000, log_x=log_x)
    assert xe.size <= 1000
    assert np.all(np.diff(xe) >= 0)
    index = np.searchsorted(x, xe)
    np.testing.assert_array_equal(x[index], xe)
    np.testing.assert_array_equal(y[index], ye)


@pytest.mark.parametrize("log_x", [True, False])
def test_bucket_extremes_match_a_brute_force_reference(fft_like_trace, log_x):
    x, y, _ = fft_like_trace
    starts = bucket_starts(x, max_points=4000, log_x=log_x)
    xe, ye = envelope(x, y, max_points=4000, log_x=log_x)
    lo, hi = brute_force_extremes(y, starts)
    bucket = np.searchsorted(starts, np.searchsorted(x, xe), side="right") - 1
    out_lo = np.full(starts.size, np.inf)
    out_hi = np.full(starts.size, -np.inf)
    np.minimum.at(out_lo, bucket, ye)
    np.maximum.at(out_hi, bucket, ye)
    np.testing.assert_array_equal(out_lo, lo)
    np.testing.assert_array_equal(out_hi, hi)


def test_log_buckets_are_equal_in_log10_width():
    # Log-spaced samples (a receiver sweep, 150 kHz–30 MHz): every bucket is
    # non-empty, so the buckets are exactly max_points / 2 equal slices of
    # log10(x) (reference: numpy.linspace of the log range).
    x = np.geomspace(150e3, 30e6, 200_000)
    starts = bucket_starts(x, max_points=400, log_x=True)
    assert starts.size == 200
    edges = np.linspace(np.log10(x[0]), np.log10(x[-1]), 201)
    expected = np.searchsorted(np.log10(x), edges[:-1], side="left")
    assert np.abs(starts - expected).max() <= 1  # rounding of 10**edge


def test_a_linear_trace_on_a_log_axis_still_fills_most_of_the_budget(fft_like_trace):
    x, y, _ = fft_like_trace
    xe, _ = envelope(x, y, max_points=4000, log_x=True)
    assert 3000 <= xe.size <= 4000
    # The DC sample (x = 0) has a bucket of its own on a log axis.
    assert xe[0] == 0.0


def test_a_short_trace_comes_back_unchanged():
    x = np.linspace(1e6, 1e9, 500)
    y = np.sin(x / 1e7)
    xe, ye = envelope(x, y, max_points=500)
    np.testing.assert_array_equal(xe, x)
    np.testing.assert_array_equal(ye, y)
    xe[0] = -1.0  # a copy, not a view of the caller's array
    assert x[0] == 1e6


@pytest.mark.parametrize("max_points", [2, 3, 4, 5, 10])
@pytest.mark.parametrize("log_x", [True, False])
def test_tiny_budgets_are_respected_with_a_dc_sample(max_points, log_x):
    x = np.r_[0.0, np.linspace(1.0, 100.0, 50)]
    y = np.arange(51.0)
    xe, ye = envelope(x, y, max_points=max_points, log_x=log_x)
    assert 1 <= xe.size <= max_points
    assert ye.max() == 50.0 and ye.min() == 0.0


def test_bad_input_raises_a_trace_error():
    with pytest.raises(TraceError, match="one length"):
        envelope(np.arange(10.0), np.arange(9.0))
    with pytest.raises(TraceError, match="must not decrease"):
        envelope(np.array([1.0, 3.0, 2.0]), np.zeros(3))
    with pytest.raises(TraceError, match="finite"):
        envelope(np.array([1.0, 2.0]), np.array([np.nan, 1.0]))
    with pytest.raises(TraceError, match="max_points"):
        envelope(np.arange(10.0), np.arange(10.0), max_points=1)


@pytest.mark.parametrize("bins", [5_000, 50_000, 500_000])
def test_the_step_hint_gives_the_same_buckets_even_with_samples_on_bucket_edges(bins):
    # bucket_starts counts buckets from the samples' log positions when given
    # max_step, and by evaluating every edge without it; the docstring
    # promises the same buckets. Samples sitting exactly on (or one ulp
    # either side of) the edges of candidate bucket counts are the hard case.
    x = np.arange(1, bins + 1) * 1e3  # an FFT's bins, DC dropped
    lo, hi = np.log10(x[0]), np.log10(x[-1])
    on_edges = [x]
    for n_buckets in (2_000, 2_001, 3_999, 9_000, 15_999):
        edges = 10.0 ** (lo + (hi - lo) * np.arange(1, n_buckets) / n_buckets)
        edges = edges[edges < x[min(bins - 1, 3_000)]]
        on_edges += [edges, np.nextafter(edges, 0), np.nextafter(edges, np.inf)]
    x = np.unique(np.concatenate(on_edges))
    step = float(np.max(np.diff(x)))
    np.testing.assert_array_equal(
        bucket_starts(x, max_points=4000, log_x=True, max_step=step),
        bucket_starts(x, max_points=4000, log_x=True),
    )
