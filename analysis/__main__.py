"""The engine's command line — a stable contract (CI, bench scripts and the worker rely on it).

    python -m analysis FILE [--limit ID] [--distance M] [--source NAME=HZ[:TOL]]...
                            [--guard DB] [--prominence DB] [--domain spectrum|time]
                            [--frequency-unit U] [--level-unit U] [--window W] [--json]
    python -m analysis limits

HZ takes an optional SI prefix (``25e6``, ``25MHz``, ``2.2 MHz``); TOL is in Hz
unless it ends in ``%`` or ``ppm`` (``25MHz:50ppm``). Without ``--json`` a
short report is printed; with it, one JSON object on stdout:

    {"unit": "dBuV", "domain": "spectrum"|"time",
     "peaks": [{"frequency_hz": f, "level": l, "prominence_db": p, ...}],
     "families": [{"fundamental_hz": f, "orders": [1,3,5], "odd_only": true, "spread_spectrum": false}],
     "exceedances": [{"frequency_hz": f, "level": l, "limit": x, "margin_db": m}],   # with --limit
     "attributions": [{"frequency_hz": f, "terms": [{"source": "NAME", "order": 1}], "error_hz": e}],  # with --source
     ...}

``unit`` is dBuV for time records (rms at the probe's scope input). Exit 0 on
success; on bad input exit 2 with one line on stderr, never a traceback.
"""

from __future__ import annotations

import argparse
import json
import sys

from analysis.errors import TraceError
from analysis.frequencies import parse_frequency
from analysis.types import Source


def parse_source(text: str) -> Source:
    """``NAME=HZ[:TOL]`` → Source; TOL in Hz, or with a ``%`` / ``ppm`` suffix."""
    name, sep, rest = text.partition("=")
    if not sep or not name.strip():
        raise ValueError(f"--source '{text}': expected NAME=HZ[:TOL], e.g. PHY=25MHz:50ppm")
    freq_text, _, tol_text = rest.partition(":")
    frequency_hz = parse_frequency(freq_text)
    if frequency_hz <= 0:
        raise ValueError(f"--source '{text}': the frequency must be positive")
    tol_text = tol_text.strip()
    if not tol_text:
        tolerance_hz = frequency_hz * 1e-4  # 100 ppm: a loose crystal tolerance (common practice)
    elif tol_text.endswith("%"):
        tolerance_hz = frequency_hz * float(tol_text[:-1]) / 100
    elif tol_text.lower().endswith("ppm"):
        tolerance_hz = frequency_hz * float(tol_text[:-3]) * 1e-6
    else:
        tolerance_hz = parse_frequency(tol_text)
    if tolerance_hz < 0:
        raise ValueError(f"--source '{text}': the tolerance cannot be negative")
    return Source(name=name.strip(), frequency_hz=frequency_hz, tolerance_hz=tolerance_hz)


def _mhz(f: float) -> str:
    return f"{f / 1e6:12.6f}"


def _report(result) -> str:
    lines = [
        f"{result.trace.name}: {result.domain}, {len(result.spectrum)} points, unit {result.spectrum.unit}",
    ]
    lines += [f"warning: {w}" for w in result.warnings]
    lines.append("")
    lines.append(f"{len(result.peaks)} peaks")
    lines.append("   frequency MHz      level  prominence dB")
    lines += [f"  {_mhz(p.frequency_hz)}  {p.level:9.2f}  {p.prominence_db:13.1f}" for p in result.peaks]
    lines.append("")
    lines.append(f"{len(result.families)} harmonic families")
    for f in result.families:
        flags = [s for s, on in (("odd orders only", f.odd_only), ("spread spectrum", f.spread_spectrum)) if on]
        lines.append(
            f"  {_mhz(f.fundamental_hz)} MHz  orders {', '.join(map(str, f.orders))}"
            + (f"  ({'; '.join(flags)})" if flags else "")
        )
    if result.attributions:
        lines.append("")
        lines.append("attributions")
        for a in result.attributions:
            expr = " ".join(
                f"{'+' if t.order > 0 and i else ('-' if t.order < 0 else '')}{abs(t.order)}×{t.source}"
                for i, t in enumerate(a.terms)
            )
            lines.append(f"  {_mhz(a.frequency_hz)} MHz = {expr}  (off by {a.error_hz:+.0f} Hz)")
    if result.exceedances is not None:
        lines.append("")
        lines.append(f"against {result.limit.id} ({result.limit.title}): {len(result.exceedances)} exceedances")
        lines.append("   frequency MHz      level      limit  margin dB")
        lines += [
            f"  {_mhz(e.frequency_hz)}  {e.level:9.2f}  {e.limit:9.2f}  {e.margin_db:9.2f}"
            for e in result.exceedances
        ]
    return "\n".join(lines)


def _limits_report() -> str:
    from analysis.limits import list_limits

    rows = []
    for line in list_limits():
        lo, hi = line.frequency_range_hz
        dist = f"{line.distance_m:g} m" if line.distance_m else ""
        rows.append(
            f"{line.id:32s} {line.kind:9s} {line.detector:10s} {line.unit:7s} {dist:5s} "
            f"{lo / 1e6:g}–{hi / 1e6:g} MHz  {line.title}"
        )
    return "\n".join(rows)


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    if argv[:1] == ["limits"]:
        print(_limits_report())
        return 0
    parser = argparse.ArgumentParser(prog="python -m analysis", description="Analyse one emissions trace file.")
    parser.add_argument("file")
    parser.add_argument("--limit", help="a built-in limit line id (see: python -m analysis limits)")
    parser.add_argument("--distance", type=float, help="measuring distance in m (converts a radiated limit)")
    parser.add_argument("--source", action="append", default=[], metavar="NAME=HZ[:TOL]")
    parser.add_argument("--guard", type=float, default=0.0, metavar="DB", help="guard band in dB (default 0)")
    parser.add_argument("--prominence", type=float, default=6.0, metavar="DB", help="peak prominence (default 6)")
    parser.add_argument("--domain", choices=["spectrum", "time"])
    parser.add_argument("--frequency-unit")
    parser.add_argument("--level-unit")
    parser.add_argument("--window", default="flattop")
    parser.add_argument("--json", action="store_true")
    args = parser.parse_args(argv)
    try:
        sources = [parse_source(s) for s in args.source]
    except ValueError as exc:
        print(f"python -m analysis: {exc}", file=sys.stderr)
        return 2
    from analysis.pipeline import analyse_file

    try:
        result = analyse_file(
            args.file, domain=args.domain, frequency_unit=args.frequency_unit, level_unit=args.level_unit,
            limit=args.limit, distance_m=args.distance, sources=sources, guard_db=args.guard,
            prominence_db=args.prominence, window=args.window,
        )
    except TraceError as exc:
        print(str(exc), file=sys.stderr)
        return 2
    except MemoryError:
        print(f"{args.file}: too large to analyse in the memory available", file=sys.stderr)
        return 2
    if args.json:
        json.dump(result.to_json(), sys.stdout, allow_nan=False)
        sys.stdout.write("\n")
    else:
        print(_report(result))
    return 0


if __name__ == "__main__":
    sys.exit(main())
