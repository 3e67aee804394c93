"""The trace reader: formats it accepts, what it makes of them, and how it says no.

Every file is built here from numbers worked out in the test (no committed
blobs), so each expected value is known exactly: the reference for a parsed
number is Python's float() of the same text.
"""

import io
import zipfile

import numpy as np
import pytest

from analysis.errors import TraceError
from analysis.reader import read_frequency_table, read_trace
from analysis.types import Spectrum, TimeRecord

N = 20  # rows in the small files: above the 16-point minimum
FREQ_KHZ = [150.0 + 10.0 * i for i in range(N)]
LEVEL = [40.0 + 0.25 * i for i in range(N)]


def rows(sep=",", decimal=".", n=N):
    """Data lines of a 150 kHz… spectrum in kHz, levels 40, 40.25, …"""
    out = []
    for f, v in zip(FREQ_KHZ[:n], LEVEL[:n], strict=True):
        out.append(
            f"{f:.1f}{sep}{v:.2f}".replace(".", decimal)
            if decimal != "."
            else f"{f:.1f}{sep}{v:.2f}"
        )
    return "\n".join(out) + "\n"


def write(tmp_path, name, content):
    path = tmp_path / name
    if isinstance(content, str):
        path.write_text(content, encoding="utf-8")
    else:
        path.write_bytes(content)
    return path


def error_of(source, **kwargs):
    with pytest.raises(TraceError) as err:
        read_trace(source, **kwargs)
    return str(err.value)


def assert_spectrum(trace, unit="dBuV", scale=1e3):
    assert isinstance(trace.data, Spectrum)
    assert trace.domain == "spectrum"
    assert trace.data.unit == unit
    np.testing.assert_array_equal(trace.data.frequency_hz, np.array(FREQ_KHZ) * scale)
    np.testing.assert_array_equal(trace.data.level, LEVEL)


# ----------------------------------------------------------------- separators


@pytest.mark.parametrize(
    ("sep", "decimal"),
    [(",", "."), (";", "."), (";", ","), ("\t", "."), ("\t", ","), (" ", "."), ("   ", ".")],
    ids=[
        "comma",
        "semicolon",
        "semicolon-decimal-comma",
        "tab",
        "tab-decimal-comma",
        "blank",
        "blanks",
    ],
)
def test_it_reads_every_separator(tmp_path, sep, decimal):
    header = (
        sep.join(["Frequency (kHz)", "Level (dBuV)"])
        if sep.strip(" ")
        else "Frequency(kHz) Level(dBuV)"
    )
    path = write(tmp_path, "scan.csv", header + "\n" + rows(sep, decimal))
    trace = read_trace(path)
    assert trace.name == "scan.csv"
    assert_spectrum(trace)
    assert trace.warnings == ()


def test_decimal_comma_is_read_as_a_point(tmp_path):
    path = write(
        tmp_path,
        "eu.csv",
        "Frequenz (MHz);Pegel (dBµV)\n" + "\n".join(f"{30 + i},5;{i},25" for i in range(N)),
    )
    data = read_trace(path).data
    assert data.frequency_hz[0] == 30.5e6
    assert data.level[3] == 3.25


def test_crlf_and_classic_mac_line_ends(tmp_path):
    text = "Frequency (kHz),Level (dBuV)\n" + rows()
    assert_spectrum(read_trace(write(tmp_path, "dos.csv", text.replace("\n", "\r\n"))))
    assert_spectrum(read_trace(write(tmp_path, "mac.csv", text.replace("\n", "\r"))))


def test_quoted_fields(tmp_path):
    lines = ['"Frequency (kHz)","Level (dBuV)"'] + [
        f'"{f:.1f}","{v:.2f}"' for f, v in zip(FREQ_KHZ, LEVEL, strict=True)
    ]
    assert_spectrum(read_trace(write(tmp_path, "q.csv", "\n".join(lines))))


# ------------------------------------------------------------------ encodings


def test_utf8_with_bom(tmp_path):
    path = write(
        tmp_path, "bom.csv", ("\ufeffFrequency (kHz),Level (dBµV)\n" + rows()).encode("utf-8")
    )
    assert_spectrum(read_trace(path))


def test_latin1_micro_sign(tmp_path):
    path = write(
        tmp_path, "old.csv", ("Frequency (kHz);Level (dBµV)\n" + rows(";")).encode("latin-1")
    )
    assert b"\xb5" in path.read_bytes()
    assert_spectrum(read_trace(path))


@pytest.mark.parametrize(
    ("spelling", "unit"),
    [
        ("dBµV", "dBuV"),
        ("dBμV", "dBuV"),  # Greek mu
        ("dB(uV)", "dBuV"),
        ("dBm", "dBm"),
        ("dBµV/m", "dBuV/m"),
        ("dBuV/m", "dBuV/m"),
        ("dBµA", "dBuA"),
        ("dBuA", "dBuA"),
        ("dBpT", "dBpT"),
    ],
)
def test_level_unit_spellings(tmp_path, spelling, unit):
    path = write(tmp_path, "u.csv", f"Frequency [kHz],Level [{spelling}]\n" + rows())
    assert_spectrum(read_trace(path), unit=unit)


# --------------------------------------------------------- preamble and header


def test_preamble_key_values_comments_and_blank_lines(tmp_path):
    text = (
        "# exported by the bench receiver\n"
        "; a second comment style\n"
        "Instrument,Demo receiver\n"
        "Start Frequency;150000\n"
        "RBW: 9 kHz\n"
        "Detector = Peak\n"
        "\n"
        "Frequency (kHz),Level (dBuV)\n"
        "\n" + rows()
    )
    trace = read_trace(write(tmp_path, "pre.csv", text))
    assert_spectrum(trace)
    assert dict(trace.metadata) == {
        "Instrument": "Demo receiver",
        "Start Frequency": "150000",
        "RBW": "9 kHz",
        "Detector": "Peak",
    }
    assert trace.data.rbw_hz == 9e3


@pytest.mark.parametrize(
    ("header", "scale"),
    [
        ("Frequency (MHz),Level (dBuV)", 1e6),
        ("Freq [kHz],Level [dBuV]", 1e3),
        ("freq_ghz,level_dbuv", 1e9),
        ("f / Hz,Level / dBuV", 1.0),
        ("Frequency,Level\nMHz,dBuV", 1e6),  # a units line under the names
    ],
)
def test_header_unit_styles(tmp_path, header, scale):
    trace = read_trace(write(tmp_path, "h.csv", header + "\n" + rows()))
    assert_spectrum(trace, scale=scale)


def test_units_given_by_keywords_override_the_header_with_a_warning(tmp_path):
    path = write(tmp_path, "h.csv", "Frequency (Hz),Level (dBuV)\n" + rows())
    trace = read_trace(path, frequency_unit="kHz", level_unit="dBm")
    assert_spectrum(trace, unit="dBm")
    assert trace.warnings == (
        "frequency_unit overrides the header's unit of column Frequency (Hz)",
        "level_unit='dBm' overrides the header's unit of column Level (dBuV)",
    )


def test_headerless_file_with_units_given(tmp_path):
    path = write(tmp_path, "bare.txt", rows("\t"))
    assert_spectrum(read_trace(path, frequency_unit="kHz", level_unit="dBµV"))


def test_headerless_file_without_units_says_which_keywords_are_needed(tmp_path):
    path = write(tmp_path, "bare.txt", rows())
    message = error_of(path)
    assert message.startswith("bare.txt: no header says what the columns are")
    assert "domain='spectrum' with frequency_unit= and level_unit=" in message
    assert error_of(path, domain="spectrum") == (
        "bare.txt: column 1 states no unit: pass frequency_unit= (Hz, kHz, MHz or GHz)"
    )
    assert error_of(path, frequency_unit="kHz") == (
        "bare.txt: column 2 states no level unit: pass level_unit= (dBuV, dBm, dBuV/m, dBuA or dBpT)"
    )


def test_a_frequency_column_without_unit_is_refused(tmp_path):
    path = write(tmp_path, "nounit.csv", "Frequency,Level (dBuV)\n" + rows())
    assert (
        error_of(path)
        == "nounit.csv line 1: column Frequency states no unit: pass frequency_unit= (Hz, kHz, MHz or GHz)"
    )


def test_extra_columns_take_the_first_level_column_and_say_so(tmp_path):
    lines = ["Frequency (kHz),Limit (dBuV),Peak (dBuV),Average (dBuV)"]
    lines += [f"{f},{66.0},{v},{v - 10}" for f, v in zip(FREQ_KHZ, LEVEL, strict=True)]
    trace = read_trace(write(tmp_path, "multi.csv", "\n".join(lines)))
    assert_spectrum(trace)
    assert trace.warnings == (
        "used columns Frequency (kHz) and Peak (dBuV); ignored Limit (dBuV), Average (dBuV)",
    )


def test_dbv_levels_become_dbuv(tmp_path):
    lines = ["Frequency (kHz),Magnitude (dBV)"] + [
        f"{f},{v - 120}" for f, v in zip(FREQ_KHZ, LEVEL, strict=True)
    ]
    trace = read_trace(write(tmp_path, "fft.csv", "\n".join(lines)))
    # definition: 1 V = 120 dBµV
    np.testing.assert_allclose(trace.data.level, LEVEL, atol=1e-9)
    assert trace.data.unit == "dBuV"


def test_a_spectrum_in_linear_volts_becomes_dbuv(tmp_path):
    lines = ["Frequency (kHz),Magnitude (mV)"] + [
        f"{f},{10 ** (v / 20) / 1000:.12g}" for f, v in zip(FREQ_KHZ, LEVEL, strict=True)
    ]
    trace = read_trace(write(tmp_path, "lin.csv", "\n".join(lines)))
    # definition: dBµV = 20·log10(V / 1 µV); the values were written as µV/1000 = mV
    np.testing.assert_allclose(trace.data.level, LEVEL, atol=1e-6)


# ------------------------------------------------------------------ time records


def time_rows(n=64, step=1e-6, fmt="{:.6e},{:.5f}", t0=-32e-6):
    return "\n".join(fmt.format(t0 + i * step, np.sin(i / 5)) for i in range(n)) + "\n"


def test_a_time_record_in_seconds_and_volts(tmp_path):
    trace = read_trace(write(tmp_path, "scope.csv", "Time (s),Voltage (V)\n" + time_rows()))
    assert isinstance(trace.data, TimeRecord)
    assert trace.domain == "time"
    assert trace.data.sample_rate_hz == pytest.approx(1e6, rel=1e-9)
    assert trace.data.volts[5] == float(f"{np.sin(1):.5f}")


def test_time_and_voltage_units_scale_to_seconds_and_volts(tmp_path):
    text = "Time (us);CH1 (mV)\n" + time_rows(step=1.0, fmt="{:.3f};{:.5f}", t0=0.0)
    data = read_trace(write(tmp_path, "us.csv", text)).data
    assert data.time_s[1] == pytest.approx(1e-6, rel=1e-12)
    assert data.volts[5] == pytest.approx(float(f"{np.sin(1):.5f}") * 1e-3, rel=1e-12)


def test_time_without_units_is_seconds_and_volts_with_warnings(tmp_path):
    trace = read_trace(write(tmp_path, "bare.csv", "Time,CH1\n" + time_rows()))
    assert trace.warnings == (
        "column Time states no unit; assumed seconds",
        "column CH1 states no unit; assumed volts",
    )


def test_a_record_written_with_few_digits_is_still_uniform(tmp_path):
    # 1 ns steps near 1 ms printed with 7 significant digits: each value is only
    # known to ±0.5e-12 s, a 1e-3 relative step error by itself; the reader allows it
    text = "Time (s),Voltage (V)\n" + time_rows(n=200, step=1e-9, t0=1e-3, fmt="{:.6e},{:.3f}")
    trace = read_trace(write(tmp_path, "coarse.csv", text))
    assert trace.data.sample_rate_hz == pytest.approx(1e9, rel=1e-3)


def test_uneven_time_steps_name_the_first_offending_line(tmp_path):
    times = [i * 1e-6 for i in range(40)]
    times[25] += 0.01e-6  # 1 % off at the 26th sample
    text = "Time (s),Voltage (V)\n" + "\n".join(f"{t:.9e},0.5" for t in times)
    message = error_of(write(tmp_path, "jitter.csv", text))
    assert message.startswith(
        "jitter.csv line 27: time step 1.01e-06 s differs from the record's step 1e-06 s"
    )
    assert "uniformly spaced" in message


def test_domain_override_that_contradicts_the_header_is_refused(tmp_path):
    path = write(tmp_path, "scope.csv", "Time (s),Voltage (V)\n" + time_rows())
    assert (
        error_of(path, domain="spectrum")
        == "scope.csv: domain= says spectrum but the header says time record"
    )
    headerless = write(tmp_path, "t.csv", time_rows())
    assert read_trace(headerless, domain="time", time_unit="s", voltage_unit="V").domain == "time"


# ----------------------------------------------------------------- the checks


def test_unsorted_frequencies_are_sorted_with_a_warning(tmp_path):
    lines = rows().splitlines()
    lines[4], lines[5] = lines[5], lines[4]
    trace = read_trace(
        write(tmp_path, "shuffled.csv", "Frequency (kHz),Level (dBuV)\n" + "\n".join(lines))
    )
    assert_spectrum(trace)
    assert trace.warnings == ("frequency values were not increasing (first at line 7); sorted",)


def test_duplicate_frequencies_name_the_first_repeated_line(tmp_path):
    lines = rows().splitlines()
    lines[9] = "190.0,41.00"  # repeats line 6 (190 kHz)
    path = write(tmp_path, "dup.csv", "Frequency (kHz),Level (dBuV)\n" + "\n".join(lines))
    assert (
        error_of(path)
        == "dup.csv line 11: frequency 190 kHz repeats line 6 (frequency values must not repeat)"
    )


@pytest.mark.parametrize("bad", ["nan", "NaN", "inf", "-Infinity"])
def test_non_finite_values_name_the_line(tmp_path, bad):
    lines = rows().splitlines()
    lines[7] = f"220.0,{bad}"
    path = write(tmp_path, "nan.csv", "Frequency (kHz),Level (dBµV)\n" + "\n".join(lines))
    assert (
        error_of(path) == f"nan.csv line 9: '{bad}' is not a finite number in column Level (dBµV)"
    )


def test_a_non_number_names_file_line_and_column(tmp_path):
    lines = rows().splitlines()
    lines[19] = "340.0,abc"
    path = write(tmp_path, "scan.csv", "Frequency (MHz),Level (dBµV)\n" + "\n".join(lines))
    assert error_of(path) == "scan.csv line 21: 'abc' is not a number in column Level (dBµV)"


def test_a_non_number_among_blank_lines_and_comments_still_names_its_line(tmp_path):
    text = (
        "Frequency (kHz),Level (dBuV)\n"
        + rows(n=10)
        + "\n# a comment among the data\n\n"
        + "300.0,12x\n"
    )
    assert (
        error_of(write(tmp_path, "c.csv", text))
        == "c.csv line 15: '12x' is not a number in column Level (dBuV)"
    )


def test_comments_and_blank_lines_among_the_data_are_skipped(tmp_path):
    lines = rows().splitlines()
    text = (
        "Frequency (kHz),Level (dBuV)\n"
        + "\n".join(lines[:8])
        + "\n\n# pause\n"
        + "\n".join(lines[8:])
        + "  # end\n"
    )
    assert_spectrum(read_trace(write(tmp_path, "gaps.csv", text)))


@pytest.mark.parametrize(
    ("line", "message"),
    [
        ("220.0,41.00,7", "expected 2 values, found 3"),
        ("220.0", "expected 2 values, found 1"),
        ("220.0,,41.00", "an empty field (expected 2 values separated by a comma)"),
        (",220.0,41.00", "the first field is empty"),
        ("220.0 41.00", "values not separated by a comma (expected 2 values separated by a comma)"),
    ],
)
def test_column_count_problems_name_the_line(tmp_path, line, message):
    lines = rows().splitlines()
    lines[7] = line
    path = write(tmp_path, "cols.csv", "Frequency (kHz),Level (dBuV)\n" + "\n".join(lines))
    assert error_of(path) == f"cols.csv line 9: {message}"


def test_too_few_points(tmp_path):
    path = write(tmp_path, "short.csv", "Frequency (kHz),Level (dBuV)\n" + rows(n=15))
    assert error_of(path) == "short.csv: only 15 data points; at least 16 are needed"


def test_a_negative_frequency_is_refused_and_a_dc_point_dropped(tmp_path):
    lines = rows().splitlines()
    neg = write(
        tmp_path, "neg.csv", "Frequency (kHz),Level (dBuV)\n" + "\n".join(["-10.0,30.00"] + lines)
    )
    assert (
        error_of(neg)
        == "neg.csv line 2: frequency -10 kHz is negative (frequencies must be positive)"
    )
    dc = write(
        tmp_path, "dc.csv", "Frequency (kHz),Level (dBuV)\n" + "\n".join(["0,30.00"] + lines)
    )
    trace = read_trace(dc)
    assert_spectrum(trace)
    assert trace.warnings == ("dropped the 0 Hz (DC) point at line 2",)


def test_a_broken_first_row_is_reported_not_taken_for_the_header(tmp_path):
    lines = rows().splitlines()
    lines[0] = "150.0,40.00q"
    path = write(
        tmp_path, "first.csv", "Instrument,Demo\nFrequency (kHz),Level (dBuV)\n" + "\n".join(lines)
    )
    assert error_of(path) == "first.csv line 3: '40.00q' is not a number in column Level (dBuV)"
    lines[0] = "150.0"
    path.write_text("Frequency (kHz),Level (dBuV)\n" + "\n".join(lines))
    assert error_of(path) == "first.csv line 2: expected 2 values, found 1"


def test_a_broken_first_row_of_a_headerless_file_is_not_dropped(tmp_path):
    lines = rows().splitlines()
    lines[0] = "150.0,4O.00"  # a letter O for a zero
    path = write(tmp_path, "bare.csv", "\n".join(lines))
    assert (
        error_of(path, frequency_unit="kHz", level_unit="dBuV")
        == "bare.csv line 1: '4O.00' is not a number in column 2"
    )


def test_key_value_lines_naming_frequencies_are_preamble_not_a_header(tmp_path):
    text = "Start Frequency;150000\nStop Frequency;340000\n" + rows(";")
    trace = read_trace(write(tmp_path, "kv.csv", text), frequency_unit="kHz", level_unit="dBuV")
    assert_spectrum(trace)
    assert dict(trace.metadata) == {"Start Frequency": "150000", "Stop Frequency": "340000"}


def test_the_header_must_not_name_more_columns_than_the_data_hold(tmp_path):
    path = write(tmp_path, "wide.csv", "Frequency (kHz),Level (dBuV),Limit (dBuV)\n" + rows())
    assert (
        error_of(path) == "wide.csv line 2: the header names 3 columns but this line has 2 values"
    )


# ------------------------------------------------------ inputs that are not traces


def test_empty_and_blank_files(tmp_path):
    assert error_of(write(tmp_path, "empty.csv", b"")) == "empty.csv: the file is empty"
    assert error_of(write(tmp_path, "blank.csv", "\n  \n\t\n")) == "blank.csv: the file is empty"


def test_a_zip_file_renamed_csv(tmp_path):
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as z:
        z.writestr("scan.csv", "Frequency (kHz),Level (dBuV)\n" + rows())
    path = write(tmp_path, "scan.csv", buffer.getvalue())
    assert error_of(path) == "scan.csv: not a text trace: it is a zip archive"


def test_utf16_text(tmp_path):
    path = write(tmp_path, "wide.csv", ("Frequency (kHz),Level (dBuV)\n" + rows()).encode("utf-16"))
    assert (
        error_of(path)
        == "wide.csv: not a text trace: it is UTF-16 text; save it as UTF-8 or Latin-1"
    )
    no_bom = write(
        tmp_path, "le.csv", ("Frequency (kHz),Level (dBuV)\n" + rows()).encode("utf-16-le")
    )
    assert error_of(no_bom).startswith("le.csv: not a text trace: it looks like UTF-16")


def test_binary_data(tmp_path):
    blob = bytes(range(256)) * 64
    assert (
        error_of(write(tmp_path, "b.csv", blob))
        == "b.csv line 1: not a text trace: it contains binary data (a NUL byte)"
    )


def test_text_without_numbers(tmp_path):
    message = error_of(
        write(tmp_path, "prose.csv", "Dear colleague,\nplease find the scan attached.\n")
    )
    assert message.startswith("prose.csv: no numeric data found in the file")


def test_the_line_length_guard(tmp_path):
    long_line = "9" * 5000
    path = write(tmp_path, "long.csv", "Frequency (kHz),Level (dBuV)\n" + long_line + "\n" + rows())
    assert (
        error_of(path, max_line_bytes=1000)
        == "long.csv line 2: the line is longer than 1000 bytes; not a text trace"
    )
    deep = write(
        tmp_path, "deep.csv", "Frequency (kHz),Level (dBuV)\n" + rows() + "1," * 3000 + "\n"
    )
    assert (
        error_of(deep, max_line_bytes=1000)
        == "deep.csv line 22: the line is longer than 1000 bytes; not a text trace"
    )
    no_newline = write(tmp_path, "one.csv", "1," * 3000)
    assert (
        error_of(no_newline, max_line_bytes=1000)
        == "one.csv line 1: the line is longer than 1000 bytes; not a text trace"
    )


def test_a_long_field_is_reported_shortened(tmp_path):
    lines = rows().splitlines()
    lines[3] = "180.0," + "4" * 200
    message = error_of(
        write(tmp_path, "f.csv", "Frequency (kHz),Level (dBuV)\n" + "\n".join(lines))
    )
    assert (
        message == "f.csv line 5: a field of 200 characters is not a number in column Level (dBuV)"
    )


def test_the_size_guard(tmp_path):
    path = write(tmp_path, "big.csv", "Frequency (kHz),Level (dBuV)\n" + rows())
    size = path.stat().st_size
    assert (
        error_of(path, max_bytes=100)
        == f"big.csv: the file is {size} bytes, more than the limit of 100 bytes"
    )
    assert error_of(path.read_bytes(), name="mem.csv", max_bytes=100).startswith(
        "mem.csv: the file is"
    )
    with open(path, "rb") as fh:
        assert "more than the limit" in error_of(fh, max_bytes=100)


def test_a_missing_file_or_a_directory(tmp_path):
    assert (
        error_of(tmp_path / "gone.csv")
        == "gone.csv: cannot read the file (No such file or directory)"
    )
    assert error_of(tmp_path, name="dir").startswith("dir: cannot read the file")


def test_bytes_and_file_objects(tmp_path):
    content = ("Frequency (kHz),Level (dBuV)\n" + rows()).encode()
    assert_spectrum(read_trace(content))
    assert read_trace(content).name == "trace"
    assert read_trace(content, name="upload.csv").name == "upload.csv"
    assert_spectrum(read_trace(io.BytesIO(content)))
    path = write(tmp_path, "scan.csv", content)
    with open(path, "rb") as fh:
        trace = read_trace(fh)
    assert trace.name == "scan.csv"
    assert_spectrum(trace)
    assert_spectrum(read_trace(str(path)))


def test_bad_keywords_are_trace_errors():
    content = ("Frequency (kHz),Level (dBuV)\n" + rows()).encode()
    with pytest.raises(TraceError, match="unknown frequency_unit 'MHZ2'"):
        read_trace(content, frequency_unit="MHZ2")
    with pytest.raises(TraceError, match="unknown domain"):
        read_trace(content, domain="frequency")
    with pytest.raises(TraceError, match="not both"):
        read_trace(content, frequency_unit="Hz", time_unit="s")


# ------------------------------------------------------------ numbers and size


@pytest.mark.parametrize(
    "text",
    [
        "0",
        "-0",
        "+7",
        ".5",
        "5.",
        "-12.5",
        "1e3",
        "1.5E-07",
        "-2.25e+12",
        "123456789012345",
        "1234567890123456",  # 16 digits: beyond a double's exact integers
        "0.1",
        "9007199254740993",  # 2**53 + 1
        "1.000000000000000000e+05",  # numpy.savetxt's default format, 24 characters
        "4.9406564584124654e-300",
        "1e-5",
    ],
)
def test_numbers_read_exactly_as_python_float(text):
    # reference: Python's float() (correctly rounded)
    lines = [f"{100 + i},{text}" for i in range(N)]
    trace = read_trace(("Frequency (Hz),Level (dBuV)\n" + "\n".join(lines)).encode())
    assert trace.data.level.tolist() == [float(text)] * N
    assert np.signbit(trace.data.level[0]) == np.signbit(float(text))


def test_a_file_spanning_many_blocks_reads_every_row_and_counts_lines_right(tmp_path):
    n = 60_000  # a few megabytes: several parse blocks
    f = np.arange(1, n + 1) * 1000.0
    level = np.round(np.sin(np.arange(n)) * 30 + 40, 3)
    body = "\n".join(f"{a:.1f},{b:.3f}" for a, b in zip(f, level, strict=True))
    path = write(tmp_path, "big.csv", "Frequency (Hz),Level (dBuV)\n" + body + "\n")
    data = read_trace(path).data
    np.testing.assert_array_equal(data.frequency_hz, f)
    np.testing.assert_array_equal(data.level, [float(f"{b:.3f}") for b in level])
    lines = body.split("\n")
    lines[54_321] = "oops,1"
    path.write_text("Frequency (Hz),Level (dBuV)\n" + "\n".join(lines))
    assert error_of(path) == "big.csv line 54323: 'oops' is not a number in column Frequency (Hz)"


def test_notation_may_change_between_rows_and_blocks(tmp_path):
    # plain decimals first, then exponent notation, and within blocks both mixed
    n = 40_000
    texts = []
    for i in range(n):
        value = (i % 97) * 0.37 - 15
        if i < n // 2:
            texts.append(f"{value:.2f}")
        else:
            texts.append(f"{value:.5e}" if i % 3 else ("0" if i % 2 else f"{value:.2f}"))
    body = "\n".join(f"{1000 + i}.5,{t}" for i, t in enumerate(texts))
    data = read_trace(write(tmp_path, "mixed.csv", "Frequency (Hz),Level (dBuV)\n" + body)).data
    # reference: Python's float() of the text written
    assert data.level.tolist() == [float(t) for t in texts]


def test_read_frequency_table_reads_any_value_column(tmp_path):
    path = write(tmp_path, "af.csv", "Frequency (MHz),AF (dB/m)\n300,15\n30,12\n100,10\n")
    table = read_frequency_table(path)
    np.testing.assert_array_equal(table.frequency_hz, [30e6, 100e6, 300e6])
    np.testing.assert_array_equal(table.value, [12.0, 10.0, 15.0])
    assert table.value_label == "AF (dB/m)"
    assert table.warnings == ("frequency values were not increasing (first at line 3); sorted",)
