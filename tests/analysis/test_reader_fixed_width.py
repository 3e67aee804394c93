"""The reader's fixed-width path: blocks whose lines all share one layout.

Files here are several 128 KiB blocks long, so most blocks take the
fixed-width path and the odd one (a wider line, a bad field) does not. The
reference for every parsed number is Python's float() of the same text.
"""

import numpy as np
import pytest

from analysis.errors import TraceError
from analysis.reader import read_trace

ROWS = 30_000  # about 0.6 MB: several blocks


def _levels(rng, rows):
    # Two decimals, signs on some rows and the same width on all ("-1.25", "12.50")
    return [f"{v:5.2f}".replace(" ", "0") for v in rng.uniform(-9.99, 99.99, rows)]


@pytest.mark.parametrize(
    ("sep", "decimal", "eol"),
    [(",", ".", "\n"), (";", ",", "\n"), ("\t", ".", "\r\n"), (";", ".", "\r\n")],
)
def test_fixed_width_blocks_read_every_value_as_float_does(sep, decimal, eol):
    rng = np.random.default_rng(11)
    frequency = [f"{150_000 + 997 * i:09d}.{i % 1000:03d}" for i in range(ROWS)]
    level = _levels(rng, ROWS)
    level[7] = "+" + level[7][1:]  # an explicit plus sign
    body = eol.join(
        f"{f}{sep}{v}".replace(".", decimal) for f, v in zip(frequency, level, strict=True)
    )
    data = f"Frequency (Hz){sep}Level (dBuV){eol}{body}{eol}".encode()
    trace = read_trace(data, name="fixed.csv")
    # reference: Python's float() of each field as written
    np.testing.assert_array_equal(trace.data.frequency_hz, [float(f) for f in frequency])
    np.testing.assert_array_equal(trace.data.level, [float(v) for v in level])
    assert np.signbit(trace.data.level).sum() == sum(v.startswith("-") for v in level)


def test_a_bad_field_in_a_fixed_width_file_is_named_with_its_line():
    rng = np.random.default_rng(12)
    level = _levels(rng, ROWS)
    level[25_000] = "4x.50"
    body = "\n".join(f"{150_000 + 997 * i:09d}.000,{v}" for i, v in enumerate(level))
    data = f"Frequency (Hz),Level (dBuV)\n{body}\n".encode()
    with pytest.raises(TraceError) as caught:
        read_trace(data, name="scan.csv")
    # the header is line 1, row k is line k + 2
    assert (
        str(caught.value) == "scan.csv line 25002: '4x.50' is not a number in column Level (dBuV)"
    )


def test_a_line_of_another_width_or_too_many_digits_falls_back_to_the_general_parse():
    frequency = [f"{1_000_000 + 1_000 * i}.000" for i in range(ROWS)]
    level = ["30.25"] * ROWS
    level[12_345] = "30.2"  # a narrower line in one block
    level[20_000] = "0.1234567890123456789"  # 19 digits: correctly rounded by float()
    body = "\n".join(f"{f},{v}" for f, v in zip(frequency, level, strict=True))
    trace = read_trace(f"Frequency (Hz),Level (dBuV)\n{body}\n".encode(), name="mixed.csv")
    np.testing.assert_array_equal(trace.data.level, [float(v) for v in level])
    np.testing.assert_array_equal(trace.data.frequency_hz, [float(f) for f in frequency])


def test_a_time_record_in_fixed_width_blocks_reads_as_float_does():
    time_s = [f"{i * 1e-6:.6f}" for i in range(ROWS)]
    volts = [f"{0.001 * (i % 7) - 0.003:+.3f}" for i in range(ROWS)]  # one width: "+0.001"
    body = "\n".join(f"{t},{v}" for t, v in zip(time_s, volts, strict=True))
    trace = read_trace(f"Time (s),Voltage (V)\n{body}\n".encode(), name="scope.csv")
    # reference: Python's float() of each field as written
    np.testing.assert_array_equal(trace.data.time_s, [float(t) for t in time_s])
    np.testing.assert_array_equal(trace.data.volts, [float(v) for v in volts])


@pytest.mark.parametrize("power", ["e", "E"])
def test_exponent_notation_in_fixed_width_blocks_reads_as_float_does(power):
    rng = np.random.default_rng(13)
    frequency = [f"{150e3 + 997.0 * i:.6{power}}" for i in range(ROWS)]  # "1.500000e+05"
    level = [f"{v:+.4{power}}" for v in rng.uniform(-99, 99, ROWS)]  # "+3.1416e+01"
    level[3] = f"{1.5e-7:+.4{power}}"  # a negative power of ten
    body = "\n".join(f"{f};{v}" for f, v in zip(frequency, level, strict=True))
    trace = read_trace(f"Frequency (Hz);Level (dBuV)\n{body}\n".encode(), name="exp.csv")
    # reference: Python's float() of each field as written
    np.testing.assert_array_equal(trace.data.frequency_hz, [float(f) for f in frequency])
    np.testing.assert_array_equal(trace.data.level, [float(v) for v in level])


def test_a_time_record_in_exponent_notation_reads_as_float_does():
    rows = 20_000
    time_s = [f"{(i + 1) * 1e-6:.6e}" for i in range(rows)]  # "1.000000e-06"
    volts = [f"{0.5 * (i % 3) - 0.5:+.3e}" for i in range(rows)]
    body = "\n".join(f"{t},{v}" for t, v in zip(time_s, volts, strict=True))
    trace = read_trace(f"Time (s),Voltage (V)\n{body}\n".encode(), name="scope.csv")
    # reference: Python's float() of each field as written
    np.testing.assert_array_equal(trace.data.time_s, [float(t) for t in time_s])
    np.testing.assert_array_equal(trace.data.volts, [float(v) for v in volts])
