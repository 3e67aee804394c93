"""Read the text exports of spectrum analysers, EMI receivers and oscilloscopes.

A trace file is, top to bottom:

* an optional preamble: key/value lines (``Instrument,XYZ``,
  ``Start Frequency;150000``, ``RBW: 9 kHz``), comments (lines starting with
  ``#``, ``;`` or ``//``) and blank lines. Key/value lines become
  ``Trace.metadata``; a key naming the resolution bandwidth (``RBW``,
  ``Res BW``, ``Resolution Bandwidth``) also sets ``Spectrum.rbw_hz``;
* an optional header naming the columns, units in parentheses or brackets
  (``Frequency (MHz)``, ``Freq [kHz]``, ``Level [dBµV]``), after an underscore
  (``level_dbm``) or alone (``mV``); a names line followed by a units line
  (``Frequency,Level`` then ``MHz,dBuV``) works too;
* the data: two or more numeric columns separated by commas, semicolons, tabs
  or runs of blanks (detected from the first data line). When the separator
  is not a comma, a decimal comma is accepted (``12,5;34,1``). Blank lines and
  ``#`` comments (at a line's start or after a blank) may appear among the data.

The data start at the first line holding two or more numbers and nothing
else; the header is the nearest line above naming a column (it holds no
numbers). Lines between the header and the data, or a line starting with a
number just above headerless data, are taken for broken data rows and
reported, never dropped. The column count is that of most of the first rows. Which columns
are used: the first column whose name or unit says frequency or time (else
column 1) is the x axis; the y axis is the first other column with a level or
voltage unit, or failing that the first other column, never one named limit,
margin or delta. Further columns are ignored, and a warning says which.

Units: a frequency column must state its unit (or the caller passes
``frequency_unit``); so must a level column (``level_unit``). A time or voltage
column without a unit is taken as seconds or volts, with a warning. A headerless
file needs all its units from the caller. Keyword units override the header's
(with a warning when they differ). Levels in dBV or dBmV are converted to
dBµV; a spectrum of linear volts (V, mV, µV) is converted to dBµV.

Checks, each a TraceError naming the file and the 1-based line:
consistent column count; every field a finite number; at least MIN_POINTS
points; x values distinct (x out of order but distinct is sorted, with a
warning); frequencies not negative — a 0 Hz point (the DC bin of an FFT
export) is dropped with a warning, since nothing downstream can use it on a
log-frequency axis; time samples uniformly spaced: every step within 0.1 % of
the median step, plus the rounding of the printed values themselves (a
value printed as 1.234e-06 is only known to ±5e-10).

Guards: ``max_bytes`` (default 1 GiB) refuses bigger inputs before reading
them; ``max_line_bytes`` (default 1 MiB) refuses longer lines, e.g. a binary
file without line breaks — a line too long in the first 2 × max_line_bytes is
refused before the rest of the file is read. Binary content (NUL or control
bytes, zip, gzip, image, PDF or old Office signatures, UTF-16) is refused as
"not a text trace". A header naming fewer or more columns than the data
hold is refused (a decimal comma or thousands separator in comma-separated
data, most often): columns are never guessed.

Speed: only the first lines are looked at in Python; the data are tokenised
and converted with numpy in blocks of 128 KiB, small enough for the
temporaries to stay in cache (no Python work per row). Fixed-width blocks,
where every line shares one layout (plain decimals or exponent notation), are
read as a byte matrix: 1e6 rows in 0.8-1.5x pandas' time on the 2-core
development machine, depending on load; other blocks take the general parse.
Every number converts
exactly as Python's float() does (correctly rounded): in one multiplication
or division when the digits fit a double and the power of ten is exact
(up to 15 digits, exponent within ±22 — everything instruments write), else
through numpy's own correctly rounded string conversion.
"""

from __future__ import annotations

import os
import re
from collections.abc import Callable
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import BinaryIO

import numpy as np

from analysis import units
from analysis.errors import TraceError
from analysis.types import SPECTRUM, TIME, Spectrum, TimeRecord, Trace

DEFAULT_MAX_BYTES = 1 << 30  # 1 GiB
DEFAULT_MAX_LINE_BYTES = 1 << 20  # 1 MiB: no trace line is anywhere near it
MIN_POINTS = 16
TIME_JITTER = 1e-3  # allowed relative deviation of a time step from the median step

_HEAD_LINES = 1000  # preamble + header must fit in this many lines
_HEAD_BYTES = 1 << 20
_CHUNK_BYTES = 1 << 17  # block size of the vectorised parse: its temporaries stay in cache
_PAD_FRONT = 32  # ≥ 16: the window ending at the first field stays inside
_PAD_BACK = 80  # ≥ the widest gather (64 bytes from a field's start)
_MAX_TOKEN = 64  # a field longer than this is not a number anyone writes

_NL, _CR, _TAB, _SPACE, _QUOTE = 10, 13, 9, 32, 34
_DOT, _COMMA, _PLUS, _MINUS = 46, 44, 43, 45
_SEP_BYTES = {"\t": _TAB, ";": 59, ",": _COMMA}
_SEP_NAMES = {"\t": "a tab", ";": "a semicolon", ",": "a comma", None: "blanks"}

FREQUENCY_UNITS = {"hz": 1.0, "khz": 1e3, "mhz": 1e6, "ghz": 1e9}
TIME_UNITS = {
    "s": 1.0,
    "sec": 1.0,
    "secs": 1.0,
    "second": 1.0,
    "seconds": 1.0,
    "ms": 1e-3,
    "us": 1e-6,
    "ns": 1e-9,
    "ps": 1e-12,
}
VOLTAGE_UNITS = {"v": 1.0, "volt": 1.0, "volts": 1.0, "mv": 1e-3, "uv": 1e-6}


# --------------------------------------------------------------------------- units


def _squash_unit(text: str) -> str:
    text = text.replace("Âµ", "u").replace("\u00b5", "u").replace("\u03bc", "u")
    return "".join(ch for ch in text.strip().lower() if ch not in " ()[]{}\"'")


def _lookup(table: dict[str, float], text: str | None) -> float | None:
    if text is None:
        return None
    return table.get(_squash_unit(text))


def _keyword_unit(
    table: dict[str, float], value: str | None, keyword: str, choices: str
) -> float | None:
    if value is None:
        return None
    scale = _lookup(table, value)
    if scale is None:
        raise TraceError(f"unknown {keyword} {value!r}; expected one of {choices}")
    return scale


# ------------------------------------------------------------------------ loading


def _default_name(source: object) -> str:
    if isinstance(source, str | os.PathLike):
        return os.path.basename(os.fsdecode(os.fspath(source))) or "trace"
    got = getattr(source, "name", None)
    if isinstance(got, str | bytes) and got:
        return os.path.basename(os.fsdecode(got)) or "trace"
    return "trace"


def _new_buffer(size: int) -> np.ndarray:
    # Newlines on both sides: the data block always begins after a line break
    # and always ends with one, and wide gathers never leave the array.
    buf = np.empty(_PAD_FRONT + size + _PAD_BACK, dtype=np.uint8)
    buf[:_PAD_FRONT] = _NL
    buf[_PAD_FRONT + size :] = _NL
    return buf


def _too_big(size: int, max_bytes: int, name: str) -> TraceError:
    return TraceError(
        f"the file is {size} bytes, more than the limit of {max_bytes} bytes", name=name
    )


def _early_window(max_line_bytes: int) -> int:
    # Twice the limit: a too-long line starting in the first half shows in full.
    return 2 * (max_line_bytes + 1)


def _early_line_guard(head: np.ndarray, max_line_bytes: int, name: str) -> None:
    """Refuse a line longer than the limit already visible in the file's first bytes.

    Called before the rest of the file is read, so a file of one endless line
    (1 GB of digits, a binary blob) is refused without loading it. Text that
    is binary anyway is left to the head scan, which says what it is.
    """
    head = head[: _early_window(max_line_bytes)]  # the same bytes whatever the source
    if head.size <= max_line_bytes:
        return
    breaks = np.flatnonzero(head == _NL)
    if breaks.size == 0:
        breaks = np.flatnonzero(head == _CR)  # classic Mac line ends
    lengths = np.diff(np.concatenate(([-1], breaks, [head.size]))) - 1
    long = np.flatnonzero(lengths > max_line_bytes)
    if long.size and _binary_reason(head.tobytes()) is None:
        raise TraceError(_too_long(max_line_bytes), name=name, line=int(long[0]) + 1)


def _load(
    source: object, name: str, max_bytes: int, max_line_bytes: int = DEFAULT_MAX_LINE_BYTES
) -> tuple[np.ndarray, int]:
    """Copy the input into a padded uint8 buffer; returns (buffer, size in bytes)."""
    if isinstance(source, bytes | bytearray | memoryview):
        try:
            view = memoryview(source).cast("B")
        except (TypeError, ValueError) as exc:
            raise TraceError("not a text trace: unreadable buffer", name=name) from exc
        size = view.nbytes
        if size > max_bytes:
            raise _too_big(size, max_bytes, name)
        buf = _new_buffer(size)
        buf[_PAD_FRONT : _PAD_FRONT + size] = np.frombuffer(view, dtype=np.uint8)
        _early_line_guard(buf[_PAD_FRONT : _PAD_FRONT + size], max_line_bytes, name)
        return buf, size
    if isinstance(source, str | os.PathLike):
        try:
            with open(source, "rb") as fh:
                size = os.fstat(fh.fileno()).st_size
                if size > max_bytes:
                    raise _too_big(size, max_bytes, name)
                buf = _new_buffer(size)
                target = memoryview(buf)[_PAD_FRONT : _PAD_FRONT + size]
                got = 0
                early = min(size, _early_window(max_line_bytes)) if size > max_line_bytes else 0
                while got < size:
                    n = fh.readinto(target[got : early or size])
                    if not n:
                        break
                    got += n
                    if early and got >= early:
                        _early_line_guard(buf[_PAD_FRONT : _PAD_FRONT + got], max_line_bytes, name)
                        early = 0
                if got < size:  # the file shrank while we read it
                    buf[_PAD_FRONT + got :] = _NL
                    size = got
                return buf, size
        except OSError as exc:
            reason = exc.strerror or exc.__class__.__name__
            raise TraceError(f"cannot read the file ({reason})", name=name) from exc
    read = getattr(source, "read", None)
    if read is None:
        raise TraceError(
            f"cannot read a trace from a {type(source).__name__}; pass a path, bytes or a binary file",
            name=name,
        )

    def pull(n: int) -> bytes:
        try:
            data = read(n)
        except (OSError, ValueError) as exc:
            raise TraceError(f"cannot read the file ({exc})", name=name) from exc
        if data is None:  # a non-blocking stream with nothing ready: treat as the end
            return b""
        if isinstance(data, str):  # a text stream was handed over; its text is what counts
            data = data.encode("utf-8")
        if not isinstance(data, bytes | bytearray | memoryview):
            raise TraceError("cannot read the file (read() returned no bytes)", name=name)
        return data

    # The first bytes alone, for the line guard; then the rest in one read as
    # before (pieces only when a raw stream returns short reads).
    limit = max_bytes + 1
    pieces: list[bytes] = []
    total, goal = 0, min(limit, _early_window(max_line_bytes))
    while total < limit:
        piece = pull(min(goal, limit) - total)
        if not len(piece):
            break
        pieces.append(piece)
        total += len(piece)
        if goal < limit and total >= goal:
            head = np.frombuffer(b"".join(pieces), dtype=np.uint8)
            _early_line_guard(head, max_line_bytes, name)
            goal = limit
    if total > max_bytes:
        raise _too_big(total, max_bytes, name)
    if len(pieces) == 1:
        return _load(pieces[0], name, max_bytes, max_line_bytes)
    buf = _new_buffer(total)
    at = _PAD_FRONT
    for piece in pieces:
        buf[at : at + len(piece)] = np.frombuffer(piece, dtype=np.uint8)
        at += len(piece)
    _early_line_guard(buf[_PAD_FRONT : _PAD_FRONT + total], max_line_bytes, name)
    return buf, total


# ------------------------------------------------------------------ the head scan

_NUMBER = re.compile(r"[+-]?(?:[0-9]+[.,]?[0-9]*|[.,][0-9]+)(?:[eE][+-]?[0-9]+)?")


def _split_fields(text: str, sep: str | None) -> list[str]:
    if sep is None:
        # Blank-separated headers write "Frequency (Hz)  Level (dBuV)": a
        # bracketed unit belongs to the name before it.
        out: list[str] = []
        for tok in text.split():
            if out and tok[:1] in "([":
                out[-1] += " " + tok
            else:
                out.append(tok)
        return out
    fields = [f.strip() for f in text.split(sep)]
    while fields and fields[-1] == "":  # a trailing separator is not a column
        fields.pop()
    return [f.strip('"').strip() for f in fields]


def _data_sep(text: str) -> tuple[str | None, int, bool] | None:
    """(separator, number of fields, quoted) when the line is numbers only, else None."""
    for sep in ("\t", ";", ","):
        if sep in text:
            break
    else:
        sep = None
    fields = _split_fields(text, sep)
    if len(fields) < 2:
        return None
    quoted = '"' in text
    for f in fields:
        if not _NUMBER.fullmatch(f) or (sep == "," and "," in f):
            return None
    return sep, len(fields), quoted


def _is_comment(text: str) -> bool:
    return text.startswith(("#", ";", "//"))


@dataclass
class _Column:
    label: str  # the header text, for messages
    kind: str  # frequency | time | level | voltage | limit | other
    unit: str | None  # the unit text as written, or None


_LIMIT_WORDS = ("limit", "margin", "delta", "mask", "threshold")


def _split_unit(field_text: str) -> tuple[str, str | None]:
    """(name, unit text) of a header field."""
    text = field_text.strip()
    if _is_unit(text):
        return "", text
    if text.endswith((")", "]")):
        depth = 0
        for i in range(len(text) - 1, -1, -1):
            ch = text[i]
            if ch in ")]":
                depth += 1
            elif ch in "([":
                depth -= 1
                if depth == 0:
                    inner, name = text[i + 1 : -1], text[:i].strip(" _-/:")
                    if _is_unit(inner) and name:
                        return name, inner
                    break
    for splitter in (r"[\s_]+", r"/"):
        parts = re.split(splitter, text)
        if len(parts) > 1 and _is_unit(parts[-1]):
            name = text[: len(text) - len(parts[-1])].strip(" _-/:")
            if name:
                return name, parts[-1]
    return text, None


def _is_unit(text: str) -> bool:
    s = _squash_unit(text)
    if not s:
        return False
    return (
        s in FREQUENCY_UNITS
        or s in TIME_UNITS
        or s in VOLTAGE_UNITS
        or units.parse_level_unit(text) is not None
    )


_LABEL_CHARS = 60


def _label_text(text: str) -> str:
    """A header field as messages show it: printable, and at most about 60 characters
    (its start and its end, where the unit is, kept)."""
    text = "".join(ch if ch.isprintable() else "?" for ch in text)
    return text if len(text) <= _LABEL_CHARS else text[:32] + "…" + text[-27:]


def _describe(field_text: str) -> _Column:
    name, unit = _split_unit(field_text)
    low = name.lower()
    label = _label_text(field_text.strip()) or "(unnamed)"
    if any(w in low for w in _LIMIT_WORDS):
        return _Column(label, "limit", unit)
    if unit is not None:
        if _lookup(FREQUENCY_UNITS, unit) is not None:
            return _Column(label, "frequency", unit)
        if _lookup(TIME_UNITS, unit) is not None:
            return _Column(label, "time", unit)
        if units.parse_level_unit(unit) is not None:
            return _Column(label, "level", unit)
        if _lookup(VOLTAGE_UNITS, unit) is not None:
            return _Column(label, "voltage", unit)
    words = re.split(r"[^a-z]+", low)
    if "freq" in low or "f" in words or "hz" in low:
        return _Column(label, "frequency", unit)
    if "time" in low or "t" in words:
        return _Column(label, "time", unit)
    if "volt" in low or re.fullmatch(r"(ch|chan|channel)\s*\d*", low.strip()):
        return _Column(label, "voltage", unit)
    if any(
        w in low
        for w in (
            "level",
            "ampl",
            "magn",
            "power",
            "trace",
            "peak",
            "qp",
            "quasi",
            "avg",
            "aver",
            "rms",
        )
    ):
        return _Column(label, "level", unit)
    return _Column(label, "other", unit)


@dataclass
class _Head:
    data_line: int  # 1-based line number of the first data line
    data_offset: int  # its index into the buffer
    sep: str | None
    ncols: int
    quoted: bool
    encoding: str
    header: list[str] | None
    header_line: int | None
    metadata: dict[str, str]


def _key_value(text: str, sep: str | None) -> tuple[str, str] | None:
    for mark in ([sep] if sep else []) + [":", "=", "\t", ";", ","]:
        if mark and mark in text:
            key, _, rest = text.partition(mark)
            key = key.strip().strip('"').strip()
            parts = [p.strip().strip('"').strip() for p in rest.split(mark)]
            value = " ".join(p for p in parts if p)
            if key:
                return key, value
    return None


# Bytes no text export contains (tab, newline, carriage return, form feed and
# the DOS end-of-file mark are allowed).
_CONTROL_BYTES = bytes(c for c in range(32) if c not in (9, 10, 12, 13, 26)) + b"\x7f"


# Signatures of files people upload by mistake: checked before the UTF-16
# test, which their zero bytes would otherwise trip.
_SIGNATURES = (
    (b"PK\x03\x04", "it is a zip archive"),
    (b"\x1f\x8b", "it is gzip-compressed"),
    (b"\x89PNG", "it is a PNG image"),
    (b"\xff\xd8\xff", "it is a JPEG image"),
    (b"GIF8", "it is a GIF image"),
    (b"%PDF", "it is a PDF document"),
    (b"\xd0\xcf\x11\xe0", "it is an old Office document (e.g. .xls); export it as CSV"),
)


def _binary_reason(head: bytes) -> tuple[str, int | None] | None:
    """(why the head is not text, the 1-based line where that shows, if one does), or None."""
    if head.startswith((b"\xff\xfe", b"\xfe\xff")):
        return "it is UTF-16 text; save it as UTF-8 or Latin-1", None
    for signature, reason in _SIGNATURES:
        if head.startswith(signature):
            return reason, None
    sample = head[:65536]
    if len(sample) >= 4 and max(sample[0::2].count(0), sample[1::2].count(0)) > len(sample) // 4:
        return "it looks like UTF-16 text; save it as UTF-8 or Latin-1", None
    nul = head.find(b"\x00")
    if nul >= 0:
        return "it contains binary data (a NUL byte)", head.count(b"\n", 0, nul) + 1
    control = len(sample) - len(sample.translate(None, _CONTROL_BYTES))
    if control > max(8, len(sample) // 100):
        return "it contains binary data", None
    return None


def _too_long(max_line_bytes: int) -> str:
    return f"the line is longer than {max_line_bytes} bytes; not a text trace"


def _scan_head(buf: np.ndarray, size: int, name: str, max_line_bytes: int) -> _Head:
    """Find the preamble, the header and where the data begin (a loop over the first lines only)."""
    if size == 0:
        raise TraceError("the file is empty", name=name)
    start = _PAD_FRONT
    window = min(size, max(_HEAD_BYTES, max_line_bytes + 1))
    whole = window >= size
    head = buf[start : start + window].tobytes()
    if head.startswith(b"\xef\xbb\xbf"):
        head = head[3:]
        start += 3
    if not head.strip():
        raise TraceError("the file is empty", name=name)
    binary = _binary_reason(head)
    if binary:
        raise TraceError(f"not a text trace: {binary[0]}", name=name, line=binary[1])
    if b"\n" not in head and b"\r" in head:
        # Classic Mac line ends: make them newlines for the whole file.
        body = buf[_PAD_FRONT : _PAD_FRONT + size]
        body[body == _CR] = _NL
        head = head.replace(b"\r", b"\n")
    parts = head.split(b"\n", _HEAD_LINES)
    lines = parts[:-1]  # each of these was followed by a newline
    if len(parts) <= _HEAD_LINES and whole and parts[-1]:
        lines.append(parts[-1])  # the file's last line, without a newline
    elif len(parts) <= _HEAD_LINES and len(parts[-1]) > max_line_bytes:
        raise TraceError(_too_long(max_line_bytes), name=name, line=len(parts))
    try:
        b"\n".join(lines).decode("utf-8")
        encoding = "utf-8"
    except UnicodeDecodeError:
        encoding = "latin-1"  # a lone 0xB5 µ: an older export in a Western code page

    offset = start
    content: list[tuple[int, str]] = []  # (line number, text) of non-comment lines so far
    for index, raw in enumerate(lines):
        number = index + 1
        if len(raw) > max_line_bytes:
            raise TraceError(_too_long(max_line_bytes), name=name, line=number)
        text = raw.decode(encoding, errors="replace").strip()
        if text and not text.startswith("#"):
            found = _data_sep(text)
            if found is not None:
                sep, ncols, quoted = found
                ncols = _usual_count(lines[index : index + 6], encoding, sep, ncols, name, number)
                header, header_line, meta_lines = _find_header(content, sep, ncols, name)
                metadata: dict[str, str] = {}
                for _, meta_text in meta_lines:
                    kv = _key_value(meta_text, sep)
                    if kv:
                        metadata[kv[0]] = kv[1]
                if header is not None and len(header) != ncols:
                    # Fewer names than values is most often a decimal comma or a
                    # thousands separator in a comma-separated file: never guess
                    # which values belong together.
                    hint = (
                        " (a decimal comma or a thousands separator in comma-separated data? "
                        "write 12.5, not 12,5 or 1,000)"
                        if sep == "," and len(header) < ncols
                        else ""
                    )
                    raise TraceError(
                        f"the header names {len(header)} columns but this line has {ncols} values"
                        + hint,
                        name=name,
                        line=number,
                    )
                return _Head(
                    number, offset, sep, ncols, quoted, encoding, header, header_line, metadata
                )
            if not _is_comment(text):
                content.append((number, text))
        offset += len(raw) + 1
    _no_data_under_header(content, name)
    where = (
        "in the file" if whole and len(parts) <= _HEAD_LINES else f"in the first {len(lines)} lines"
    )
    raise TraceError(
        f"no numeric data found {where} (expected two or more columns of numbers "
        "separated by commas, semicolons, tabs or blanks)",
        name=name,
    )


def _no_data_under_header(content: list[tuple[int, str]], name: str) -> None:
    """No line read as data: if a header is followed by a line that starts like a number
    (``1.100.000;20,5``), that line is the broken first row, and is reported as such."""
    for index in range(len(content) - 1):
        below = content[index + 1][1]
        if not below or below[0] not in "0123456789+-.":
            continue
        text = content[index][1]
        sep = next((s for s in ("\t", ";", ",") if s in text), None)
        fields = _split_fields(text, sep)
        if _is_header(fields):
            _no_broken_rows(content[index + 1 : index + 2], sep, len(fields), fields, name)


def _header_fields(text: str, sep: str | None, ncols: int) -> list[str]:
    fields = _split_fields(text, sep)
    if len(fields) == 1 and ncols > 1 and sep is not None:
        fields = _split_fields(text, None)  # a blank-separated header over separated data
    return fields


def _is_header(fields: list[str]) -> bool:
    # names a column, and holds no number (a key/value line such as
    # "Start Frequency;150000" names a frequency too)
    return (
        len(fields) >= 2
        and any(_describe(f).kind != "other" for f in fields)
        and not any(_NUMBER.fullmatch(f) for f in fields)
    )


def _is_units_line(fields: list[str]) -> bool:
    return bool(fields) and all(f == "" or _is_unit(f) for f in fields) and any(fields)


def _usual_count(
    lines: list[bytes], encoding: str, sep: str | None, first: int, name: str, number: int
) -> int:
    """The column count most of the first data lines have; the first line must have it."""
    counts = []
    for raw in lines:
        text = raw.decode(encoding, errors="replace").strip()
        if text and not text.startswith("#"):
            found = _data_sep(text)
            if found is not None and found[0] == sep:
                counts.append(found[1])
    usual = max(set(counts), key=lambda c: (counts.count(c), c == first)) if counts else first
    if usual != first:
        raise TraceError(f"expected {usual} values, found {first}", name=name, line=number)
    return first


def _find_header(
    content: list[tuple[int, str]], sep: str | None, ncols: int, name: str
) -> tuple[list[str] | None, int | None, list[tuple[int, str]]]:
    """Split the lines before the data into (header fields, header line, preamble lines).

    The header is the nearest line (within a few) naming a column, possibly
    followed by a units line. Lines between it and the data, and a line just
    before headerless data that starts with a number, are data lines that did
    not parse: they are reported, not swallowed into the preamble.
    """
    for back in range(1, min(6, len(content)) + 1):
        index = len(content) - back
        line, text = content[index]
        fields = _header_fields(text, sep, ncols)
        after = index + 1
        if _is_units_line(fields) and index > 0:
            names_line, names_text = content[index - 1]
            names = _header_fields(names_text, sep, ncols)
            if len(names) == len(fields):
                # a units line under a names line: join them into "name (unit)"
                joined = [f"{n} ({u})" if u else n for n, u in zip(names, fields, strict=True)]
                _no_broken_rows(content[after:], sep, ncols, joined, name)
                return joined, names_line, content[: index - 1]
        if _is_header(fields):
            _no_broken_rows(content[after:], sep, ncols, fields, name)
            return fields, line, content[:index]
    if content:
        line, text = content[-1]
        first = _split_fields(text, sep)[:1]
        if first and _NUMBER.fullmatch(first[0]):
            _no_broken_rows(content[-1:], sep, ncols, None, name)
    return None, None, content


def _no_broken_rows(
    lines: list[tuple[int, str]], sep: str | None, ncols: int, header: list[str] | None, name: str
) -> None:
    """Raise for the first of ``lines``, which stand where data rows should be."""
    if not lines:
        return
    line, text = lines[0]
    fields = _split_fields(text, sep)
    if len(fields) != ncols:
        raise TraceError(f"expected {ncols} values, found {len(fields)}", name=name, line=line)
    for index, f in enumerate(fields):
        if not _NUMBER.fullmatch(f) or (sep == "," and "," in f):
            where = (
                _label_text(header[index])
                if header and index < len(header) and header[index]
                else str(index + 1)
            )
            shown = _shown(f.encode("utf-8"), "utf-8")
            raise TraceError(f"'{shown}' is not a number in column {where}", name=name, line=line)
    raise TraceError("this line does not read as data", name=name, line=line)


# ------------------------------------------------------------ the vectorised parse


def _token_bounds(
    buf: np.ndarray, lo: int, hi: int, extra_ws: tuple[int, ...]
) -> tuple[np.ndarray, np.ndarray]:
    """Start and end (exclusive) indices into ``buf`` of the fields in buf[lo:hi].

    Fields are separated by bytes up to 32 (blanks, tabs, line ends; the head
    scan has already refused files with binary control bytes) and by the
    ``extra_ws`` bytes (the separator, quotes). buf[lo - 1] and buf[hi - 1]
    are newlines, so every field begins and ends inside.
    """
    w = buf[lo - 1 : hi]
    ws = w <= _SPACE
    for b in extra_ws:
        ws |= w == b
    edges = np.flatnonzero(ws[1:] != ws[:-1])
    edges += lo
    return edges[0::2], edges[1::2]


# --- the vectorised number parser -----------------------------------------------
#
# Each field is handled as the 16 bytes that END at its last character, seen as
# two little-endian uint64 words, lo (bytes 0-7) and hi (bytes 8-15); byte 0 is
# the most significant digit. Ending the window at the field's end right-aligns
# the digits for free; the bytes before the field are masked off. Character
# classes come from plain uint8 comparisons over the (n, 16) byte matrix; counts
# come from popcounts of the flag words; the gap the point leaves is closed by
# moving the bytes before it one place on, with masks made from the point's
# own flag bit; and eight digits per word are combined with the multiply-and-
# shift trick (pairs, then fours, then eight). A field with an exponent is
# split at its 'e' and the two parts read separately. Every step is a
# whole-array operation on contiguous arrays: broadcasting, 2-D table lookups
# and ufunc.accumulate measured 10-70x slower per field.

_U64 = np.uint64
_ONES = _U64(0xFFFFFFFFFFFFFFFF)


_PAIR_MASK = _U64(0x000000FF000000FF)
_PAIR_MUL1 = _U64(100 + (1_000_000 << 32))
_PAIR_MUL2 = _U64(1 + (10_000 << 32))
# value = mantissa * _MUL[p10 + 22] / _DIV[p10 + 22]: one exact operation and one
# correctly rounded one while |p10| ≤ 22 (10**22 is the largest exact power).
_MUL = np.array([1.0] * 22 + [10.0**k for k in range(23)])
_DIV = np.array([10.0**k for k in range(22, 0, -1)] + [1.0] * 23)
_EXACT_MANTISSA = _U64(1 << 53)
_P10_UNKNOWN = np.int16(-32768)  # rounding step 0: for fields read by the slow path


def _count(lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    return np.bitwise_count(lo) + np.bitwise_count(hi)  # uint8: at most 16


def _words(
    matrix: np.ndarray, keep_lo: np.ndarray, keep_hi: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """The (n, 16) byte matrix as contiguous lo and hi words, masked."""
    w = matrix.view(np.uint64).reshape(-1, 2)
    return w[:, 0] & keep_lo, w[:, 1] & keep_hi


def _eight_digits(v: np.ndarray) -> np.ndarray:
    """The 8-digit number in each word whose bytes are digit values, most significant first."""
    v = v * _U64(10) + (v >> _U64(8))  # byte k: 10·d_k + d_{k+1}; even bytes hold the pairs
    return ((v & _PAIR_MASK) * _PAIR_MUL1 + ((v >> _U64(16)) & _PAIR_MASK) * _PAIR_MUL2) >> _U64(32)


_FLAGS = _U64(0x0101010101010101)


_POW10 = 10.0 ** np.arange(23)
_FEW = 4096  # fields per block worth a correctly rounded float() each


def _view(buf: np.ndarray, width: int) -> np.ndarray:
    """Overlapping fixed-width view of the buffer: element i is bytes i .. i + width - 1."""
    return np.ndarray(shape=(buf.size - width + 1,), dtype=f"V{width}", buffer=buf, strides=(1,))


def _redo_hard(
    view32: np.ndarray,
    starts: np.ndarray,
    ends: np.ndarray,
    idx: np.ndarray,
    value: np.ndarray,
    comma_decimal: bool,
) -> None:
    """Recompute |value| for fields where mantissa·10**p10 is not one exact double operation.

    Those are 16-digit mantissas and exponents beyond ±22: rare. A few go
    through Python's float(), many through numpy's string-to-float cast; both
    are correctly rounded.
    """
    if idx.size <= _FEW:
        for k in idx:  # a handful of fields, not every row
            token = view32[starts[k]].tobytes()[: ends[k] - starts[k]]
            value[k] = abs(float(token.replace(b",", b".")))
        return
    # fields that passed are at most 16 + 5 characters (mantissa, 'e', sign, 3 digits)
    raw = view32[starts[idx]].view(np.uint8).reshape(idx.size, 32).copy()
    raw[np.arange(32)[None, :] >= (ends[idx] - starts[idx])[:, None]] = 0
    if comma_decimal:
        raw[raw == _COMMA] = _DOT
    with np.errstate(over="ignore"):  # 1e500 is inf; the finiteness check reports it
        value[idx] = np.abs(raw.view("S32").ravel().astype(np.float64))


def _mantissas(
    view16: np.ndarray,
    starts: np.ndarray,
    ends: np.ndarray,
    comma_decimal: bool,
    first: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Read ``[sign] digits [point digits]`` fields of at most 16 characters.

    ``first`` holds each field's first byte. Returns (mantissa, fraction
    digits, ok): the digits as one uint64 integer and how many of them follow
    the point, so the field's value is ±mantissa / 10**fraction_digits;
    ``ok`` is False for any other field (a field longer than the 16-byte
    window cannot pass the count test).
    """
    n = starts.size
    length = ends - starts
    cut = (16 - np.minimum(length, 16)).astype(np.uint64)  # window bytes before the field
    keep_lo = _ONES << (cut << _U64(3))  # shifts of 64 or more give 0 in numpy
    keep_hi = _ONES << ((np.maximum(cut, _U64(8)) - _U64(8)) << _U64(3))
    flag_lo, flag_hi = keep_lo & _FLAGS, keep_hi & _FLAGS
    window = view16[ends - 16].view(np.uint8).reshape(n, 16)
    digit = window - np.uint8(48)
    is_digit = digit < 10
    is_point = window == _DOT
    if comma_decimal:
        is_point |= window == _COMMA
    digit_lo, digit_hi = _words(is_digit, flag_lo, flag_hi)
    point_lo, point_hi = _words(is_point, flag_lo, flag_hi)
    has_sign = (first == _PLUS) | (first == _MINUS)
    n_digit = _count(digit_lo, digit_hi)
    n_point = _count(point_lo, point_hi)
    # only digits, at most one point and a leading sign: then the counts add up to the length
    ok = (n_digit + n_point + has_sign == length) & (n_point <= 1) & (n_digit != 0)
    has_point = n_point != 0
    np.multiply(digit, is_digit, out=digit)  # digit values; everything else 0
    lo, hi = _words(digit, keep_lo, keep_hi)
    # Close the point's gap: the bytes up to and including the point take their
    # left neighbour. For a single flag bit f at the bottom of byte k, q = f << 7
    # is the top bit of byte k and q ^ (q - 1) masks bytes 0..k.
    q_lo, q_hi = point_lo << _U64(7), point_hi << _U64(7)
    move_lo = (q_lo ^ (q_lo - _U64(1))) * has_point  # all of lo when the point is in hi
    move_hi = (q_hi ^ (q_hi - _U64(1))) * (point_hi != 0)
    moved_lo = lo << _U64(8)
    moved_hi = (hi << _U64(8)) | (lo >> _U64(56))
    lo ^= (lo ^ moved_lo) & move_lo
    hi ^= (hi ^ moved_hi) & move_hi
    # bytes moved = point position + 1, so digits after the point = 16 - moved
    moved_bytes = (np.bitwise_count(move_lo) + np.bitwise_count(move_hi)) >> 3
    fraction_digits = (np.uint8(16) - moved_bytes) * has_point
    mantissa = _eight_digits(lo) * _U64(100_000_000) + _eight_digits(hi)
    return mantissa, fraction_digits, ok


def _parse_plain(
    buf: np.ndarray,
    view16: np.ndarray,
    starts: np.ndarray,
    ends: np.ndarray,
    comma_decimal: bool,
    want_p10: bool,
) -> tuple[np.ndarray, np.ndarray | None, np.ndarray]:
    """Convert fields without an exponent to float64, with no Python loop per field.

    Returns (values, p10 or None unless ``want_p10``, ok): ``p10`` is the
    decimal exponent of each field's last printed digit (its rounding step is
    10**p10); ``ok`` is False for anything but ``[sign] digits [point digits]``
    in at most 16 characters (so also for every field with an exponent).
    """
    first = buf[starts]
    mantissa, fraction_digits, ok = _mantissas(view16, starts, ends, comma_decimal, first)
    # p10 = -fraction_digits in 0..-15: one correctly rounded division
    value = mantissa.astype(np.float64) / _POW10[fraction_digits]
    hard = ok & (mantissa > _EXACT_MANTISSA)
    if hard.any():  # 16-digit mantissas are not exact in a double
        _redo_hard(_view(buf, 32), starts, ends, np.flatnonzero(hard), value, comma_decimal)
    np.negative(value, out=value, where=first == _MINUS)
    p10 = -fraction_digits.astype(np.int16) if want_p10 else None
    return value, p10, ok


_U32 = np.uint32


def _exponents(
    buf: np.ndarray, view4: np.ndarray, starts: np.ndarray, ends: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """Read exponents ``[sign] 1-3 digits`` (the text after the 'e'); returns (int16 values, ok)."""
    n = starts.size
    length = ends - starts
    cut = (4 - np.minimum(length, 4)).astype(np.uint32)
    keep = _U32(0xFFFFFFFF) << (cut << _U32(3))  # the field's bytes of the 4 ending at its end
    window = view4[ends - 4].view(np.uint8).reshape(n, 4)
    digit = window - np.uint8(48)
    is_digit = digit < 10
    np.multiply(digit, is_digit, out=digit)
    first = buf[starts]
    has_sign = (first == _PLUS) | (first == _MINUS)
    n_digit = np.bitwise_count(is_digit.view(np.uint32).ravel() & keep)
    ok = (n_digit + has_sign == length) & (n_digit != 0) & (n_digit <= 3)
    v = digit.view(np.uint32).ravel() & keep
    exponent = (v >> _U32(24)).astype(np.int16)
    exponent += ((v >> _U32(16)) & _U32(0xFF)).astype(np.int16) * np.int16(10)
    exponent += ((v >> _U32(8)) & _U32(0xFF)).astype(np.int16) * np.int16(100)
    np.negative(exponent, out=exponent, where=first == _MINUS)
    return exponent, ok


def _parse_general(
    buf: np.ndarray,
    view16: np.ndarray,
    view4: np.ndarray,
    starts: np.ndarray,
    ends: np.ndarray,
    lo: int,
    hi: int,
    comma_decimal: bool,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Convert the fields of buf[lo:hi], exponents included, to float64.

    Each field is split at its exponent mark ('e' or 'E'): the mantissa is
    read as in _parse_plain and the exponent by _exponents. Returns (values,
    p10, ok) like _parse_plain; ``ok`` is False for anything but
    ``[sign] digits [point digits] [e [sign] 1-3 digits]`` with a mantissa of
    at most 16 characters.
    """
    n = starts.size
    w = buf[lo:hi]
    marks = np.flatnonzero((w | np.uint8(32)) == np.uint8(101)) + lo
    if marks.size == n and bool(np.all(marks > starts)) and bool(np.all(marks < ends)):
        mark_at, has_e, single = marks, np.ones(n, dtype=bool), np.ones(n, dtype=bool)
    else:  # some fields without a mark (or with several): find each mark's field
        owner = np.searchsorted(starts, marks, side="right") - 1
        per_field = np.bincount(owner, minlength=n)
        mark_at = ends.copy()
        mark_at[owner] = marks
        has_e, single = per_field > 0, per_field <= 1
    first = buf[starts]
    mantissa, fraction_digits, ok = _mantissas(view16, starts, mark_at, comma_decimal, first)
    exponent, exp_ok = _exponents(buf, view4, np.minimum(mark_at + 1, ends), ends)
    ok &= single & (exp_ok | ~has_e)
    exponent *= has_e
    p10 = exponent - fraction_digits.astype(np.int16)
    at = np.clip(p10, -22, 22) + 22
    value = mantissa.astype(np.float64) * _MUL[at] / _DIV[at]
    # exact (one rounding) when the mantissa is exact in a double and 10**|p10| is too
    hard = ok & ((mantissa > _EXACT_MANTISSA) | (p10 > 22) | (p10 < -22))
    if hard.any():
        _redo_hard(_view(buf, 32), starts, ends, np.flatnonzero(hard), value, comma_decimal)
    np.negative(value, out=value, where=first == _MINUS)
    return value, p10, ok


_NUMBER_CHARS = np.zeros(256, dtype=bool)
# digits, signs, point, exponent, and the letters of nan/inf/infinity (an
# unused column of NaN must not fall to the per-field path)
_NUMBER_CHARS[list(b"0123456789+-.eEnNaAiIfFtTyY")] = True


def _parse_long(
    buf: np.ndarray, view64: np.ndarray, starts: np.ndarray, ends: np.ndarray, comma_decimal: bool
) -> tuple[np.ndarray, np.ndarray]:
    """Fields the 16-byte path left (longer ones, nan, inf), through numpy's string-to-float cast.

    Returns (values, ok); ``ok`` is False where the cast could not be used.
    """
    n = starts.size
    length = ends - starts
    raw = view64[starts].view(np.uint8).reshape(n, 64).copy()
    raw[np.arange(64)[None, :] >= length[:, None]] = 0
    if comma_decimal:
        raw[raw == _COMMA] = _DOT
    candidate = (length <= 64) & (_NUMBER_CHARS[raw] | (raw == 0)).all(axis=1)
    values = np.full(n, np.nan)
    if candidate.any():
        try:
            with np.errstate(over="ignore"):  # 1e500 is inf; the finiteness check reports it
                values[candidate] = raw[candidate].view("S64").ravel().astype(np.float64)
        except ValueError:
            candidate[:] = False  # one of them is not a number: let the slow path say which
    return values, candidate


_SLOW_NUMBER = re.compile(
    rb"\s*[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?\s*|\s*[+-]?(?:nan|inf|infinity)\s*", re.I
)


def _slow_number(token: bytes, comma_decimal: bool) -> tuple[float, int] | None:
    """The value and rounding exponent of a field the fast path left, or None if not a number."""
    if comma_decimal:
        token = token.replace(b",", b".")
    if len(token) > _MAX_TOKEN or not _SLOW_NUMBER.fullmatch(token):
        return None
    value = float(token)
    mantissa, _, exp = token.lower().partition(b"e")
    frac = mantissa.partition(b".")[2]
    try:
        p10 = int(exp or b"0") - len(frac)
    except ValueError:
        p10 = 0
    return value, max(-32768, min(32767, p10))


@dataclass
class _Chunk:
    lo: int
    hi: int
    line0: int  # line number of buf[lo]
    row0: int  # index of its first row


@dataclass
class _Table:
    """The numeric block of a text table plus what is needed to point at a line."""

    name: str
    encoding: str
    metadata: dict[str, str]
    header: list[str] | None
    header_line: int | None
    data_line: int
    ncols: int
    rows: int
    columns: dict[int, np.ndarray]  # the kept columns, each a contiguous float64 array
    p10: dict[int, np.ndarray]  # int16 rounding exponent of each value (step 10**p10)
    _buf: np.ndarray | None = None
    _chunks: list[_Chunk] = field(default_factory=list)
    _ws: tuple[int, ...] = ()

    def column_label(self, index: int) -> str:
        if self.header and index < len(self.header) and self.header[index]:
            return _label_text(self.header[index])
        return str(index + 1)

    def lines_of_rows(self, rows: np.ndarray) -> np.ndarray:
        """1-based file line numbers of the given row indices (re-tokenises their blocks)."""
        rows = np.asarray(rows, dtype=np.int64)
        out = np.empty(rows.size, dtype=np.int64)
        firsts = np.array([c.row0 for c in self._chunks])
        which = np.searchsorted(firsts, rows, side="right") - 1
        ncols = self.ncols
        for ci in np.unique(which):  # a loop over a handful of blocks, not rows
            chunk = self._chunks[ci]
            sel = which == ci
            starts, _ = _token_bounds(self._buf, chunk.lo, chunk.hi, self._ws)
            first_tokens = starts[(rows[sel] - chunk.row0) * ncols]
            nl = np.flatnonzero(self._buf[chunk.lo : chunk.hi] == _NL) + chunk.lo
            out[sel] = chunk.line0 + np.searchsorted(nl, first_tokens)
        return out

    def row_text(self, row: int, column: int) -> str:
        """The field as written in the file, for messages."""
        chunk = self._chunks[
            int(np.searchsorted([c.row0 for c in self._chunks], row, side="right")) - 1
        ]
        starts, ends = _token_bounds(self._buf, chunk.lo, chunk.hi, self._ws)
        k = (row - chunk.row0) * self.ncols + column
        return _shown(self._buf[starts[k] : ends[k]].tobytes(), self.encoding)


def _shown(token: bytes, encoding: str) -> str:
    text = token[:40].decode(encoding, errors="replace")
    text = "".join(ch if ch.isprintable() else "?" for ch in text)
    return text + ("…" if len(token) > 40 else "")


def _chunk_end(
    buf: np.ndarray, lo: int, end: int, max_line_bytes: int, line0: int, name: str
) -> int:
    """End (exclusive, just after a newline) of the block starting at ``lo``."""
    hi = min(lo + _CHUNK_BYTES, end)
    if hi == end:
        return end
    for tail in (256, _CHUNK_BYTES):  # lines are short: the last newline is near the end
        a = max(lo, hi - tail)
        back = np.flatnonzero(buf[a:hi] == _NL)
        if back.size:
            return a + int(back[-1]) + 1
    # One line longer than a block: find its end, within the line-length guard.
    limit = min(lo + max_line_bytes + 1, end)
    ahead = np.flatnonzero(buf[hi:limit] == _NL)
    if ahead.size == 0 and limit < end:
        raise TraceError(_too_long(max_line_bytes), name=name, line=line0)
    return (hi + int(ahead[0]) + 1) if ahead.size else end


def _check_line_lengths(
    buf: np.ndarray, lo: int, hi: int, limit: int, line0: int, name: str
) -> None:
    nl = np.flatnonzero(buf[lo - 1 : hi] == _NL)  # buf[lo - 1] ends the previous line
    lengths = np.diff(nl) - 1
    long = np.flatnonzero(lengths > limit)
    if long.size:
        raise TraceError(_too_long(limit), name=name, line=line0 + int(long[0]))


def _blank_comments(buf: np.ndarray, lo: int, hi: int) -> None:
    """Turn ``# ...`` up to the end of its line into blanks (in place).

    Only a ``#`` at a line's start or after a blank begins a comment: one
    inside a field (``1.#QNAN``, ``#N/A`` after a comma) is part of it, and
    the field is reported as not a number instead of being cut to ``1.``.
    """
    w = buf[lo:hi]
    hashes = np.flatnonzero(w == ord("#"))
    if hashes.size:
        hashes = hashes[buf[lo - 1 + hashes] <= _SPACE]  # buf[lo - 1] is a newline
    if hashes.size == 0:
        return
    nl = np.flatnonzero(w == _NL)
    stop = nl[np.searchsorted(nl, hashes)]  # the chunk ends with a newline, so one exists
    mark = np.zeros(w.size + 1, dtype=np.int32)
    np.add.at(mark, hashes, 1)
    np.add.at(mark, stop, -1)
    w[np.cumsum(mark[:-1]) > 0] = _SPACE


def _structure_error(
    buf: np.ndarray,
    lo: int,
    hi: int,
    starts: np.ndarray,
    ends: np.ndarray,
    sep: str | None,
    ncols: int,
) -> tuple[int, str, np.ndarray] | None:
    """Exact check of the rows of one block.

    Returns None when every line holds ``ncols`` fields with one separator
    between neighbours, else (relative line index, message, token line index).
    """
    w = buf[lo - 1 : hi]
    cnl = np.cumsum(w == _NL, dtype=np.int64)
    tok_line = cnl[starts - (lo - 1)] - 1  # 0 = the block's first line
    problems: list[tuple[int, str]] = []
    if starts.size:
        change = np.flatnonzero(np.diff(tok_line)) + 1
        firsts = np.concatenate(([0], change))
        counts = np.diff(np.concatenate((firsts, [starts.size])))
        bad = np.flatnonzero(counts != ncols)
        if bad.size:
            i = int(bad[0])
            found = int(counts[i])
            problems.append((int(tok_line[firsts[i]]), f"expected {ncols} values, found {found}"))
        if sep is not None:
            csep = np.cumsum(w == _SEP_BYTES[sep], dtype=np.int64)
            # separators in the gap between neighbouring fields of one line
            between = csep[starts[1:] - lo] - csep[ends[:-1] - lo]
            same_line = tok_line[1:] == tok_line[:-1]
            wrong = np.flatnonzero(same_line & (between != 1))
            if wrong.size:
                k = int(wrong[0])
                what = (
                    "an empty field"
                    if between[k] > 1
                    else f"values not separated by {_SEP_NAMES[sep]}"
                )
                problems.append(
                    (
                        int(tok_line[k]),
                        f"{what} (expected {ncols} values separated by {_SEP_NAMES[sep]})",
                    )
                )
            # a separator before a line's first field is an empty first column
            nlpos = np.flatnonzero(w == _NL)
            line_start = nlpos[tok_line[firsts]] + 1  # index into w just after the newline
            lead = csep[starts[firsts] - lo] - csep[line_start - 1]
            leading = np.flatnonzero(lead > 0)
            if leading.size:
                problems.append((int(tok_line[firsts[leading[0]]]), "the first field is empty"))
    if not problems:
        return None
    line, message = min(problems)
    return line, message, tok_line


def _csv_fields(
    buf: np.ndarray, lo: int, hi: int, sep_byte: int, ncols: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
    """Fields of a strictly regular separated block, found from the delimiters alone.

    Returns (starts, ends, first bytes) when every line of buf[lo:hi] holds
    exactly ``ncols`` non-empty fields split by ``sep_byte``, with no blanks
    around them (an optional CR before the newline); else None, and the
    general tokeniser takes the block.
    """
    w = buf[lo:hi]
    is_delim = w == sep_byte
    is_delim |= w == _NL
    delims = np.flatnonzero(is_delim)
    if delims.size == 0 or delims.size % ncols:
        return None
    kinds = w[delims].reshape(-1, ncols)
    if not (kinds[:, -1] == _NL).all() or not (kinds[:, :-1] == sep_byte).all():
        return None
    ends = delims + lo
    starts = np.empty_like(ends)
    starts[0] = lo
    starts[1:] = ends[:-1] + 1
    ends -= buf[ends - 1] == _CR
    first = buf[starts]
    if not (ends > starts).all() or (first <= _SPACE).any() or (buf[ends - 1] <= _SPACE).any():
        return None
    return starts, ends, first


# --- fixed-width blocks ------------------------------------------------------------
#
# Most exports print every value of a column with one format ("%.3f",
# "%.6e"), so the lines of a block are often all the same length with every
# field at the same place: the block is a (lines, width) byte matrix. Such a
# block is checked with one range test per byte position (digits where line 1
# has a digit; the separator, the decimal mark, the exponent mark and the line
# end where it has those; a digit or a sign at each field's first byte and a
# sign at an exponent's) and each column's digits are combined in one
# matrix-vector product with their powers of ten: with at most 15 digits every
# product and partial sum is an integer below 2**53, so the mantissa is exact
# in any order of summation. The value is then the same single correctly
# rounded operation as in _parse_plain (a division by 10**fraction_digits) or
# _parse_general (mantissa · _MUL / _DIV for an exponent). Any block that
# fails a test goes through the general parse, which finds and names the
# problem.

_MAX_FIXED_DIGITS = 15
# By the value of a field's first byte: may it start a number (a one-digit
# field: must it be that digit), the digit it adds, and the sign it gives;
# and may a byte be an exponent's sign.
_NUMBER_FIRST = np.zeros(256, dtype=bool)
_NUMBER_FIRST[[_PLUS, _MINUS, *range(48, 58)]] = True
_DIGIT_FIRST = np.zeros(256, dtype=bool)
_DIGIT_FIRST[48:58] = True
_FIRST_DIGIT = np.zeros(256)
_FIRST_DIGIT[48:58] = np.arange(10.0)
_FIRST_SIGN = np.ones(256)
_FIRST_SIGN[_MINUS] = -1.0
_SIGN_BYTE = np.zeros(256, dtype=bool)
_SIGN_BYTE[[_PLUS, _MINUS]] = True
_DIGIT_PATTERN = bytes.maketrans(b"0123456789", b"0000000000")
_EXPONENT_MARKS = (69, 101)  # E, e


@dataclass(frozen=True, eq=False)
class _FieldLayout:
    first: int  # the field's first byte, counted from the line's start
    single: bool  # one digit place: the first byte must be a digit
    weights: np.ndarray  # per byte of a line: 10 ** place of each mantissa digit but the first
    lead: float  # 10 ** place of the first byte
    fraction: int  # digits after the decimal mark
    exponent: np.ndarray | None  # per byte: 10 ** place of each exponent digit; None: none
    exponent_sign: int  # the exponent's sign byte, −1 if it has none
    # By the value of the first byte: the digit it adds times `lead`, and
    # ±10 ** fraction (the sign it gives, and the divisor when no exponent).
    first_value: np.ndarray
    first_divisor: np.ndarray
    # `weights` with `lead` at the first byte: for a column of unsigned
    # numbers, whose first byte's place then holds its digit + 5 (see
    # _fixed_width_block).
    unsigned_weights: np.ndarray


@dataclass(frozen=True, eq=False)
class _Layout:
    """Where the fields of a fixed-width block sit (see _fixed_width_block)."""

    width: int  # bytes per line, newline included
    # Per byte of a line: the lowest allowed value and how far above it the
    # allowed values reach, repeated for as many lines as a block can hold
    # (whole-block operations on contiguous bytes, not a broadcast per line).
    low: np.ndarray
    span: np.ndarray
    fields: tuple[_FieldLayout, ...]


def _line_layout(line: bytes, sep: int, ncols: int, comma_decimal: bool) -> _Layout | None:
    """The layout of ``line`` (newline included) if its fields are
    ``[sign] digits [mark digits] [e [sign] 1-3 digits]``, else None."""
    body = line[:-1]
    cr = body.endswith(b"\r")
    if cr:
        body = body[:-1]
    texts = body.split(bytes([sep]))
    if len(texts) != ncols:
        return None
    width = len(line)
    low = np.zeros(width, dtype=np.uint8)
    span = np.zeros(width, dtype=np.uint8)
    low[-1] = _NL
    if cr:
        low[-2] = _CR
    marks = (_DOT, _COMMA) if comma_decimal else (_DOT,)
    fields = []
    at = 0
    for text in texts:  # a loop over the fields of one line
        e_at = [i for i, ch in enumerate(text) if ch in _EXPONENT_MARKS]
        if len(e_at) > 1:
            return None
        number = text[: e_at[0]] if e_at else text
        if not number:
            return None
        mark = [i for i, ch in enumerate(number) if ch in marks]
        places = len(number) - len(mark)
        if len(mark) > 1 or places > _MAX_FIXED_DIGITS or (mark and mark[0] == 0):
            return None
        signed = number[0] in (_PLUS, _MINUS)
        if signed and places == 1:
            return None  # a sign and no digit
        if not (signed or 48 <= number[0] <= 57):
            return None
        if not all(48 <= ch <= 57 for i, ch in enumerate(number) if i and i not in mark):
            return None
        weights = np.zeros(width)
        lead = 1.0
        place = 0
        for i in range(len(number) - 1, -1, -1):  # a loop over the bytes of one field
            if i in mark:
                low[at + i] = number[i]
                continue
            low[at + i], span[at + i] = 48, 9
            if i:
                weights[at + i] = 10.0**place
            else:
                lead = 10.0**place
            place += 1
        low[at], span[at] = _PLUS, 57 - _PLUS  # a digit or a sign; see _fixed_width_block
        fraction = len(number) - 1 - mark[0] if mark else 0
        exponent, exponent_sign = None, -1
        if e_at:
            e = e_at[0]
            power = text[e + 1 :]
            power_signed = power[:1] in (b"+", b"-")
            digits = power[1:] if power_signed else power
            if not (1 <= len(digits) <= 3 and all(48 <= ch <= 57 for ch in digits)):
                return None
            low[at + e] = text[e]
            if power_signed:
                exponent_sign = at + e + 1
                low[exponent_sign], span[exponent_sign] = _PLUS, _MINUS - _PLUS
            exponent = np.zeros(width)
            for place, i in enumerate(range(len(text) - 1, len(text) - 1 - len(digits), -1)):
                low[at + i], span[at + i] = 48, 9
                exponent[at + i] = 10.0**place
        fields.append(
            _FieldLayout(
                first=at,
                single=places == 1,
                weights=weights,
                lead=lead,
                fraction=fraction,
                exponent=exponent,
                exponent_sign=exponent_sign,
                first_value=_FIRST_DIGIT * lead,
                first_divisor=_FIRST_SIGN * (1.0 if e_at else 10.0**fraction),
                unsigned_weights=np.where(np.arange(width) == at, lead, weights),
            )
        )
        at += len(text)
        if at < len(body):
            low[at] = sep
            at += 1
    lines = _CHUNK_BYTES // width + 1
    return _Layout(width, np.tile(low, lines), np.tile(span, lines), tuple(fields))


def _fixed_width_block(
    buf: np.ndarray,
    lo: int,
    hi: int,
    sep: int,
    ncols: int,
    comma_decimal: bool,
    layouts: dict[bytes, _Layout | None],
    out: dict[int, np.ndarray],
    p10_out: dict[int, np.ndarray],
    row0: int,
    general: bool,
) -> tuple[int, bool] | None:
    """Read buf[lo:hi] if it is a fixed-width block of numbers (see above).

    Writes the kept columns' values (and rounding exponents) from row
    ``row0`` on and returns the number of lines and whether later blocks
    take _parse_block's exponent-aware parser; returns None, having written
    nothing, when the block is anything else. ``general`` says whether they
    already do: it decides, as there, whether an exponent field's rounding
    exponent is known (see _parse_block).
    """
    newline = buf[lo : min(hi, lo + 1024)].tobytes().find(b"\n")
    if newline < 2 or (hi - lo) % (newline + 1):
        return None
    line = buf[lo : lo + newline + 1].tobytes()
    key = line.translate(_DIGIT_PATTERN)
    if key not in layouts:
        layouts[key] = _line_layout(line, sep, ncols, comma_decimal)
    layout = layouts[key]
    if layout is None:
        return None
    block = buf[lo:hi]
    if block.size > layout.low.size:
        return None
    shifted = block - layout.low[: block.size]  # uint8: below `low` wraps round to large values
    if not (shifted <= layout.span[: block.size]).all():
        return None
    lines = block.reshape(-1, layout.width)
    shifted = shifted.reshape(lines.shape)
    unsigned = []
    for spec in layout.fields:  # a loop over columns
        # The range test let through 43-57 at a first byte: only digits and
        # the two signs are numbers there (and only digits in a one-digit
        # field); and 43-45 at an exponent's sign.
        first = lines[:, spec.first]
        unsigned.append(bool((first >= 48).all()))  # digits only: the usual case
        if not unsigned[-1] and (spec.single or not _NUMBER_FIRST[first].all()):
            return None
        if spec.exponent_sign >= 0 and not _SIGN_BYTE[lines[:, spec.exponent_sign]].all():
            return None
    n = lines.shape[0]
    places = shifted.astype(np.float64)  # each byte's digit value where a digit stands
    # Powers of ten first: beyond ±22 a block is the general parse's (_redo_hard).
    powers: dict[int, np.ndarray | int] = {}
    for c in {*out, *p10_out}:
        spec = layout.fields[c]
        if spec.exponent is None:
            powers[c] = -spec.fraction
            continue
        exponent = places @ spec.exponent
        if spec.exponent_sign >= 0:
            exponent *= _FIRST_SIGN[lines[:, spec.exponent_sign]]
        exponent -= spec.fraction
        if np.abs(exponent).max() > 22:
            return None
        powers[c] = exponent
    # _parse_block reads a block with the exponent-aware parser once one has
    # needed it: when more than 1 field in 16 fails the plain parse. The
    # plain parse gives other fields with an exponent an unknown rounding.
    with_exponent = sum(spec.exponent is not None for spec in layout.fields)
    general = general or with_exponent * 16 > ncols
    for c, column in out.items():
        spec = layout.fields[c]
        target = column[row0 : row0 + n]
        if unsigned[c]:
            # The first byte's place holds its digit + 5 (its low is '+', 43):
            # the sum stays below 15·lead ≤ 1.5e15 < 2**53, so this is exact.
            np.matmul(places, spec.unsigned_weights, out=target)
            target -= 5.0 * spec.lead
            divisor: np.ndarray | float = spec.first_divisor[_PLUS]  # 10 ** fraction (or 1)
        else:
            first = lines[:, spec.first]
            np.matmul(places, spec.weights, out=target)
            target += spec.first_value[first]
            divisor = spec.first_divisor[first]
        # One correctly rounded operation, as in _parse_plain / _parse_general,
        # and the sign with it (x / −d is exactly −(x / d)).
        if spec.exponent is None:
            target /= divisor
        else:
            at = powers[c].astype(np.intp) + 22
            target *= _MUL[at]
            target /= divisor * _DIV[at]
    for c, column in p10_out.items():
        spec = layout.fields[c]
        if spec.exponent is not None and not general:
            column[row0 : row0 + n] = _P10_UNKNOWN
        else:
            column[row0 : row0 + n] = powers[c]
    return n, general


def _parse_block(
    buf: np.ndarray,
    size: int,
    head: _Head,
    name: str,
    max_line_bytes: int,
    keep: tuple[int, ...],
    p10_for: tuple[int, ...] = (),
) -> _Table:
    """Tokenise and convert everything from the first data line to the end of the file.

    Every field is checked; only the columns in ``keep`` are stored, with the
    rounding exponents of those in ``p10_for``.
    """
    sep, ncols = head.sep, head.ncols
    comma_decimal = sep != ","
    ws: tuple[int, ...] = ()
    if sep in (";", ","):
        ws += (_SEP_BYTES[sep],)
    if head.quoted:
        ws += (_QUOTE,)
    strict_sep = _SEP_BYTES[sep] if sep is not None and not head.quoted else None
    end = _PAD_FRONT + size + 1  # include one padding newline: the last line is terminated
    view4, view16, view64 = _view(buf, 4), _view(buf, 16), _view(buf, 64)
    chunks: list[_Chunk] = []
    lo, line0, rows = head.data_offset, head.data_line, 0
    # Rows are at most the data's line count: size the output once, fill it in place.
    capacity = _count_byte(buf, lo, end, _NL) + 1
    columns = {c: np.empty(capacity, dtype=np.float64) for c in keep}
    p10s = {c: np.empty(capacity, dtype=np.int16) for c in p10_for}
    want_p10 = bool(p10_for)
    general = False  # becomes True once a block needs the exponent-aware parser
    layouts: dict[bytes, _Layout | None] = {}
    while lo < end:
        hi = _chunk_end(buf, lo, end, max_line_bytes, line0, name)
        if max_line_bytes < _CHUNK_BYTES:  # a limit below the block size: check each line
            _check_line_lengths(buf, lo, hi, max_line_bytes, line0, name)
        if strict_sep is not None:
            fixed = _fixed_width_block(
                buf, lo, hi, strict_sep, ncols, comma_decimal, layouts, columns, p10s, rows, general
            )
            if fixed is not None:
                n_fixed, general = fixed
                chunks.append(_Chunk(lo, hi, line0, rows))
                rows += n_fixed
                line0 += n_fixed
                lo = hi
                continue
        if (buf[lo:hi] == ord("#")).any():
            _blank_comments(buf, lo, hi)
        n_lines = int(np.count_nonzero(buf[lo:hi] == _NL))
        problem = None
        found = _csv_fields(buf, lo, hi, strict_sep, ncols) if strict_sep is not None else None
        if found is None:
            starts, ends = _token_bounds(buf, lo, hi, ws)
            if not _rows_look_right(buf, starts, ends, sep, ncols):
                problem = _structure_error(buf, lo, hi, starts, ends, sep, ncols)
        else:
            starts, ends, _ = found
        if general:
            values, p10, ok = _parse_general(
                buf, view16, view4, starts, ends, lo, hi, comma_decimal
            )
        else:
            values, p10, ok = _parse_plain(buf, view16, starts, ends, comma_decimal, want_p10)
            if np.count_nonzero(~ok) * 16 > starts.size:  # exponents, most likely
                general = True
                values, p10, ok = _parse_general(
                    buf, view16, view4, starts, ends, lo, hi, comma_decimal
                )
        bad_token = None
        if not ok.all():
            if p10 is None:
                p10 = np.zeros(starts.size, dtype=np.int16)
            odd = np.flatnonzero(~ok)
            long_values, long_ok = _parse_long(buf, view64, starts[odd], ends[odd], comma_decimal)
            values[odd[long_ok]] = long_values[long_ok]
            p10[odd[long_ok]] = _P10_UNKNOWN
            for k in odd[~long_ok]:  # only fields no vector path could read
                token = buf[starts[k] : ends[k]].tobytes()
                got = _slow_number(token, comma_decimal)
                if got is None:
                    bad_token = int(k)
                    break
                values[k], p10[k] = got
        if problem is not None or bad_token is not None:
            _raise_first(
                buf, lo, hi, line0, starts, ends, sep, ncols, problem, bad_token, head, name
            )
        chunks.append(_Chunk(lo, hi, line0, rows))
        n_rows = starts.size // ncols
        for c, column in columns.items():  # a handful of columns
            column[rows : rows + n_rows] = values[c::ncols]
        for c, column in p10s.items():
            column[rows : rows + n_rows] = p10[c::ncols]
        rows += n_rows
        line0 += n_lines
        lo = hi
    for array in (*columns.values(), *p10s.values()):
        array.resize(rows, refcheck=False)  # shrinks in place
    return _Table(
        name=name,
        encoding=head.encoding,
        metadata=head.metadata,
        header=head.header,
        header_line=head.header_line,
        data_line=head.data_line,
        ncols=ncols,
        rows=rows,
        columns=columns,
        p10=p10s,
        _buf=buf,
        _chunks=chunks,
        _ws=ws,
    )


def _count_byte(buf: np.ndarray, lo: int, hi: int, byte: int) -> int:
    step = 1 << 22  # slabs keep the comparison's temporary small
    return sum(
        int(np.count_nonzero(buf[a : min(a + step, hi)] == byte)) for a in range(lo, hi, step)
    )


def _rows_look_right(
    buf: np.ndarray, starts: np.ndarray, ends: np.ndarray, sep: str | None, ncols: int
) -> bool:
    """Cheap check that fields come ``ncols`` to a line, from the bytes around each field.

    Exact when every gap between fields is one or two bytes (",", "\\n",
    "\\r\\n", ", "); anything else is left to _structure_error.
    """
    k = starts.size
    if k == 0:
        return True
    if k % ncols:
        return False
    after = buf[ends]  # the byte right after each field
    before = buf[starts - 1]  # the byte right before each field
    gap = starts[1:] - ends[:-1]
    if gap.size and int(gap.max()) > 2:
        return False
    newline = np.empty(k, dtype=bool)
    newline[:-1] = (after[:-1] == _NL) | (before[1:] == _NL)
    newline[-1] = True
    grid = newline.reshape(-1, ncols)
    if grid[:, :-1].any() or not grid[:, -1].all():
        return False
    if sep is None:
        return True
    sb = _SEP_BYTES[sep]
    n_sep = np.zeros(k, dtype=np.int8)
    n_sep[:-1] = (after[:-1] == sb).astype(np.int8) + ((before[1:] == sb) & (gap > 1))
    if not (n_sep.reshape(-1, ncols)[:, :-1] == 1).all():
        return False
    # the first field of a line must not follow a separator (an empty first column)
    return not (before.reshape(-1, ncols)[:, 0] == sb).any()


def _raise_first(
    buf: np.ndarray,
    lo: int,
    hi: int,
    line0: int,
    starts: np.ndarray,
    ends: np.ndarray,
    sep: str | None,
    ncols: int,
    problem: tuple[int, str, np.ndarray] | None,
    bad_token: int | None,
    head: _Head,
    name: str,
) -> None:
    """Raise the error of the earliest offending line in this block."""
    if problem is None:
        w = buf[lo - 1 : hi]
        tok_line = np.cumsum(w == _NL, dtype=np.int64)[starts - (lo - 1)] - 1
    else:
        tok_line = problem[2]
    candidates: list[tuple[int, str]] = []
    if problem is not None:
        candidates.append((problem[0], problem[1]))
    if bad_token is not None:
        line = int(tok_line[bad_token])
        first_on_line = int(np.searchsorted(tok_line, line))
        column = bad_token - first_on_line
        token = _shown(buf[starts[bad_token] : ends[bad_token]].tobytes(), head.encoding)
        if column < ncols and head.header and column < len(head.header) and head.header[column]:
            where = f"column {_label_text(head.header[column])}"
        else:
            where = f"column {column + 1}"
        what = f"'{token}' is not a number in {where}"
        if len(ends) and ends[bad_token] - starts[bad_token] > _MAX_TOKEN:
            what = f"a field of {ends[bad_token] - starts[bad_token]} characters is not a number in {where}"
        candidates.append((line, what))
    line, message = min(candidates)
    raise TraceError(message, name=name, line=line0 + line)


# -------------------------------------------------------------- from table to trace


def _row_line(table: _Table, row: int) -> int:
    return int(table.lines_of_rows(np.array([row]))[0])


def _order_x(
    table: _Table, x: np.ndarray, what: str, quantity: Callable[[float], str]
) -> tuple[np.ndarray | None, list[str]]:
    """The permutation that sorts ``x`` (None if already increasing); duplicates raise."""
    if x.size < 2 or bool(np.all(x[1:] > x[:-1])):
        return None, []
    order = np.argsort(x, kind="stable")
    xs = x[order]
    same = np.flatnonzero(xs[1:] == xs[:-1])
    if same.size:
        later = order[same + 1]
        row = int(later.min())
        k = int(same[np.argmin(later)])
        # the first row of that run of equal values is the original occurrence
        original = int(order[: k + 1][xs[: k + 1] == xs[k]].min())
        line, first_line = table.lines_of_rows(np.array([row, original]))
        raise TraceError(
            f"{what} {quantity(float(x[row]))} repeats line {first_line} ({what} values must not repeat)",
            name=table.name,
            line=int(line),
        )
    first_drop = int(np.flatnonzero(x[1:] <= x[:-1])[0]) + 1
    line = _row_line(table, first_drop)
    return order, [f"{what} values were not increasing (first at line {line}); sorted"]


def _fmt_hz(value: float) -> str:
    for unit, scale in (("GHz", 1e9), ("MHz", 1e6), ("kHz", 1e3)):
        if abs(value) >= scale:
            return f"{value / scale:.9g} {unit}"
    return f"{value:.9g} Hz"


def _fmt_s(value: float) -> str:
    return f"{value:.6g} s"


def _finite(table: _Table, columns: tuple[int, ...]) -> None:
    """Raise for the first NaN or infinity in the given columns (others may hold anything)."""
    bad_rows = [np.flatnonzero(~np.isfinite(table.columns[c])) for c in columns]
    if not any(b.size for b in bad_rows):
        return
    row, col = min((int(b[0]), c) for b, c in zip(bad_rows, columns, strict=True) if b.size)
    text = table.row_text(row, col)
    raise TraceError(
        f"'{text}' is not a finite number in column {table.column_label(col)}",
        name=table.name,
        line=_row_line(table, row),
    )


def _rbw_hz(metadata: dict[str, str]) -> float | None:
    for key, value in metadata.items():
        k = re.sub(r"[^a-z]", "", key.lower())
        if k in ("rbw", "resbw", "resolutionbandwidth", "resolutionbw", "ifbw"):
            m = re.fullmatch(
                r"\s*([0-9]+(?:[.,][0-9]*)?(?:[eE][+-]?[0-9]+)?)\s*([a-zA-Z]*)\s*", value
            )
            if not m:
                return None
            number = float(m.group(1).replace(",", "."))
            scale = FREQUENCY_UNITS.get(m.group(2).lower() or "hz")
            return number * scale if scale and number > 0 else None
    return None


def _pick_columns(
    columns: list[_Column], ncols: int, name: str, line: int | None = None
) -> tuple[int, int]:
    """(x column, y column): see the module docstring for the rule."""
    xs = [i for i, c in enumerate(columns) if c.kind in ("frequency", "time")]
    x = xs[0] if xs else 0
    rest = [i for i in range(ncols) if i != x]
    kinds = [columns[i].kind if i < len(columns) else "other" for i in rest]
    for wanted in (("level", "voltage"), ("other",)):
        for i, kind in zip(rest, kinds, strict=True):
            if kind in wanted:
                return x, i
    raise TraceError(
        "no level or voltage column besides limit/margin columns", name=name, line=line
    )


_BRACKETED = re.compile(r"[(\[]\s*([^()\[\]]+?)\s*[)\]]\s*$")


def _bracketed(column: _Column) -> str | None:
    """What a header writes in brackets where a unit goes, when it is no unit we know."""
    if column.unit is not None:
        return None
    m = _BRACKETED.search(column.label)
    return _shown(m.group(1).encode("utf-8"), "utf-8") if m else None


def _column(head: _Head, index: int) -> _Column:
    if head.header and index < len(head.header):
        return _describe(head.header[index])
    return _Column(str(index + 1), "other", None)


def _axis_scale(
    column: _Column,
    keyword_scale: float | None,
    table_units: dict[str, float],
    keyword: str,
    choices: str,
    default: float | None,
    warnings: list[str],
    head: _Head,
    name: str,
) -> float:
    """Multiplier to SI for one column: the keyword, else the header's unit, else ``default``."""
    header_scale = _lookup(table_units, column.unit)
    if column.unit is not None and header_scale is None and column.kind != "other":
        raise TraceError(
            f"column {column.label} is in {column.unit}, expected {choices}",
            name=name,
            line=head.header_line,
        )
    if keyword_scale is not None:
        if header_scale is not None and header_scale != keyword_scale:
            warnings.append(f"{keyword} overrides the header's unit of column {column.label}")
        return keyword_scale
    if header_scale is not None:
        return header_scale
    if default is None or head.header is None:
        written = _bracketed(column)
        raise TraceError(
            f"column {column.label}: unknown unit '{written}', expected {choices} (or pass {keyword}=)"
            if written
            else f"column {column.label} states no unit: pass {keyword}= ({choices})",
            name=name,
            line=head.header_line,
        )
    assumed = "seconds" if keyword == "time_unit" else "volts"
    warnings.append(f"column {column.label} states no unit; assumed {assumed}")
    return default


def _level_unit(
    column: _Column,
    keyword: tuple[str, float] | None,
    keyword_text: str | None,
    warnings: list[str],
    name: str,
    line: int | None = None,
) -> tuple[str, float, float | None]:
    """(canonical unit, dB offset, linear volts scale or None) of the level column."""
    header = units.parse_level_unit(column.unit) if column.unit else None
    linear = _lookup(VOLTAGE_UNITS, column.unit)
    if keyword is not None:
        if header is not None and header != keyword:
            warnings.append(
                f"level_unit={keyword_text!r} overrides the header's unit of column {column.label}"
            )
        return keyword[0], keyword[1], None
    if header is not None:
        if header[1]:
            warnings.append(f"levels converted from {column.unit} to dBµV")
        return header[0], header[1], None
    if linear is not None:
        warnings.append(f"linear levels in {column.unit} converted to dBµV")
        return "dBuV", 0.0, linear
    if column.unit is not None:
        raise TraceError(
            f"column {column.label} is in {column.unit}, not a level unit "
            "(expected dBuV, dBm, dBuV/m, dBuA or dBpT)",
            name=name,
            line=line,
        )
    written = _bracketed(column)
    raise TraceError(
        f"column {column.label}: unknown level unit '{written}', expected dBuV, dBm, dBuV/m, dBuA, "
        "dBpT or V, mV, µV (or pass level_unit=)"
        if written
        else f"column {column.label} states no level unit: pass level_unit= (dBuV, dBm, dBuV/m, dBuA or dBpT)",
        name=name,
        line=line,
    )


def _enough(n: int, name: str, minimum: int = MIN_POINTS) -> None:
    if n < minimum:
        points = "data point" if n == 1 else "data points"
        raise TraceError(f"only {n} {points}; at least {minimum} are needed", name=name)


def _uniform(
    table: _Table, time: np.ndarray, p10: np.ndarray, scale: float, rows: np.ndarray | None
) -> None:
    """Raise unless every time step is within TIME_JITTER of the typical step.

    The typical step is the median of (a sample of) the steps. The printed
    values' own rounding — half a unit of the last printed digit at each end,
    from ``p10`` in file units times ``scale`` — is allowed on top, so a record
    written with few digits is not rejected for the digits it lacks.
    """
    steps = np.diff(time)
    nominal = float(np.median(steps[:: max(1, steps.size // 65536)]))
    base = TIME_JITTER * nominal + 4 * np.finfo(np.float64).eps * max(abs(time[0]), abs(time[-1]))
    steps -= nominal
    np.abs(steps, out=steps)
    suspects = np.flatnonzero(steps > base)
    if suspects.size == 0:
        return
    here = suspects if rows is None else rows[suspects]
    there = suspects + 1 if rows is None else rows[suspects + 1]
    rounding = 0.5 * scale * (np.power(10.0, p10[here]) + np.power(10.0, p10[there]))
    off = suspects[steps[suspects] > base + rounding]
    if off.size == 0:
        return
    k = int(off[0]) + 1
    step = float(time[k] - time[k - 1])
    raise TraceError(
        f"time step {_fmt_s(step)} differs from the record's step {_fmt_s(nominal)} "
        f"by more than {TIME_JITTER:.1%} (samples must be uniformly spaced)",
        name=table.name,
        line=_row_line(table, int(rows[k]) if rows is not None else k),
    )


_DOMAIN_WORDS = {SPECTRUM: "spectrum", TIME: "time record"}


def _choose_domain(
    domain: str | None,
    xcol: _Column,
    ycol: _Column,
    spectrum_keywords: bool,
    time_keywords: bool,
    name: str,
) -> str:
    header_domain = {"frequency": SPECTRUM, "time": TIME}.get(xcol.kind)
    if header_domain is None:
        if ycol.kind == "level":
            header_domain = SPECTRUM
        elif ycol.kind == "voltage" and ycol.unit is not None:
            header_domain = TIME
    if spectrum_keywords and time_keywords:
        raise TraceError(
            "give either frequency/level units or time/voltage units, not both", name=name
        )
    keyword_domain = SPECTRUM if spectrum_keywords else TIME if time_keywords else None
    said = {"domain=": domain, "the header": header_domain, "the unit keywords": keyword_domain}
    claims = {who: what for who, what in said.items() if what is not None}
    if len(set(claims.values())) > 1:
        raise TraceError(
            " but ".join(f"{who} says {_DOMAIN_WORDS[w]}" for who, w in claims.items()), name=name
        )
    if not claims:
        raise TraceError(
            "no header says what the columns are: pass domain='spectrum' with frequency_unit= "
            "and level_unit=, or domain='time' with time_unit= and voltage_unit=",
            name=name,
        )
    return next(iter(claims.values()))


def _guarded(
    read: Callable[..., object], source: object, name: str | None, **kwargs: object
) -> object:
    """Call a reader; an unforeseen failure still reaches the user as one TraceError line."""
    try:
        return read(source, name=name, **kwargs)
    except TraceError:
        raise
    except MemoryError as exc:
        raise TraceError(
            "not enough memory to read this file", name=name or _default_name(source)
        ) from exc
    except (ValueError, IndexError, TypeError, OverflowError, UnicodeError) as exc:
        raise TraceError(
            f"internal reader error ({type(exc).__name__}); please report this file",
            name=name or _default_name(source),
        ) from exc


def read_trace(
    source: str | os.PathLike | bytes | BinaryIO,
    *,
    name: str | None = None,
    domain: str | None = None,
    frequency_unit: str | None = None,
    level_unit: str | None = None,
    time_unit: str | None = None,
    voltage_unit: str | None = None,
    max_bytes: int = DEFAULT_MAX_BYTES,
    max_line_bytes: int = DEFAULT_MAX_LINE_BYTES,
) -> Trace:
    """Read a spectrum or a time record from a text export.

    ``source`` is a path, the file's bytes or a binary file object; ``name``
    (default: the file's base name) starts every message. ``domain``
    ("spectrum" or "time") is needed only when the header does not say; the
    unit keywords supply units a file lacks and override those it states.
    ``max_bytes`` refuses larger inputs; ``max_line_bytes`` refuses longer
    lines (e.g. a binary file without line breaks).

    Returns a Trace whose data is a Spectrum (frequency in Hz, level in one of
    LEVEL_UNITS) or a TimeRecord (seconds, volts), with the preamble's
    key/value pairs as metadata and one-line warnings for anything the reader
    fixed or assumed. Raises TraceError — and nothing else — for any input it
    cannot read, naming the file and line. See the module docstring for the
    format rules.
    """
    return _guarded(
        _read_trace,
        source,
        name,
        domain=domain,
        frequency_unit=frequency_unit,
        level_unit=level_unit,
        time_unit=time_unit,
        voltage_unit=voltage_unit,
        max_bytes=max_bytes,
        max_line_bytes=max_line_bytes,
    )  # type: ignore[return-value]


def _read_trace(
    source: object,
    *,
    name: str | None,
    domain: str | None,
    frequency_unit: str | None,
    level_unit: str | None,
    time_unit: str | None,
    voltage_unit: str | None,
    max_bytes: int,
    max_line_bytes: int,
) -> Trace:
    label = name or _default_name(source)
    if domain not in (None, SPECTRUM, TIME):
        raise TraceError(f"unknown domain {domain!r}; expected 'spectrum' or 'time'", name=label)
    f_scale = _keyword_unit(FREQUENCY_UNITS, frequency_unit, "frequency_unit", "Hz, kHz, MHz, GHz")
    t_scale = _keyword_unit(TIME_UNITS, time_unit, "time_unit", "s, ms, us, ns")
    v_scale = _keyword_unit(VOLTAGE_UNITS, voltage_unit, "voltage_unit", "V, mV")
    level_kw = None
    if level_unit is not None:
        level_kw = units.parse_level_unit(level_unit)
        if level_kw is None:
            raise TraceError(
                f"unknown level_unit {level_unit!r}; expected dBuV, dBm, dBuV/m, dBuA or dBpT",
                name=label,
            )
    buf, size = _load(source, label, max_bytes, max_line_bytes)
    head = _scan_head(buf, size, label, max_line_bytes)

    # Decide what the columns are before reading them: only two are kept.
    described = [_describe(f) for f in head.header] if head.header else []
    x, y = _pick_columns(described, head.ncols, label, head.header_line)
    xcol, ycol = _column(head, x), _column(head, y)
    chosen = _choose_domain(
        domain,
        xcol,
        ycol,
        f_scale is not None or level_kw is not None,
        t_scale is not None or v_scale is not None,
        label,
    )
    warnings: list[str] = []
    if head.ncols > 2:
        ignored = [_column(head, i).label for i in range(head.ncols) if i not in (x, y)][:6]
        if head.ncols - 2 > 5:  # a file of thousands of columns gets one short line too
            ignored[5:] = [f"and {head.ncols - 7} more"]
        warnings.append(f"used columns {xcol.label} and {ycol.label}; ignored {', '.join(ignored)}")
    if chosen == SPECTRUM:
        scale = _axis_scale(
            xcol,
            f_scale,
            FREQUENCY_UNITS,
            "frequency_unit",
            "Hz, kHz, MHz or GHz",
            None,
            warnings,
            head,
            label,
        )
        unit, offset, linear = _level_unit(
            ycol, level_kw, level_unit, warnings, label, head.header_line
        )
        table = _parse_block(buf, size, head, label, max_line_bytes, keep=(x, y))
        data: Spectrum | TimeRecord = _spectrum(
            table, x, y, scale, unit, offset, linear, ycol, warnings
        )
    else:
        if ycol.kind == "level":
            raise TraceError(
                f"column {ycol.label} holds levels in dB, not voltage samples of a time record",
                name=label,
                line=head.header_line,
            )
        scale = _axis_scale(
            xcol, t_scale, TIME_UNITS, "time_unit", "s, ms, us or ns", 1.0, warnings, head, label
        )
        vscale = _axis_scale(
            ycol, v_scale, VOLTAGE_UNITS, "voltage_unit", "V or mV", 1.0, warnings, head, label
        )
        table = _parse_block(buf, size, head, label, max_line_bytes, keep=(x, y), p10_for=(x,))
        data = _time_record(table, x, y, scale, vscale, warnings)
    return Trace(
        name=label,
        data=data,
        metadata=MappingProxyType(dict(table.metadata)),
        warnings=tuple(warnings),
    )


def _scaled(values: np.ndarray, scale: float) -> np.ndarray:
    # the table's arrays are ours: scale in place rather than allocate again
    return values if scale == 1.0 else np.multiply(values, scale, out=values)


def _spectrum(
    table: _Table,
    x: int,
    y: int,
    scale: float,
    unit: str,
    offset: float,
    linear: float | None,
    ycol: _Column,
    warnings: list[str],
) -> Spectrum:
    _finite(table, (x, y))
    frequency = _scaled(table.columns[x], scale)
    level = table.columns[y]
    order, notes = _order_x(table, frequency, "frequency", _fmt_hz)
    warnings += notes
    rows = None  # row of each point in file order, when no longer the identity
    if order is not None:
        frequency, level, rows = frequency[order], level[order], order
    if frequency.size and frequency[0] <= 0:
        first_row = int(rows[0]) if rows is not None else 0
        if frequency[0] < 0:
            negative = np.flatnonzero(table.columns[x] < 0)
            raise TraceError(
                f"frequency {_fmt_hz(float(frequency[0]))} is negative (frequencies must be positive)",
                name=table.name,
                line=_row_line(table, int(negative[0])),
            )
        warnings.append(f"dropped the 0 Hz (DC) point at line {_row_line(table, first_row)}")
        frequency, level = frequency[1:], level[1:]
        rows = rows[1:] if rows is not None else np.arange(1, frequency.size + 1)
    _enough(frequency.size, table.name)
    if linear is not None:
        level = level * linear
        if not np.all(level > 0):
            k = int(np.flatnonzero(~(level > 0))[0])
            row = int(rows[k]) if rows is not None else k
            raise TraceError(
                f"a level of {table.row_text(row, y)} {ycol.unit} cannot be expressed in dB "
                "(a linear level must be positive)",
                name=table.name,
                line=_row_line(table, row),
            )
        level = units.volts_to_dbuv(level)
    elif offset:
        level = level + offset
    return Spectrum(frequency_hz=frequency, level=level, unit=unit, rbw_hz=_rbw_hz(table.metadata))


def _time_record(
    table: _Table, x: int, y: int, scale: float, vscale: float, warnings: list[str]
) -> TimeRecord:
    _finite(table, (x, y))
    time = _scaled(table.columns[x], scale)
    volts = _scaled(table.columns[y], vscale)
    order, notes = _order_x(table, time, "time", _fmt_s)
    warnings += notes
    if order is not None:
        time, volts = time[order], volts[order]
    _enough(time.size, table.name)
    _uniform(table, time, table.p10[x], scale, order)
    return TimeRecord(time_s=time, volts=volts)


@dataclass(frozen=True, eq=False)
class FrequencyTable:
    """A frequency column and one value column, as read_frequency_table returns them."""

    name: str
    frequency_hz: np.ndarray  # strictly increasing, positive
    value: np.ndarray
    value_label: str
    metadata: MappingProxyType
    warnings: tuple[str, ...]


def read_frequency_table(
    source: str | os.PathLike | bytes | BinaryIO,
    *,
    name: str | None = None,
    frequency_unit: str | None = None,
    min_points: int = 2,
    max_bytes: int = DEFAULT_MAX_BYTES,
    max_line_bytes: int = DEFAULT_MAX_LINE_BYTES,
) -> FrequencyTable:
    """Read a frequency column and a value column (e.g. a correction table in dB).

    Same format rules and messages as read_trace: the frequency column is the
    first one named or unit-marked as frequency (else column 1), the value
    column the first other one that is not a limit column. The frequency unit
    comes from ``frequency_unit``, else the header, else — for a file without a
    header — Hz (with a warning). The value column's unit is not interpreted.
    Rows may come in any order (they are sorted, with a warning); frequencies
    must be distinct and positive.
    """
    return _guarded(
        _read_frequency_table,
        source,
        name,
        frequency_unit=frequency_unit,
        min_points=min_points,
        max_bytes=max_bytes,
        max_line_bytes=max_line_bytes,
    )  # type: ignore[return-value]


def _read_frequency_table(
    source: object,
    *,
    name: str | None,
    frequency_unit: str | None,
    min_points: int,
    max_bytes: int,
    max_line_bytes: int,
) -> FrequencyTable:
    label = name or _default_name(source)
    f_scale = _keyword_unit(FREQUENCY_UNITS, frequency_unit, "frequency_unit", "Hz, kHz, MHz, GHz")
    buf, size = _load(source, label, max_bytes, max_line_bytes)
    head = _scan_head(buf, size, label, max_line_bytes)
    described = [_describe(f) for f in head.header] if head.header else []
    x, y = _pick_columns(described, head.ncols, label)
    xcol, ycol = _column(head, x), _column(head, y)
    warnings: list[str] = []
    if head.header is None and f_scale is None:
        f_scale = 1.0
        warnings.append("no header: frequencies taken as Hz")
    scale = _axis_scale(
        xcol,
        f_scale,
        FREQUENCY_UNITS,
        "frequency_unit",
        "Hz, kHz, MHz or GHz",
        None,
        warnings,
        head,
        label,
    )
    table = _parse_block(buf, size, head, label, max_line_bytes, keep=(x, y))
    _finite(table, (x, y))
    frequency = _scaled(table.columns[x], scale)
    value = table.columns[y]
    order, notes = _order_x(table, frequency, "frequency", _fmt_hz)
    warnings += notes
    if order is not None:
        frequency, value = frequency[order], value[order]
    if frequency.size and frequency[0] <= 0:
        bad = int(np.flatnonzero(table.columns[x] <= 0)[0])
        raise TraceError(
            f"frequency {_fmt_hz(float(frequency[0]))} is not positive (a correction table "
            "is interpolated in log frequency)",
            name=label,
            line=_row_line(table, bad),
        )
    _enough(frequency.size, label, min_points)
    return FrequencyTable(
        name=label,
        frequency_hz=frequency,
        value=value,
        value_label=ycol.label,
        metadata=MappingProxyType(dict(table.metadata)),
        warnings=tuple(warnings),
    )


__all__ = [
    "DEFAULT_MAX_BYTES",
    "DEFAULT_MAX_LINE_BYTES",
    "MIN_POINTS",
    "FrequencyTable",
    "read_frequency_table",
    "read_trace",
]
