"""The engine's speed and memory against its targets, measured side by side.

    python -m analysis.benchmark [--quick] [--big] [--json]

Not a test: a script that prints what it measured, next to a reference doing
the irreducible part of the same work on the same data, and the ratio:

* whole analysis (``pipeline.analyse_trace`` on an in-memory time record:
  everything after reading the file) vs ``numpy.fft.rfft`` alone on the same
  samples, for 1e4 … 1e7 samples; target ≤ 2× at 1e6 and 1e7;
* peaks + harmonic families of a receiver-like spectrum vs
  ``scipy.signal.find_peaks(level, prominence=6)`` alone, 1e4 … 1e6 points;
  target ≤ 3×;
* ``reader.read_trace`` of a two-column CSV vs ``pandas.read_csv`` (C engine)
  on the same file, 1e6 rows (1e7 with ``--big``); target ≤ 1.5× pandas'
  time. pandas is the ``bench`` extra; without it the row says so;
* peak memory of the whole analysis (tracemalloc, to which numpy reports its
  allocations) vs the input's ``volts.nbytes``, at 1e6 and 1e7; target ≤ 4×.

Times are the best of N interleaved runs (measured, then reference, N times),
wall clock, garbage collection paused: on a shared machine the best run is
the one least disturbed, and interleaving exposes both sides to the same
disturbances. ``--quick`` skips 1e7 and runs fewer repeats (a smoke run);
``--json`` also writes one JSON object on stdout (the table then goes to
stderr). The CSV file is written to a temporary directory and removed.
"""

from __future__ import annotations

import argparse
import gc
import json
import math
import os
import platform
import sys
import tempfile
import time
import tracemalloc
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import scipy
import scipy.signal

from analysis import __version__
from analysis.harmonics import find_families
from analysis.peaks import find_peaks
from analysis.pipeline import analyse_trace, peak_resolution_hz
from analysis.reader import read_trace
from analysis.types import Spectrum, TimeRecord, Trace

ANALYSIS_SIZES = (10_000, 100_000, 1_000_000, 10_000_000)
SPECTRUM_SIZES = (10_000, 100_000, 1_000_000)
MEMORY_SIZES = (1_000_000, 10_000_000)
CSV_ROWS = 1_000_000
CSV_ROWS_BIG = 10_000_000

# Targets: (limit, the sizes at which it applies).
ANALYSIS_TARGET = 2.0
ANALYSIS_TARGET_FROM = 1_000_000
PEAKS_TARGET = 3.0
CSV_TARGET = 1.5
MEMORY_TARGET = 4.0
MEMORY_TARGET_FROM = 1_000_000  # below, fixed costs (tables, Python objects) dominate

_SAMPLE_RATE_HZ = 1e9


# --- synthetic inputs ------------------------------------------------------------------


def synthetic_record(samples: int, *, seed: int = 0) -> TimeRecord:
    """A probe-like capture at 1 GS/s: three sines, a 10 MHz clock with soft
    edges (a square-ish wave, odd harmonics) and white noise; fixed seed."""
    rng = np.random.default_rng(seed)
    time_s = np.arange(samples) / _SAMPLE_RATE_HZ
    phase = 2 * np.pi * time_s
    volts = 0.01 * np.sin(phase * 25e6)
    volts += 0.003 * np.sin(phase * 133.3e6 + 0.4)
    volts += 0.002 * np.sin(phase * 7.77e6 + 1.1)
    volts += 0.05 * np.tanh(20 * np.sin(phase * 10e6))
    volts += 1e-4 * rng.standard_normal(samples)
    return TimeRecord(time_s=time_s, volts=volts)


def synthetic_receiver_spectrum(points: int, *, seed: int = 0) -> Spectrum:
    """A receiver-like scan: log-spaced 150 kHz – 1 GHz, a sloping floor with
    1 dB of noise, and 20 emissions (eight of them harmonics of 24 MHz), each
    as wide as the 120 kHz resolution bandwidth; fixed seed."""
    rng = np.random.default_rng(seed)
    frequency_hz = np.geomspace(150e3, 1e9, points)
    log_f = np.log10(frequency_hz)
    floor = 30.0 - 4.0 * (log_f - log_f[0])
    level = floor + rng.normal(0.0, 1.0, points)
    rbw_hz = 120e3
    emissions_hz = np.concatenate(
        (24e6 * np.array([1, 2, 3, 4, 5, 7, 9, 11]), 10 ** rng.uniform(5.5, 8.9, 12))
    )
    heights_db = rng.uniform(15.0, 45.0, emissions_hz.size)
    for centre_hz, height_db in zip(emissions_hz, heights_db, strict=True):
        # A line seen through a Gaussian-like RBW filter: 6 dB down at ±RBW/2.
        # Only the points near the line are touched (a loop over emissions).
        lo, hi = np.searchsorted(frequency_hz, [centre_hz - 4 * rbw_hz, centre_hz + 4 * rbw_hz])
        offset = (frequency_hz[lo:hi] - centre_hz) / (rbw_hz / 2)
        peak_db = np.interp(centre_hz, frequency_hz, floor) + height_db
        np.maximum(level[lo:hi], peak_db - 6.0 * offset**2, out=level[lo:hi])
    return Spectrum(frequency_hz=frequency_hz, level=level, unit="dBuV", rbw_hz=rbw_hz)


def write_csv(path: Path, rows: int, *, seed: int = 0) -> None:
    """A two-column receiver export (``Frequency (Hz),Level (dBuV)``): ``rows``
    linearly spaced points 150 kHz – 1 GHz, levels with two decimals."""
    rng = np.random.default_rng(seed)
    chunk = 100_000
    step_hz = (1e9 - 150e3) / max(1, rows - 1)
    with open(path, "w", encoding="ascii", newline="\n") as out:
        out.write("Frequency (Hz),Level (dBuV)\n")
        for start in range(0, rows, chunk):
            count = min(chunk, rows - start)
            frequency_hz = 150e3 + step_hz * np.arange(start, start + count)
            level = 30.0 + rng.normal(0.0, 2.0, count)
            pairs = np.column_stack((frequency_hz, level)).ravel().tolist()
            # One C-level format for a whole chunk (no Python work per row).
            out.write(("%.3f,%.2f\n" * count) % tuple(pairs))


# --- measuring -------------------------------------------------------------------------


def best_of(functions: dict[str, Callable[[], object]], repeats: int) -> dict[str, float]:
    """Best wall-clock time in seconds of each function over ``repeats``
    interleaved rounds, after one untimed warm-up call of each (FFT plans,
    caches); garbage collection is paused while a function runs."""
    for function in functions.values():
        function()
    best = dict.fromkeys(functions, math.inf)
    for _ in range(max(1, repeats)):
        for name, function in functions.items():
            gc.disable()
            try:
                start = time.perf_counter()
                function()
                elapsed = time.perf_counter() - start
            finally:
                gc.enable()
            best[name] = min(best[name], elapsed)
    return best


def _ratio(measured_s: float, reference_s: float) -> float:
    return measured_s / reference_s if reference_s > 0 else math.inf


def _repeats(size: int, quick: bool) -> int:
    if quick:
        return 3 if size < 1_000_000 else 2
    # Small sizes take milliseconds: many rounds cost nothing and find an
    # undisturbed one (on a shared machine 25 rounds of 1e4 points, 20 ms in
    # all, can all fall in one slow spell); at 1e7 a round takes a second.
    if size < 100_000:
        return 200
    if size < 1_000_000:
        return 50
    return 15 if size < 10_000_000 else 3


@dataclass(frozen=True)
class AnalysisTiming:
    samples: int
    repeats: int
    analyse_s: float
    rfft_s: float
    ratio: float
    target: float | None
    met: bool | None
    peaks_found: int


@dataclass(frozen=True)
class PeaksTiming:
    points: int
    repeats: int
    peaks_families_s: float
    scipy_s: float
    ratio: float
    target: float
    met: bool
    peaks_found: int
    families_found: int


@dataclass(frozen=True)
class CsvTiming:
    rows: int
    repeats: int
    file_bytes: int
    read_trace_s: float
    read_trace_rows_per_s: float
    pandas_s: float | None
    pandas_rows_per_s: float | None
    ratio: float | None
    target: float
    met: bool | None
    note: str


@dataclass(frozen=True)
class MemoryUse:
    samples: int
    peak_bytes: int
    input_bytes: int
    ratio: float
    target: float | None
    met: bool | None


def bench_analysis(
    sizes: Sequence[int] = ANALYSIS_SIZES, *, quick: bool = False, repeats: int | None = None
) -> list[AnalysisTiming]:
    """Whole analysis of a synthetic time record vs numpy.fft.rfft of its samples."""
    out = []
    for samples in sizes:
        record = synthetic_record(samples)
        trace = Trace(name=f"synthetic-{samples}", data=record)
        n_repeats = repeats or _repeats(samples, quick)
        best = best_of(
            {
                "analyse": lambda trace=trace: analyse_trace(trace),
                "rfft": lambda volts=record.volts: np.fft.rfft(volts),
            },
            n_repeats,
        )
        ratio = _ratio(best["analyse"], best["rfft"])
        target = ANALYSIS_TARGET if samples >= ANALYSIS_TARGET_FROM else None
        out.append(
            AnalysisTiming(
                samples=samples,
                repeats=n_repeats,
                analyse_s=best["analyse"],
                rfft_s=best["rfft"],
                ratio=ratio,
                target=target,
                met=None if target is None else ratio <= target,
                peaks_found=len(analyse_trace(trace).peaks),
            )
        )
    return out


def bench_peaks(
    sizes: Sequence[int] = SPECTRUM_SIZES, *, quick: bool = False, repeats: int | None = None
) -> list[PeaksTiming]:
    """find_peaks + find_families (resolution as the pipeline passes it) vs
    scipy.signal.find_peaks(level, prominence=6) on a receiver-like spectrum."""
    out = []
    for points in sizes:
        spectrum = synthetic_receiver_spectrum(points)

        def ours(spectrum: Spectrum = spectrum) -> tuple:
            peaks = find_peaks(spectrum)
            return peaks, find_families(peaks, resolution_hz=peak_resolution_hz(spectrum, peaks))

        n_repeats = repeats or _repeats(points, quick)
        best = best_of(
            {
                "ours": ours,
                "scipy": lambda spectrum=spectrum: scipy.signal.find_peaks(
                    spectrum.level, prominence=6
                ),
            },
            n_repeats,
        )
        peaks, families = ours()
        ratio = _ratio(best["ours"], best["scipy"])
        out.append(
            PeaksTiming(
                points=points,
                repeats=n_repeats,
                peaks_families_s=best["ours"],
                scipy_s=best["scipy"],
                ratio=ratio,
                target=PEAKS_TARGET,
                met=ratio <= PEAKS_TARGET,
                peaks_found=len(peaks),
                families_found=len(families),
            )
        )
    return out


def bench_csv(
    rows: int = CSV_ROWS,
    *,
    quick: bool = False,
    repeats: int | None = None,
    directory: str | os.PathLike | None = None,
) -> CsvTiming:
    """read_trace vs pandas.read_csv (C engine) on one two-column CSV of
    ``rows`` rows, written to a temporary directory (removed afterwards)."""
    try:
        import pandas
    except ImportError:  # the bench extra is optional
        pandas = None
    n_repeats = repeats or (2 if quick else (5 if rows < CSV_ROWS_BIG else 3))
    with tempfile.TemporaryDirectory(prefix="emicase-bench-", dir=directory) as folder:
        path = Path(folder) / "trace.csv"
        write_csv(path, rows)
        functions: dict[str, Callable[[], object]] = {"read_trace": lambda: read_trace(path)}
        if pandas is not None:
            functions["pandas"] = lambda: pandas.read_csv(path, engine="c")
        best = best_of(functions, n_repeats)
        points = len(read_trace(path).data)
        file_bytes = path.stat().st_size
    if points != rows:
        raise RuntimeError(f"read_trace read {points} rows of {rows}")
    ours_s = best["read_trace"]
    pandas_s = best.get("pandas")
    ratio = None if pandas_s is None else _ratio(ours_s, pandas_s)
    return CsvTiming(
        rows=rows,
        repeats=n_repeats,
        file_bytes=file_bytes,
        read_trace_s=ours_s,
        read_trace_rows_per_s=rows / ours_s,
        pandas_s=pandas_s,
        pandas_rows_per_s=None if pandas_s is None else rows / pandas_s,
        ratio=ratio,
        target=CSV_TARGET,
        met=None if ratio is None else ratio <= CSV_TARGET,
        note="" if pandas is not None else "pandas is not installed (pip install -e '.[bench]')",
    )


def bench_memory(sizes: Sequence[int] = MEMORY_SIZES) -> list[MemoryUse]:
    """Peak traced memory of analyse_trace over the input's volts.nbytes.

    The record exists before tracing starts, so only what the analysis
    allocates counts, including the spectrum and envelope it returns.
    """
    out = []
    for samples in sizes:
        record = synthetic_record(samples)
        trace = Trace(name=f"synthetic-{samples}", data=record)
        gc.collect()
        tracemalloc.start()
        try:
            tracemalloc.reset_peak()
            analysis = analyse_trace(trace)
            _, peak = tracemalloc.get_traced_memory()
        finally:
            tracemalloc.stop()
        del analysis
        ratio = peak / record.volts.nbytes
        target = MEMORY_TARGET if samples >= MEMORY_TARGET_FROM else None
        out.append(
            MemoryUse(
                samples=samples,
                peak_bytes=peak,
                input_bytes=record.volts.nbytes,
                ratio=ratio,
                target=target,
                met=None if target is None else ratio <= target,
            )
        )
        del record, trace
    return out


# --- the report ------------------------------------------------------------------------


@dataclass(frozen=True)
class TargetResult:
    target: str
    met: bool | None  # None: not measured (or no reference)
    figure: str


@dataclass(frozen=True)
class Report:
    environment: dict
    analysis: list[AnalysisTiming]
    peaks: list[PeaksTiming]
    csv: CsvTiming | None
    memory: list[MemoryUse]
    summary: list[TargetResult]

    def to_json(self) -> dict:
        """Plain JSON-safe data (non-finite numbers as null)."""
        return _json_safe(asdict(self))


def _json_safe(value: object) -> object:
    if isinstance(value, dict):
        return {k: _json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_json_safe(v) for v in value]
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _all_met(flags: Sequence[bool | None]) -> bool | None:
    known = [f for f in flags if f is not None]
    return None if not known else all(known)


def summarise(
    analysis: Sequence[AnalysisTiming],
    peaks: Sequence[PeaksTiming],
    csv: CsvTiming | None,
    memory: Sequence[MemoryUse],
) -> list[TargetResult]:
    """One line per target: met, not met, or not measured, with the figures."""
    judged = [a for a in analysis if a.target is not None]
    weighed = [m for m in memory if m.target is not None]
    csv_figure = "not measured"
    if csv is not None:
        csv_figure = csv.note or f"{csv.ratio:.2f}× at {_count(csv.rows)} rows"
    return [
        TargetResult(
            target=f"whole analysis ≤ {ANALYSIS_TARGET:g}× numpy.fft.rfft "
            f"(≥ {_count(ANALYSIS_TARGET_FROM)} samples)",
            met=_all_met([a.met for a in judged]),
            figure=", ".join(f"{a.ratio:.2f}× at {_count(a.samples)}" for a in judged)
            or "not measured",
        ),
        TargetResult(
            target=f"peaks + families ≤ {PEAKS_TARGET:g}× scipy.signal.find_peaks",
            met=_all_met([p.met for p in peaks]),
            figure=", ".join(f"{p.ratio:.2f}× at {_count(p.points)}" for p in peaks)
            or "not measured",
        ),
        TargetResult(
            target=f"read_trace ≤ {CSV_TARGET:g}× pandas.read_csv",
            met=None if csv is None else csv.met,
            figure=csv_figure,
        ),
        TargetResult(
            target=f"peak memory of the analysis ≤ {MEMORY_TARGET:g}× the input array "
            f"(≥ {_count(MEMORY_TARGET_FROM)} samples)",
            met=_all_met([m.met for m in weighed]),
            figure=", ".join(f"{m.ratio:.2f}× at {_count(m.samples)}" for m in weighed)
            or "not measured",
        ),
    ]


def environment() -> dict:
    """What the figures depend on: versions, cores and how busy the machine was."""
    try:
        import pandas

        pandas_version = pandas.__version__
    except ImportError:
        pandas_version = None
    try:
        load = [round(v, 2) for v in os.getloadavg()]
    except OSError:
        load = None
    return {
        "engine_version": __version__,
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "pandas": pandas_version,
        "machine": platform.machine(),
        "cpus": os.cpu_count(),
        "load_average": load,
    }


def run(
    *,
    analysis_sizes: Sequence[int] = ANALYSIS_SIZES,
    spectrum_sizes: Sequence[int] = SPECTRUM_SIZES,
    csv_rows: int | None = CSV_ROWS,
    memory_sizes: Sequence[int] = MEMORY_SIZES,
    quick: bool = False,
    repeats: int | None = None,
    log: Callable[[str], None] | None = None,
) -> Report:
    """Every measurement; ``log`` (if given) hears what is being measured."""
    say = log or (lambda text: None)
    before = environment()
    say("whole analysis vs rfft …")
    analysis = bench_analysis(analysis_sizes, quick=quick, repeats=repeats)
    say("peaks + families vs scipy …")
    peaks = bench_peaks(spectrum_sizes, quick=quick, repeats=repeats)
    csv = None
    if csv_rows:
        say(f"CSV import of {_count(csv_rows)} rows …")
        csv = bench_csv(csv_rows, quick=quick, repeats=repeats)
    say("peak memory …")
    memory = bench_memory(memory_sizes)
    before["load_average_after"] = environment()["load_average"]
    return Report(
        environment=before,
        analysis=analysis,
        peaks=peaks,
        csv=csv,
        memory=memory,
        summary=summarise(analysis, peaks, csv, memory),
    )


def _count(n: int) -> str:
    exponent = math.log10(n) if n > 0 else 0
    return f"1e{int(exponent)}" if n > 0 and exponent.is_integer() else f"{n:,}"


def _ms(seconds: float | None) -> str:
    if seconds is None:
        return "—"
    return f"{seconds * 1e3:.3g} ms" if seconds < 10 else f"{seconds:.3g} s"


def _verdict(met: bool | None) -> str:
    return {True: "MET", False: "NOT MET", None: "—"}[met]


def _table(header: Sequence[str], rows: Sequence[Sequence[str]]) -> list[str]:
    widths = [max([len(h), *(len(r[i]) for r in rows)]) for i, h in enumerate(header)]

    def line(cells: Sequence[str]) -> str:
        return "  ".join(c.rjust(w) for c, w in zip(cells, widths, strict=True))

    return [line(header), *(line(r) for r in rows)]


def format_report(report: Report) -> str:
    """The human-readable tables and the summary lines."""
    env = report.environment
    lines = [
        f"emicase engine {env['engine_version']} benchmark — Python {env['python']}, numpy {env['numpy']}, "
        f"scipy {env['scipy']}, pandas {env['pandas'] or 'absent'}; {env['cpus']} CPUs, "
        f"load average {env['load_average']} before, {env.get('load_average_after')} after",
        "times: best of N interleaved runs, wall clock",
        "",
        "Whole analysis (analyse_trace on an in-memory time record) vs numpy.fft.rfft of its samples",
    ]
    lines += _table(
        ("samples", "N", "analyse_trace", "rfft", "ratio", "target", "verdict", "peaks"),
        [
            (
                _count(a.samples),
                str(a.repeats),
                _ms(a.analyse_s),
                _ms(a.rfft_s),
                f"{a.ratio:.2f}×",
                "—" if a.target is None else f"≤ {a.target:g}×",
                _verdict(a.met),
                str(a.peaks_found),
            )
            for a in report.analysis
        ],
    )
    lines += [
        "",
        "Peaks + families (find_peaks, find_families) vs scipy.signal.find_peaks(level, prominence=6)",
    ]
    lines += _table(
        ("points", "N", "ours", "scipy", "ratio", "target", "verdict", "peaks", "families"),
        [
            (
                _count(p.points),
                str(p.repeats),
                _ms(p.peaks_families_s),
                _ms(p.scipy_s),
                f"{p.ratio:.2f}×",
                f"≤ {p.target:g}×",
                _verdict(p.met),
                str(p.peaks_found),
                str(p.families_found),
            )
            for p in report.peaks
        ],
    )
    if report.csv is not None:
        c = report.csv
        lines += [
            "",
            f"CSV import (2 columns, {c.file_bytes / 1e6:.1f} MB) — read_trace vs pandas.read_csv (C engine)",
        ]
        lines += _table(
            ("rows", "N", "read_trace", "rows/s", "pandas", "rows/s", "ratio", "target", "verdict"),
            [
                (
                    _count(c.rows),
                    str(c.repeats),
                    _ms(c.read_trace_s),
                    f"{c.read_trace_rows_per_s / 1e6:.2f} M",
                    _ms(c.pandas_s),
                    "—" if c.pandas_rows_per_s is None else f"{c.pandas_rows_per_s / 1e6:.2f} M",
                    "—" if c.ratio is None else f"{c.ratio:.2f}×",
                    f"≤ {c.target:g}×",
                    _verdict(c.met),
                )
            ],
        )
        if c.note:
            lines.append(c.note)
    if report.memory:
        lines += [
            "",
            "Peak memory of the whole analysis (tracemalloc) vs the input array (volts.nbytes)",
        ]
        lines += _table(
            ("samples", "peak", "input", "ratio", "target", "verdict"),
            [
                (
                    _count(m.samples),
                    f"{m.peak_bytes / 1e6:.1f} MB",
                    f"{m.input_bytes / 1e6:.1f} MB",
                    f"{m.ratio:.2f}×",
                    "—" if m.target is None else f"≤ {m.target:g}×",
                    _verdict(m.met),
                )
                for m in report.memory
            ],
        )
    lines += ["", "Summary"]
    lines += [
        f"  {_verdict(t.met) if t.met is not None else 'NOT MEASURED'}: {t.target} — {t.figure}"
        for t in report.summary
    ]
    return "\n".join(lines)


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        prog="python -m analysis.benchmark",
        description="Measure the engine against its speed and memory targets.",
    )
    parser.add_argument(
        "--quick", action="store_true", help="skip 1e7 and use fewer repeats (a smoke run)"
    )
    parser.add_argument(
        "--big",
        action="store_true",
        help=f"read a CSV of {_count(CSV_ROWS_BIG)} rows, not {_count(CSV_ROWS)}",
    )
    parser.add_argument(
        "--json",
        action="store_true",
        help="also print one JSON object on stdout (the table goes to stderr)",
    )
    args = parser.parse_args(argv)

    def keep(sizes: Sequence[int]) -> tuple[int, ...]:
        return tuple(s for s in sizes if not (args.quick and s >= 10_000_000))

    table_out = sys.stderr if args.json else sys.stdout
    report = run(
        analysis_sizes=keep(ANALYSIS_SIZES),
        spectrum_sizes=keep(SPECTRUM_SIZES),
        csv_rows=CSV_ROWS_BIG if args.big else CSV_ROWS,
        memory_sizes=keep(MEMORY_SIZES),
        quick=args.quick,
        log=lambda text: print(text, file=sys.stderr, flush=True),
    )
    print(format_report(report), file=table_out, flush=True)
    if args.json:
        print(json.dumps(report.to_json(), ensure_ascii=False))
    return 0


if __name__ == "__main__":
    sys.exit(main())
