"""Trace files built in the tests: a floor and a few tones whose levels are set against a published limit."""

from __future__ import annotations

import io

import numpy as np


def receiver_csv(tones: list[tuple[float, float]], *, start_hz=30e6, stop_hz=1e9, points=4001, floor=15.0,
                 unit="dBµV/m", seed=0) -> bytes:
    f = np.geomspace(start_hz, stop_hz, points)
    rng = np.random.default_rng(seed)
    power = 10 ** ((floor + rng.normal(0, 0.3, f.size)) / 10)
    for fc, level in tones:
        power += 10 ** (level / 10) * np.exp(-(((f - fc) / (fc * 4e-3)) ** 2))
    out = io.StringIO()
    out.write(f"# built by the test suite\nFrequency (MHz),Level ({unit})\n")
    np.savetxt(out, np.column_stack([f / 1e6, 10 * np.log10(power)]), fmt=["%.6f", "%.3f"], delimiter=",")
    return out.getvalue().encode()


def bad_csv(line_of_error: int = 5) -> bytes:
    rows = ["Frequency (MHz),Level (dBµV/m)"] + [f"{30 + i},{20 + i % 3}" for i in range(40)]
    rows[line_of_error - 1] = "33,abc"
    return ("\n".join(rows) + "\n").encode()


def _digits(values: np.ndarray, width: int) -> np.ndarray:
    """Zero-padded decimal digits of non-negative integers, as ASCII bytes (n × width)."""
    powers = 10 ** np.arange(width - 1, -1, -1, dtype=np.int64)
    return ((values[:, None] // powers) % 10 + ord("0")).astype(np.uint8)


def long_time_record_csv(samples: int, *, rate_hz: float = 1e9, tone_hz: float = 25e6) -> bytes:
    """A big oscilloscope record written fast (fixed-width rows built with numpy, no loop per row).

    Rows read ``ttttttttttt,±vvv.vvv``: time in ns, voltage in mV.
    """
    n = np.arange(samples, dtype=np.int64)
    t_ns = np.round(n * (1e9 / rate_hz)).astype(np.int64)
    mv = 5.0 * np.sin(2 * np.pi * tone_hz * n / rate_hz) + np.random.default_rng(1).normal(0, 0.05, samples)
    mv_int = np.round(mv * 1000).astype(np.int64)
    sign = np.where(mv_int < 0, ord("-"), ord("+")).astype(np.uint8)[:, None]
    mag = _digits(np.abs(mv_int), 6)
    comma = np.full((samples, 1), ord(","), np.uint8)
    dot = np.full((samples, 1), ord("."), np.uint8)
    newline = np.full((samples, 1), ord("\n"), np.uint8)
    rows = np.hstack([_digits(t_ns, 11), comma, sign, mag[:, :3], dot, mag[:, 3:], newline])
    return b"Time (ns),Voltage (mV)\n" + rows.tobytes()
