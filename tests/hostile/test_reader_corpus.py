"""Every file of the hostile corpus gives exactly one TraceError naming the file, the line and what was expected."""

from __future__ import annotations

import io

import pytest

from analysis.errors import TraceError
from analysis.pipeline import analyse_file
from analysis.reader import read_trace
from tests.hostile.corpus import ACCEPTED, CORPUS, cases


def _refusal(call) -> TraceError:
    """The TraceError ``call`` raises; any other exception or a result fails the test."""
    try:
        call()
    except TraceError as err:
        return err
    pytest.fail("the file was read without an error")


def _check(err: TraceError, case) -> None:
    message = str(err)
    assert message.startswith(case.prefix), message  # which file, and which line
    assert err.name == case.name and err.line == case.line
    for fragment in case.expect:
        assert fragment in message, message  # what was wrong, or what was expected
    assert "\n" not in message and "internal reader error" not in message
    assert len(message) < 400, message  # one line for a person, not a dump of the file


def test_the_corpus_is_big_enough():
    assert len(CORPUS) >= 40
    assert all(isinstance(b, bytes) and fragment for _, b, fragment in cases())


@pytest.mark.parametrize("case", CORPUS, ids=lambda c: c.name)
def test_read_trace_refuses_with_one_clear_message(case):
    _check(_refusal(lambda: read_trace(case.content, name=case.name, **case.kwargs)), case)


@pytest.mark.parametrize("case", [c for c in CORPUS if not c.kwargs], ids=lambda c: c.name)
def test_the_pipeline_refuses_a_file_object_the_same_way(case):
    # The worker hands the pipeline an open binary file, named by the upload's original name.
    _check(_refusal(lambda: analyse_file(io.BytesIO(case.content), name=case.name)), case)


@pytest.mark.parametrize("case", CORPUS[:12], ids=lambda c: c.name)
def test_a_path_is_refused_the_same_way(case, tmp_path):
    path = tmp_path / "upload.bin"
    path.write_bytes(case.content)
    _check(_refusal(lambda: read_trace(path, name=case.name, **case.kwargs)), case)


@pytest.mark.parametrize("case", ACCEPTED, ids=lambda c: c.name)
def test_awkward_but_valid_files_read(case):
    trace = read_trace(case.content, name=case.name)
    assert len(trace.data) == case.points
    assert all(len(w) < 300 and w.isprintable() for w in trace.warnings), trace.warnings
    if case.warning is None:
        assert trace.warnings == ()
    else:
        assert any(case.warning in w for w in trace.warnings), trace.warnings


class _EndlessLine(io.RawIOBase):
    """A binary stream of ``size`` digits with no line break, made on demand; counts what was read."""

    def __init__(self, size: int):
        self.size, self.pos, self.read_total = size, 0, 0

    def readable(self) -> bool:
        return True

    def readinto(self, b) -> int:
        n = min(len(b), self.size - self.pos)
        b[:n] = b"7" * n
        self.pos += n
        self.read_total += n
        return n


def test_a_one_gigabyte_line_is_refused_without_reading_it():
    # 1 GB, under the 1 GiB file limit: only the line guard can stop it
    stream = _EndlessLine(10**9)
    err = _refusal(lambda: read_trace(stream, name="endless.csv"))
    assert str(err) == "endless.csv line 1: the line is longer than 1048576 bytes; not a text trace"
    assert stream.read_total <= 4 << 20  # a few MiB looked at, not the gigabyte


class _Trickle(io.RawIOBase):
    """A raw stream that hands over at most ``step`` bytes per read, as pipes and sockets may."""

    def __init__(self, content: bytes, step: int):
        self.content, self.pos, self.step = content, 0, step

    def readable(self) -> bool:
        return True

    def readinto(self, b) -> int:
        n = min(len(b), self.step, len(self.content) - self.pos)
        b[:n] = self.content[self.pos : self.pos + n]
        self.pos += n
        return n


def test_a_stream_of_short_reads_is_read_to_its_end():
    from tests.hostile.corpus import good

    trace = read_trace(_Trickle(good(), step=100), name="trickle.csv")
    assert len(trace.data) == 40  # every row, not only the first read's worth


def test_a_file_of_one_endless_line_on_disk_is_refused_at_line_1(tmp_path):
    path = tmp_path / "blob.csv"
    path.write_bytes(b"5" * (3 << 20))  # 3 MiB, no line break
    err = _refusal(lambda: read_trace(path))
    assert str(err) == "blob.csv line 1: the line is longer than 1048576 bytes; not a text trace"


def test_the_command_line_refuses_every_corpus_file_with_one_line_and_exit_2(tmp_path, capsys):
    from analysis.__main__ import main

    for case in (c for c in CORPUS if not c.kwargs):
        path = tmp_path / case.name
        path.write_bytes(case.content)
        assert main([str(path)]) == 2, case.name
        out, err = capsys.readouterr()
        assert out == "" and err.count("\n") == 1 and err.startswith(case.prefix), (case.name, err)
        path.unlink()
