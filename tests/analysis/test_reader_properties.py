"""Properties of the reader that must hold for any input.

1. Whatever the bytes, read_trace returns a Trace or raises TraceError —
   never another exception.
2. Numbers written in any common format come back as exactly the float the
   text denotes (reference: Python's correctly rounded float()).
3. The hostile corpus (tests/hostile/corpus.py), mutated, still gets a Trace
   or a TraceError; so does anything under tight size and line guards.
4. The same bytes read alike from bytes, a file object, a raw stream of short
   reads and a path.
"""

import io

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from analysis.errors import TraceError
from analysis.reader import read_frequency_table, read_trace
from analysis.types import SPECTRUM, Trace
from tests.hostile.corpus import CORPUS

FAST = settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def _reads_or_refuses(content: bytes, **kwargs) -> None:
    try:
        result = read_trace(content, name="fuzz.csv", **kwargs)
    except TraceError as err:
        message = str(err)
        assert message.startswith("fuzz.csv")
        assert "\n" not in message  # one line, for the engineer who uploaded the file
        assert "internal reader error" not in message  # the safety net must never be needed
        return
    assert isinstance(result, Trace)
    assert len(result.data) >= 16


@FAST
@given(st.binary(max_size=2000))
def test_arbitrary_bytes_give_a_trace_or_a_trace_error(content):
    _reads_or_refuses(content)


@FAST
@given(st.text(max_size=600), st.sampled_from(["utf-8", "utf-16", "latin-1"]))
def test_arbitrary_text_in_any_encoding_gives_a_trace_or_a_trace_error(text, encoding):
    _reads_or_refuses(text.encode(encoding, errors="replace"))


# Text that looks like a trace often enough to reach the parser's inner paths:
# lines of numbers, separators, units, signs, exponents, junk and blank lines.
_TOKENS = st.sampled_from(
    [
        "1", "-2", "3.5", "4,5", ".5", "6.", "1e3", "2E-4", "-7.25e+01", "nan", "inf", "abc", "",
        "1.2.3", "--1", "e5", "123456789012345678", "0", "9" * 40, '"8"', "\u00b5", "dBuV",
    ]
)  # fmt: skip
_SEPS = st.sampled_from([",", ";", "\t", " ", "  ", ",,", ", "])
_LINE = st.one_of(
    st.lists(_TOKENS, min_size=0, max_size=4).flatmap(
        lambda toks: _SEPS.map(lambda s: s.join(toks))
    ),
    st.sampled_from(
        [
            "Frequency (MHz),Level (dBuV)",
            "Freq [kHz];Level [dBµV]",
            "Time (s),Voltage (V)",
            "# comment",
            "; comment",
            "RBW: 9 kHz",
            "Instrument,XYZ",
            "",
        ]
    ),
)


@FAST
@given(st.lists(_LINE, min_size=0, max_size=40), st.sampled_from(["\n", "\r\n", "\r"]))
def test_trace_like_text_gives_a_trace_or_a_trace_error(lines, newline):
    _reads_or_refuses(newline.join(lines).encode("utf-8"))


@FAST
@given(
    st.lists(_LINE, min_size=0, max_size=40),
    st.sampled_from(
        [
            {},
            {"frequency_unit": "MHz", "level_unit": "dBm"},
            {"domain": "time", "time_unit": "s", "voltage_unit": "V"},
        ]
    ),
)
def test_trace_like_text_with_keywords_gives_a_trace_or_a_trace_error(lines, keywords):
    _reads_or_refuses("\n".join(lines).encode("latin-1", errors="replace"), **keywords)


@FAST
@given(
    body=st.lists(
        st.tuples(st.integers(0, 30), st.binary(min_size=1, max_size=3)), min_size=1, max_size=5
    ),
)
def test_a_valid_file_with_a_few_bytes_overwritten_gives_a_trace_or_a_trace_error(body):
    lines = ["Frequency (kHz),Level (dBuV)"] + [f"{150 + i},{40 + i / 4}" for i in range(30)]
    content = bytearray("\n".join(lines).encode())
    for line_index, junk in body:
        start = sum(len(x) + 1 for x in lines[: line_index + 1])
        content[start : start + len(junk)] = junk
    _reads_or_refuses(bytes(content))


_FORMATS = ["{!r}", "{:.6e}", "{:.3f}", "{:g}", "{:.12g}", "{:.18e}", "{:E}"]


@FAST
@given(
    values=st.lists(
        st.floats(min_value=-1e12, max_value=1e12, allow_nan=False, allow_infinity=False),
        min_size=16,
        max_size=60,
    ),
    fmt=st.sampled_from(_FORMATS),
    sep=st.sampled_from([",", ";", "\t", " "]),
)
def test_written_levels_read_back_as_the_floats_their_text_denotes(values, fmt, sep):
    texts = [fmt.format(v) for v in values]
    lines = [f"{1000 + i}{sep}{t}" for i, t in enumerate(texts)]
    header = (
        sep.join(["Frequency (Hz)", "Level (dBuV)"]) if sep != " " else "Frequency(Hz) Level(dBuV)"
    )
    trace = read_trace((header + "\n" + "\n".join(lines) + "\n").encode(), name="round.csv")
    # reference: Python's float() of the very text written
    assert trace.data.level.tolist() == [float(t) for t in texts]
    if fmt == "{!r}":
        assert trace.data.level.tolist() == values  # repr round-trips exactly


@FAST
@given(
    start=st.floats(min_value=1e3, max_value=1e9),
    step=st.floats(min_value=1.0, max_value=1e6),
    n=st.integers(16, 200),
    fmt=st.sampled_from(["{!r}", "{:.9e}", "{:.1f}"]),
)
def test_written_frequencies_read_back_exactly(start, step, n, fmt):
    freqs = start + step * np.arange(n)
    texts = [fmt.format(float(f)) for f in freqs]
    expected = [float(t) for t in texts]
    if any(b <= a for a, b in zip(expected, expected[1:], strict=False)):
        return  # the format rounded two points together: not a valid trace, tested elsewhere
    body = "\n".join(f"{t},{i % 7}.5" for i, t in enumerate(texts))
    trace = read_trace(("Frequency (Hz),Level (dBuV)\n" + body).encode())
    # reference: Python's float() of the very text written
    assert trace.data.frequency_hz.tolist() == expected


# --- the hostile corpus, mutated; the same bytes from every kind of source; tight guards

_SMALL = [h for h in CORPUS if len(h.content) <= 20_000]


@FAST
@given(
    case=st.sampled_from(_SMALL),
    edits=st.lists(
        st.tuples(
            st.floats(0, 1), st.sampled_from(["flip", "insert", "delete", "cut"]), st.binary(min_size=1, max_size=4)
        ),
        max_size=4,
    ),
)
def test_a_mutated_hostile_file_gives_a_trace_or_a_trace_error(case, edits):
    content = bytearray(case.content)
    for where, how, junk in edits:
        at = int(where * len(content))
        if how == "flip":
            content[at : at + len(junk)] = junk
        elif how == "insert":
            content[at:at] = junk
        elif how == "delete":
            del content[at : at + len(junk)]
        else:
            del content[at:]
    _reads_or_refuses(bytes(content), **case.kwargs)


def _outcome(read) -> tuple:
    try:
        trace = read()
    except TraceError as err:
        return ("error", str(err))
    data = trace.data
    if trace.domain == SPECTRUM:
        return ("spectrum", data.frequency_hz.tolist(), data.level.tolist(), trace.warnings)
    return ("time", data.time_s.tolist(), data.volts.tolist(), trace.warnings)


class _Trickle(io.RawIOBase):
    def __init__(self, content: bytes, step: int):
        self.content, self.pos, self.step = content, 0, step

    def readable(self) -> bool:
        return True

    def readinto(self, b) -> int:
        n = min(len(b), self.step, len(self.content) - self.pos)
        b[:n] = self.content[self.pos : self.pos + n]
        self.pos += n
        return n


@settings(
    max_examples=60,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture],
)
@given(
    lines=st.lists(_LINE, min_size=0, max_size=40),
    step=st.integers(1, 64),
    limit=st.sampled_from([24, 64, 1 << 20]),
)
def test_bytes_a_file_object_a_trickling_stream_and_a_path_read_alike(lines, step, limit, tmp_path):
    content = "\n".join(lines).encode("utf-8")
    path = tmp_path / "same.csv"
    path.write_bytes(content)
    kw = {"name": "same.csv", "max_line_bytes": limit}
    expected = _outcome(lambda: read_trace(content, **kw))
    assert _outcome(lambda: read_trace(io.BytesIO(content), **kw)) == expected
    assert _outcome(lambda: read_trace(_Trickle(content, step), **kw)) == expected
    assert _outcome(lambda: read_trace(path, **kw)) == expected


@FAST
@given(st.lists(_LINE, min_size=0, max_size=40), st.integers(8, 200), st.integers(1, 4000))
def test_tight_guards_give_a_trace_or_a_trace_error(lines, max_line_bytes, max_bytes):
    _reads_or_refuses(
        "\n".join(lines).encode("utf-8"), max_line_bytes=max_line_bytes, max_bytes=max_bytes
    )


@FAST
@given(
    st.one_of(
        st.binary(max_size=1500),
        st.lists(_LINE, max_size=30).map(lambda ls: "\n".join(ls).encode()),
    )
)
def test_a_correction_table_gives_a_table_or_a_trace_error(content):
    try:
        table = read_frequency_table(content, name="table.csv")
    except TraceError as err:
        assert str(err).startswith("table.csv") and "internal reader error" not in str(err)
        return
    assert np.all(np.diff(table.frequency_hz) > 0) and table.frequency_hz[0] > 0
