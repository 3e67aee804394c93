"""Charts stay small and keep every peak: the page sends the stored envelope, never the raw trace."""

from __future__ import annotations

import base64
import json

import numpy as np
import pytest

from analysis.envelope import envelope
from analysis.limits import get_limit
from emicase import charts


def _decode(typed) -> np.ndarray:
    """plotly's base64 typed array ({'dtype': 'f4', 'bdata': …}) back to numbers."""
    return np.frombuffer(base64.b64decode(typed["bdata"]), dtype=np.dtype(typed["dtype"]))


@pytest.fixture(scope="module")
def million_point_scan():
    """A 1-million-point receiver-like trace (30 MHz–1 GHz) with 40 narrow tones of a few samples each."""
    rng = np.random.default_rng(7)
    f = np.linspace(30e6, 1e9, 1_000_000)
    level = 15 + rng.normal(0, 1.0, f.size)
    tones_hz = np.geomspace(31e6, 990e6, 40)
    idx = np.searchsorted(f, tones_hz)
    tone_levels = rng.uniform(25, 45, idx.size)
    for k, lv in zip(idx, tone_levels, strict=True):  # a loop over 40 tones, not samples
        level[k - 1 : k + 2] = [lv - 6, lv, lv - 6]
    x, y = envelope(
        f, level, max_points=4000
    )  # what the pipeline stores (analysis/pipeline.py default)
    return {
        "envelope": {"frequency_hz": x.round(3).tolist(), "level": y.round(2).tolist()},
        "tones_hz": f[idx],
        "tone_levels": tone_levels,
    }


def test_a_million_point_trace_charts_in_under_300_kB_with_every_peak(million_point_scan):
    fig = charts.scan_figure(
        envelope=million_point_scan["envelope"],
        unit="dBuV/m",
        limit=get_limit("cispr32-b-rad-10m"),
        guard_db=3.0,
    )
    payload = charts.figure_json(fig)
    assert len(payload.encode()) <= 300_000
    data = json.loads(payload)
    trace = next(t for t in data["data"] if t["name"] == "Trace")
    x_mhz, y = _decode(trace["x"]), _decode(trace["y"])
    assert x_mhz.size <= 4000
    for f_hz, lv in zip(
        million_point_scan["tones_hz"], million_point_scan["tone_levels"], strict=True
    ):
        near = np.abs(x_mhz - f_hz / 1e6) <= 1e-4 * f_hz / 1e6
        # The envelope keeps each bucket's maximum, so the tone's own sample survives (float32, 0.01 dB).
        assert near.any() and y[near].max() == pytest.approx(lv, abs=0.01)


def test_the_limit_line_is_drawn_at_the_scans_distance():
    class Scan:
        limit_id, distance_m = "cispr32-b-rad-10m", 3.0

    line = charts.scan_limit(Scan())
    # Inverse-distance law, 10 m → 3 m adds 20·log10(10/3) = 10.46 dB (DOMAIN.md).
    assert line.level_at(100e6) == pytest.approx(30 + 10.46, abs=0.01)


def test_attributions_read_as_words():
    assert charts.attribution_label({"terms": [{"source": "PHY", "order": 3}]}) == "3 × PHY"
    assert charts.attribution_label(
        {"terms": [{"source": "PHY", "order": 1}, {"source": "buck", "order": -2}]}
    ) == ("PHY − 2 × buck")
    assert charts.attribution_label(None) == ""


def test_log_ticks_are_written_out_in_full():
    values, labels = charts.log_ticks(30, 1000)
    assert labels[0] == "30" and labels[-1] == "1000" and "200" in labels


def test_user_text_cannot_close_the_script_element():
    import plotly.graph_objects as go

    payload = charts.figure_json(
        go.Figure(go.Scatter(x=[1], y=[1], name="</script><script>alert(1)</script>"))
    )
    assert "</script>" not in payload and "<" not in payload
    assert json.loads(payload)["data"][0]["name"].startswith("</script>")
