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
