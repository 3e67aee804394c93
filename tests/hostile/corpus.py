"""Broken and hostile trace files, built in memory (nothing large on disk).

``CORPUS`` holds files the engine must refuse: each with the fragments its one
message must contain and the line it must name (None where the file as a
whole is at fault: empty, binary, no units). ``ACCEPTED`` holds awkward files
that are nonetheless valid and must read, with the warning they must carry.

Every case is small (a few kB at most); the zip bomb is a 10 MB file of zeros
deflated to about 10 kB, which the reader refuses by its signature without
inflating anything.
"""

from __future__ import annotations

import gzip
import io
import random
import zipfile
from dataclasses import dataclass, field

HEADER = "Frequency (MHz),Level (dBuV)"
N = 40  # data rows in a normal file: above the reader's 16-point minimum

# Text that must never reach a page unescaped (OWASP XSS filter evasion basics).
SCRIPT = "<script>alert(1)</script>"
IMG = '"><img src=x onerror=alert(1)>'
# Cells a spreadsheet would run as formulas (OWASP "CSV injection").
FORMULAS = (
    "=cmd|' /C calc'!A0",
    "+1+cmd|' /C calc'!A0",
    "-2+3+cmd|' /C calc'!A0",
    "@SUM(1+1)*cmd|' /C calc'!A0",
    "\t=1+1",
    "\r=1+1",
)


@dataclass(frozen=True)
class Hostile:
    name: str  # the file name; the message must start with it
    content: bytes
    expect: tuple[str, ...]  # fragments the message must contain (case-sensitive)
    line: int | None  # the line the message must name, None if the file as a whole
    kwargs: dict = field(default_factory=dict)
    domain: str = "spectrum"  # what the upload declares, for the app-level tests

    @property
    def prefix(self) -> str:
        return f"{self.name} line {self.line}: " if self.line is not None else f"{self.name}: "


@dataclass(frozen=True)
class Awkward:
    name: str
    content: bytes
    warning: str | None  # a fragment one warning must contain, None for no warning at all
    points: int


def rows(n: int = N, start: float = 30.0) -> list[str]:
    return [f"{start + i:.1f},{20 + i % 5}" for i in range(n)]


def text(lines: list[str], newline: str = "\n") -> bytes:
    return (newline.join(lines) + newline).encode("utf-8")


def good(n: int = N) -> bytes:
    """A valid 40-point spectrum: 30-69 MHz, levels 20-24 dBµV."""
    return text([HEADER, *rows(n)])


def with_line(number: int, line: str, header: str = HEADER) -> bytes:
    """A good file whose 1-based line ``number`` is replaced by ``line``."""
    lines = [header, *rows()]
    lines[number - 1] = line
    return text(lines)


def _zip_bomb() -> bytes:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as z:
        z.writestr("scan.csv", b"0" * (10 << 20))
    return buf.getvalue()


def _time(times: list[float], unit: str = "us") -> bytes:
    return text(
        [f"Time ({unit}),Voltage (V)", *(f"{t:g},{(i % 7) / 10:g}" for i, t in enumerate(times))]
    )


NOT_A_NUMBER = "is not a number in column"
NOT_FINITE = "is not a finite number in column Level (dBuV)"
NOT_TEXT = "not a text trace"
NO_DATA = "no numeric data found"


def _build() -> list[Hostile]:
    c: list[Hostile] = []

    def add(name, content, expect, line=None, **kw):
        c.append(
            Hostile(
                name, content, tuple([expect] if isinstance(expect, str) else expect), line, **kw
            )
        )

    # --- nothing to read
    add("empty.csv", b"", "the file is empty")
    add("blank-lines.csv", b"\n  \r\n\t\n", "the file is empty")
    add("header-only.csv", text([HEADER]), NO_DATA)
    add("preamble-only.csv", text(["Instrument,Bench receiver", "RBW: 120 kHz", HEADER]), NO_DATA)
    # --- not text at all
    # random bytes without a NUL: refused for their control bytes
    add(
        "noise.csv",
        bytes(b % 255 + 1 for b in random.Random(8).randbytes(3000)),
        (NOT_TEXT, "binary data"),
    )
    add(
        "image.csv",
        b"\x89PNG\r\n\x1a\n" + b"\x00\x00\x00\rIHDR" + random.Random(1).randbytes(200),
        (NOT_TEXT, "PNG image"),
    )
    add(
        "jpeg.csv",
        b"\xff\xd8\xff\xe0\x00\x10JFIF\x00" + random.Random(2).randbytes(200),
        (NOT_TEXT, "JPEG image"),
    )
    add("bomb.csv", _zip_bomb(), (NOT_TEXT, "zip archive"))
    add("packed.csv", gzip.compress(good()), (NOT_TEXT, "gzip"))
    add("utf16-bom.csv", good().decode().encode("utf-16"), (NOT_TEXT, "UTF-16"))
    add("utf16le.csv", good().decode().encode("utf-16-le"), (NOT_TEXT, "UTF-16"))
    add("utf16be.csv", good().decode().encode("utf-16-be"), (NOT_TEXT, "UTF-16"))
    add("nul.csv", with_line(10, "38.0,2\x000"), (NOT_TEXT, "binary data (a NUL byte)"), 10)
    # --- the shape of the table
    add("ragged-long.csv", with_line(11, "39.0,20,7"), "expected 2 values, found 3", 11)
    add("ragged-short.csv", with_line(11, "39.0"), "expected 2 values, found 1", 11)
    add("ragged-first.csv", text([HEADER, "1,2,3", *rows()]), "expected 2 values, found 3", 2)
    add(
        "empty-field.csv",
        text(["Frequency (MHz);Level (dBuV)", *(f"{30 + i};20" for i in range(N - 1)), "70;;20"]),
        ("an empty field", "expected 2 values separated by a semicolon"),
        N + 1,
    )
    add("leading-separator.csv", with_line(12, ",40,20"), "the first field is empty", 12)
    add("unbalanced-quote.csv", with_line(12, '"40.0,20'), ("'\"40.0'", NOT_A_NUMBER), 12)
    add(
        "trailing-garbage.csv",
        text([HEADER, *rows(), "END OF TRACE"]),
        ("'END'", NOT_A_NUMBER),
        N + 2,
    )
    add(
        "trailing-total.csv",
        text([HEADER, *rows(), "Total: 40"]),
        ("'Total:'", NOT_A_NUMBER),
        N + 2,
    )
    add(
        "lone-cr.csv",
        text([HEADER, *rows(20)]) + b"50.0,1\r51.0,2\r" + text(rows(20, 60)),
        "expected 2 values, found 6",
        22,
    )
    add("hex.csv", with_line(8, "0x1F,20"), ("'0x1F'", NOT_A_NUMBER), 8)
    add(
        "long-field.csv",
        with_line(8, "1" * 100 + ",20"),
        "a field of 100 characters is not a number",
        8,
    )
    add(
        "decimal-comma.csv",
        text([HEADER, *(f"{30 + i},5,20,{i % 5}" for i in range(N))]),
        ("the header names 2 columns but this line has 4 values", "decimal comma"),
        2,
    )
    add(
        "thousands-comma.csv",
        text(["Frequency (Hz),Level (dBuV)", *(f'"1,{100 + i:03d},000",20.5' for i in range(N))]),
        "the header names 2 columns but this line has 4 values",
        2,
    )
    add(
        "thousands-dot.csv",
        text(["Frequency (Hz);Level (dBuV)", *(f"1.{100 + i:03d}.000;20,5" for i in range(N))]),
        ("'1.100.000'", NOT_A_NUMBER),
        2,
    )
    add(
        "thousands-space.csv",
        text(["Frequency (Hz)\tLevel (dBuV)", *(f"1 {100 + i:03d} 000\t20.5" for i in range(N))]),
        ("'1 100 000'", NOT_A_NUMBER),
        2,
    )
    # --- values that are not finite numbers, in several spellings
    for i, spelling in enumerate(
        (
            "nan",
            "NaN",
            "-nan",
            "NAN",
            "inf",
            "-inf",
            "Infinity",
            "-Infinity",
            "INF",
            "1e400",
            "-1e400",
        )
    ):
        add(
            f"nonfinite-{i}.csv", with_line(9, f"37.0,{spelling}"), (f"'{spelling}'", NOT_FINITE), 9
        )
    # spreadsheet and C runtime spellings: not numbers at all (and not a comment after "1.")
    for i, spelling in enumerate(("#N/A", "1.#QNAN", "1.#INF", "-1.#IND", "#VALUE!")):
        add(
            f"nonnumber-{i}.csv",
            with_line(9, f"37.0,{spelling}"),
            (f"'{spelling}'", NOT_A_NUMBER),
            9,
        )
    add(
        "huge-frequency.csv",
        with_line(7, "1e400,20"),
        ("'1e400'", "not a finite number in column Frequency (MHz)"),
        7,
    )
    # --- the frequency axis
    add("negative.csv", with_line(5, "-33.0,20"), "frequency -33 MHz is negative", 5)
    add("duplicate.csv", with_line(6, "33.0,20"), "frequency 33 MHz repeats line 5", 6)
    add(
        "all-zero.csv",
        text([HEADER, *(f"0,{i}" for i in range(N))]),
        "frequency 0 Hz repeats line 2",
        3,
    )
    add("too-few.csv", good(10), "only 10 data points; at least 16 are needed")
    add(
        "billion-claimed.csv",
        text(["Number of points,1000000000", "Sweep points: 1e9", HEADER, *rows(5)]),
        "only 5 data points",
    )
    # --- units
    add(
        "unknown-level-unit.csv",
        text(["Frequency (MHz),Level (dBfoo)", *rows()]),
        ("column Level (dBfoo): unknown level unit 'dBfoo'", "expected dBuV, dBm"),
        1,
    )
    add(
        "unknown-frequency-unit.csv",
        text(["Frequency (furlongs),Level (dBuV)", *rows()]),
        ("unknown unit 'furlongs', expected Hz, kHz, MHz or GHz"),
        1,
    )
    add(
        "frequency-in-dbuv.csv",
        text(["Frequency (dBuV),Level (dBuV)", *rows()]),
        "column Frequency (dBuV) is in dBuV, expected Hz, kHz, MHz or GHz",
        1,
    )
    add(
        "no-frequency-unit.csv",
        text(["Frequency,Level (dBuV)", *rows()]),
        "column Frequency states no unit: pass frequency_unit=",
        1,
    )
    add(
        "two-frequencies.csv",
        text(["Frequency (MHz),Level (MHz)", *rows()]),
        "no level or voltage column",
        1,
    )
    add(
        "seconds-and-db.csv",
        text(["Frequency (s),Level (dBuV)", *rows()]),
        "holds levels in dB, not voltage samples",
        1,
    )
    add(
        "negative-millivolts.csv",
        text(
            ["Frequency (MHz),Level (mV)", *(f"{30 + i},{-1 if i == 3 else 1}" for i in range(N))]
        ),
        "a level of -1 mV cannot be expressed in dB",
        5,
    )
    # --- time records
    add("one-sample.csv", _time([0.0]), "only 1 data point;", domain="time")
    add(
        "uneven-steps.csv",
        _time([*range(20), 25, *range(26, 40)]),
        ("time step 6e-06 s differs from the record's step 1e-06 s", "uniformly spaced"),
        22,
        domain="time",
    )
    # --- formula-looking and HTML labels: refused for their missing units, named as written
    add(
        "formula-header.csv",
        text([f"{FORMULAS[0]},Level (dBuV)", *rows()]),
        f"column {FORMULAS[0]} states no unit",
        1,
    )
    add(
        "formula-level.csv",
        text(["Frequency (MHz),@SUM(A1)", *rows()]),
        "column @SUM(A1): unknown level unit 'A1'",
        1,
    )
    add(
        "script-header.csv",
        text([f"Frequency (MHz),{SCRIPT}", *rows()]),
        f"column {SCRIPT} states no level unit",
        1,
    )
    for i, formula in enumerate(FORMULAS):  # = + - @ tab CR leads, as a level column's name
        add(f"formula-{i}.csv", text([f"Frequency (MHz),{formula}", *rows()]),
            f"column {formula.strip()} states no level unit", 1)  # fmt: skip
    add("img-field.csv", with_line(9, f"{IMG},20"), ("'\"><img'", NOT_A_NUMBER), 9)
    add(f"{IMG}.csv", with_line(9, "37.0,abc"), ("'abc'", NOT_A_NUMBER), 9)
    # --- labels that would flood a message: 100 kB long, or terminal escapes
    add("long-label.csv", text([f"Frequency (MHz),{'L' * 100_000}", *rows()]),
        (f"column {'L' * 32}…{'L' * 27} states no level unit"), 1)  # fmt: skip
    add("long-label-bad-row.csv", with_line(7, "35.0,abc", header=f"Frequency (MHz),{'Level' * 1000} (dBuV)"),
        ("'abc' is not a number in column LevelLevel", "…", "Level (dBuV)"), 7)  # fmt: skip
    add("escape-label.csv", text(["Frequency (MHz),Level \x1b[2J\x1b[31m", *rows()]),
        "column Level ?[2J?[31m states no level unit", 1)  # fmt: skip
    # --- guards, with a small configured limit so the test stays fast
    add(
        "long-line.csv",
        text([HEADER, *rows(5), "1" * 5000, *rows(30, 40)]),
        "longer than 4096 bytes",
        7,
        kwargs={"max_line_bytes": 4096},
    )
    add(
        "no-line-breaks.csv",
        b"1," * 50_000,
        "longer than 4096 bytes",
        1,
        kwargs={"max_line_bytes": 4096},
    )
    add("too-big.csv", good(), "more than the limit of 100 bytes", kwargs={"max_bytes": 100})
    return c


def _accepted() -> list[Awkward]:
    return [
        Awkward(
            "decreasing.csv",
            text([HEADER, *rows()[::-1]]),
            "frequency values were not increasing",
            N,
        ),
        Awkward("crlf-and-lf.csv", text([HEADER, *rows(20)], "\r\n") + text(rows(20, 60)), None, N),
        Awkward("bom.csv", b"\xef\xbb\xbf" + good(), None, N),
        # the preamble's claim is metadata, never a size to allocate
        Awkward(
            "billion-claimed-40.csv",
            text(["Number of points,1000000000", HEADER, *rows()]),
            None,
            N,
        ),
        Awkward(
            "dc-bin.csv",
            text([HEADER, "0,20", *rows()]),
            "dropped the 0 Hz (DC) point at line 2",
            N,
        ),
        Awkward("dos-eof.csv", good() + b"\x1a", None, N),
        # thousands of columns: one short warning, not a list of them all
        Awkward(
            "wide.csv",
            text(
                [
                    ",".join(["Frequency (MHz)", *(f"Level{i} (dBuV)" for i in range(5000))]),
                    *(",".join([f"{30 + i}", *["1"] * 5000]) for i in range(20)),
                ]
            ),
            "ignored Level1 (dBuV), Level2 (dBuV), Level3 (dBuV), Level4 (dBuV), Level5 (dBuV), and 4994 more",
            20,
        ),
    ]


CORPUS: list[Hostile] = _build()
ACCEPTED: list[Awkward] = _accepted()
assert len({h.name for h in CORPUS}) == len(CORPUS), "corpus names must be unique"


def cases():
    """(name, bytes, expected message fragment) of every refused file, as the brief asks."""
    for h in CORPUS:
        yield h.name, h.content, h.expect[0]
