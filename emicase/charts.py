"""Plotly figures for the pages, built on the server and drawn by the plotly.js the app serves.

Every builder takes stored data (a decimated envelope, never a raw trace) and
returns a ``plotly.graph_objects.Figure``; ``figure_json`` turns it into the
string a template places in a ``<script type="application/json">``. Arrays go out as float32 (plotly
writes numpy arrays as base64 typed arrays), frequencies in MHz on a log axis,
levels in the trace's own unit, so a chart of a 4000-point envelope weighs
some 50 kB.

Plain SVG ``scatter`` throughout: a few thousand points need no WebGL, and a
headless browser or an old lab PC may have none.
"""

from __future__ import annotations

import html
from collections.abc import Iterable, Sequence

import numpy as np
import plotly.graph_objects as go
from django.utils.safestring import mark_safe

from analysis.limits import LimitLine
from analysis.pipeline import resolve_limit

# Our palette: ink and paper, a deep blue trace, a red limit, amber for the guard band.
INK = "#1b262c"
GRID = "#e3e0d8"
TRACE = "#1f5f8b"
LIMIT = "#b3261e"
GUARD = "#c27c0e"
FAIL = "#b3261e"
AFTER = "#2e7d4f"
SERIES = ("#1f5f8b", "#b3541e", "#2e7d4f", "#6b3fa0", "#8a6d00", "#00838f", "#ad1457", "#455a64")
LEVEL_SCALE = [[0.0, "#f3efe4"], [0.35, "#f2c46d"], [0.7, "#d9622b"], [1.0, "#8c1b13"]]

UNIT_LABELS = {"dBuV": "dBµV", "dBuV/m": "dBµV/m", "dBuA": "dBµA", "dBm": "dBm", "dBpT": "dBpT"}

TEMPLATE = go.layout.Template(
    layout=dict(
        font=dict(family="system-ui, -apple-system, 'Segoe UI', sans-serif", size=13, color=INK),
        paper_bgcolor="#ffffff",
        plot_bgcolor="#ffffff",
        colorway=list(SERIES),
        margin=dict(l=64, r=20, t=36, b=54),
        hovermode="closest",
        xaxis=dict(gridcolor=GRID, linecolor=INK, ticks="outside", zeroline=False, showline=True),
        yaxis=dict(gridcolor=GRID, linecolor=INK, ticks="outside", zeroline=False, showline=True),
    )
)


def unit_label(unit: str) -> str:
    """The unit as engineers write it (dBµV/m), from the engine's ASCII spelling."""
    return UNIT_LABELS.get(unit, unit or "dB")


_SCRIPT_SAFE = str.maketrans({"<": "\\u003C", ">": "\\u003E", "&": "\\u0026"})


def figure_json(fig: go.Figure) -> str:
    """The figure as JSON, safe to place inside ``<script type="application/json">``.

    As Django's ``json_script`` does, <, > and & are escaped (they can only
    occur inside JSON strings, where the escapes mean the same), so a label
    typed by a user cannot close the script element. The result is marked safe.
    """
    return mark_safe(fig.to_json(validate=False, pretty=False).translate(_SCRIPT_SAFE))


def _f32(values) -> np.ndarray:
    return np.asarray(values, dtype=np.float32)


def _mhz(frequency_hz) -> np.ndarray:
    return _f32(np.asarray(frequency_hz, dtype=float) / 1e6)


def _levels(level) -> np.ndarray:
    # Hundredths of a dB are far below any instrument's accuracy.
    return _f32(np.round(np.asarray(level, dtype=float), 2))


def envelope_arrays(envelope: dict) -> tuple[np.ndarray, np.ndarray]:
    """(frequency in MHz, level) float32 arrays from a stored envelope; empty when there is none."""
    f = envelope.get("frequency_hz") or []
    y = envelope.get("level") or []
    return _mhz(f), _levels(y)


def scan_limit(scan) -> LimitLine | None:
    """The scan's limit line at its measuring distance (the engine's own conversion), or None."""
    if not scan.limit_id:
        return None
    try:
        line, _ = resolve_limit(scan.limit_id, scan.distance_m)
    except ValueError:  # TraceError: an unknown id or a distance the line cannot take
        return None
    return line


def log_ticks(lo_mhz: float, hi_mhz: float) -> tuple[list[float], list[str]]:
    """Tick values 1-2-3-5-7 per decade between ``lo_mhz`` and ``hi_mhz``, written out in
    full (plotly's own log ticks abbreviate 200 as '2')."""
    if not (lo_mhz > 0 and hi_mhz > lo_mhz):
        return [], []
    lo, hi = lo_mhz * 0.999, hi_mhz * 1.001  # keep 30 and 1000 of a 30–1000 MHz scan
    decades = range(int(np.floor(np.log10(lo))), int(np.ceil(np.log10(hi))) + 1)
    values = [
        round(m * 10.0**d, 6) for d in decades for m in (1, 2, 3, 5, 7) if lo <= m * 10.0**d <= hi
    ]
    return values, [f"{v:g}" for v in values]


def _axes(
    fig: go.Figure, unit: str, *, log_x: bool = True, span_mhz: tuple[float, float] | None = None
) -> None:
    xaxis: dict = {"type": "log" if log_x else "linear", "title": {"text": "Frequency (MHz)"}}
    if log_x and span_mhz is not None:
        values, labels = log_ticks(*span_mhz)
        if values:
            xaxis.update(tickmode="array", tickvals=values, ticktext=labels)
    fig.update_layout(
        template=TEMPLATE,
        xaxis=xaxis,
        yaxis=dict(title=dict(text=f"Level ({unit_label(unit)})")),
        legend=dict(orientation="h", yanchor="bottom", y=1.02, xanchor="left", x=0),
    )


def _span(*envelopes: dict) -> tuple[float, float] | None:
    """The frequency span (MHz) the envelopes cover, for the tick marks."""
    lows, highs = [], []
    for env in envelopes:
        f = env.get("frequency_hz") or []
        if f:
            lows.append(f[0] / 1e6)
            highs.append(f[-1] / 1e6)
    return (min(lows), max(highs)) if lows else None


def _limit_traces(fig: go.Figure, limit: LimitLine, guard_db: float) -> None:
    f, level = limit.points()
    x, y = _mhz(f), _f32(level)
    if guard_db > 0:
        fig.add_trace(
            go.Scatter(
                x=x,
                y=_f32(level - guard_db),
                mode="lines",
                name=f"Guard band ({guard_db:g} dB)",
                line=dict(color=GUARD, width=1.2, dash="dash"),
                hoverinfo="skip",
            )
        )
    fig.add_trace(
        go.Scatter(
            x=x,
            y=y,
            mode="lines",
            name="Limit",
            line=dict(color=LIMIT, width=2),
            fill="tonexty" if guard_db > 0 else None,
            fillcolor="rgba(194,124,14,0.13)",
            hovertemplate="limit %{y:.1f}<extra></extra>",
        )
    )


def _plain(text: str) -> str:
    """User text for a chart label: plotly renders a few HTML tags in labels, so show them as text
    (plotly decodes the entities back to the characters typed)."""
    return html.escape(str(text), quote=False)


def _plain_template(text: str) -> str:
    """User text inside a hovertemplate, where ``%{`` would start a placeholder."""
    return _plain(text).replace("%{", "% {")


def attribution_label(attribution: dict | None) -> str:
    """'3 × PHY clock', 'PHY clock + 2 × buck': an attribution's terms in words."""
    if not attribution:
        return ""
    parts = []
    for i, term in enumerate(attribution.get("terms", [])):
        order = int(term["order"])
        n = abs(order)
        text = term["source"] if n == 1 else f"{n} × {term['source']}"
        if i == 0:
            parts.append(text if order > 0 else f"−{text}")
        else:
            parts.append(f"{'+' if order > 0 else '−'} {text}")
    return " ".join(parts)


def attributions_by_frequency(results: dict) -> dict[float, dict]:
    return {round(a["frequency_hz"], 0): a for a in results.get("attributions", []) or []}


def scan_figure(
    *,
    envelope: dict,
    unit: str,
    limit: LimitLine | None,
    guard_db: float,
    failing: Sequence = (),
    results: dict | None = None,
    name: str = "Trace",
    label_peaks: int = 14,
) -> go.Figure:
    """The scan chart: trace, limit line and guard band, failing frequencies marked,
    peaks labelled with their attribution to known sources (the loudest ``label_peaks``)."""
    results = results or {}
    fig = go.Figure()
    if limit is not None:
        _limit_traces(fig, limit, guard_db)
    x, y = envelope_arrays(envelope)
    fig.add_trace(
        go.Scatter(
            x=x,
            y=y,
            mode="lines",
            name=_plain(name),
            line=dict(color=TRACE, width=1.2),
            hovertemplate="%{x:.3f} MHz, %{y:.1f}<extra></extra>",
        )
    )
    peaks = results.get("peaks", []) or []
    by_f = attributions_by_frequency(results)
    if peaks:
        labels = [attribution_label(by_f.get(round(p["frequency_hz"], 0))) for p in peaks]
        fig.add_trace(
            go.Scatter(
                x=_mhz([p["frequency_hz"] for p in peaks]),
                y=_levels([p["level"] for p in peaks]),
                mode="markers",
                name="Peaks",
                marker=dict(symbol="circle-open", size=7, color=INK),
                text=[_plain(lab) or "no known source" for lab in labels],
                hovertemplate="%{x:.3f} MHz, %{y:.1f}: %{text}<extra>peak</extra>",
            )
        )
        attributed = sorted(
            (p for p, lab in zip(peaks, labels, strict=True) if lab), key=lambda p: -p["level"]
        )[:label_peaks]
        for p in attributed:
            fig.add_annotation(
                x=float(np.log10(p["frequency_hz"] / 1e6)),
                y=round(p["level"], 2),
                text=_plain(attribution_label(by_f[round(p["frequency_hz"], 0)])),
                showarrow=True,
                arrowhead=0,
                arrowcolor="#6b6b6b",
                ax=0,
                ay=-28,
                font=dict(size=11, color=INK),
                bgcolor="rgba(255,255,255,0.85)",
            )
    if failing:
        fig.add_trace(
            go.Scatter(
                x=_mhz([ff.frequency_hz for ff in failing]),
                y=_levels([ff.level for ff in failing]),
                mode="markers",
                name="Failing frequencies",
                marker=dict(
                    symbol="triangle-down", size=13, color=FAIL, line=dict(color="#ffffff", width=1)
                ),
                text=[f"margin {ff.margin_db:+.1f} dB" for ff in failing],
                hovertemplate="%{x:.3f} MHz, %{y:.1f}: %{text}<extra>failing</extra>",
            )
        )
    _axes(fig, unit, span_mhz=_span(envelope))
    # Head-room above the loudest of trace, limit and peaks, so the labels sit inside the plot.
    tops = [float(np.nanmax(y))] if y.size else []
    if limit is not None:
        tops.append(float(np.nanmax(limit.points()[1])))
    tops += [p["level"] for p in peaks]
    if tops and y.size:
        fig.update_yaxes(range=[float(np.nanmin(y)) - 2.0, max(tops) + (7.0 if peaks else 3.0)])
    fig.update_layout(height=440)
    return fig


def overlay_figure(
    *,
    series: Iterable[tuple[str, dict]],
    unit: str,
    marker_hz: float | None = None,
    limit: LimitLine | None = None,
    guard_db: float = 0.0,
    height: int = 400,
) -> go.Figure:
    """Several envelopes on one log-frequency chart, with an optional vertical marker."""
    fig = go.Figure()
    if limit is not None:
        _limit_traces(fig, limit, guard_db)
    for i, (label, envelope) in enumerate(series):
        x, y = envelope_arrays(envelope)
        fig.add_trace(
            go.Scatter(
                x=x,
                y=y,
                mode="lines",
                name=_plain(label),
                line=dict(width=1.2, color=SERIES[i % len(SERIES)]),
                hovertemplate=f"{_plain_template(label)}<br>%{{x:.3f}} MHz, %{{y:.1f}}<extra></extra>",
            )
        )
    if marker_hz:
        # Shapes take data values on a log axis; annotations take log10 of them.
        fig.add_vline(
            x=marker_hz / 1e6, line=dict(color=FAIL, width=1.5, dash="dot"), layer="below"
        )
        fig.add_annotation(
            x=float(np.log10(marker_hz / 1e6)),
            y=1.0,
            yref="paper",
            text=f"{marker_hz / 1e6:.3f} MHz",
            showarrow=False,
            yanchor="bottom",
            font=dict(color=FAIL, size=12),
        )
    _axes(fig, unit, span_mhz=_span(*(env for _, env in series)))
    fig.update_layout(height=height)
    return fig


def before_after_figure(
    *,
    before: dict,
    after: dict,
    unit: str,
    limit: LimitLine | None,
    guard_db: float,
    failing: Sequence = (),
    after_levels: dict[int, float | None] | None = None,
    before_label: str = "Before",
    after_label: str = "After",
) -> go.Figure:
    """Before and after envelopes overlaid with the limit and guard band; at each failing
    frequency its level before (red) and, from ``after_levels`` (failing id → level), after (green)."""
    fig = overlay_figure(series=[], unit=unit, limit=limit, guard_db=guard_db)
    for label, envelope, color, width in (
        (before_label, before, "#8a8f94", 1.1),
        (after_label, after, AFTER, 1.4),
    ):
        x, y = envelope_arrays(envelope)
        fig.add_trace(
            go.Scatter(
                x=x,
                y=y,
                mode="lines",
                name=_plain(label),
                line=dict(color=color, width=width),
                hovertemplate=f"{_plain_template(label)}<br>%{{x:.3f}} MHz, %{{y:.1f}}<extra></extra>",
            )
        )
    if failing:
        fig.add_trace(
            go.Scatter(
                x=_mhz([ff.frequency_hz for ff in failing]),
                y=_levels([ff.level for ff in failing]),
                mode="markers",
                name="Failing level before",
                marker=dict(symbol="triangle-down", size=12, color=FAIL),
                hovertemplate="%{x:.3f} MHz before: %{y:.1f}<extra></extra>",
            )
        )
        after_levels = after_levels or {}
        shown = [ff for ff in failing if after_levels.get(ff.pk) is not None]
        if shown:
            fig.add_trace(
                go.Scatter(
                    x=_mhz([ff.frequency_hz for ff in shown]),
                    y=_levels([after_levels[ff.pk] for ff in shown]),
                    mode="markers",
                    name="Level after",
                    marker=dict(symbol="triangle-up", size=12, color=AFTER),
                    hovertemplate="%{x:.3f} MHz after: %{y:.1f}<extra></extra>",
                )
            )
    _axes(fig, unit, span_mhz=_span(before, after))
    fig.update_layout(height=420)
    return fig


def board_map_figure(group, *, frequency_hz: float) -> go.Figure:
    """Locations at their x/y (mm) coloured by the level read there; the loudest peak ringed.

    ``group`` is a ``selectors.ProbeGroup``; locations without coordinates are left out
    (``zones_figure`` shows them).
    """
    placed = [loc for loc in group.locations if loc.x_mm is not None]
    levels = _f32([loc.level for loc in placed])
    fig = go.Figure()
    if placed:
        top = (
            group.loudest_peak
            if group.loudest_peak is not None and group.loudest_peak.x_mm is not None
            else None
        )
        fig.add_trace(
            go.Scatter(
                x=_f32([loc.x_mm for loc in placed]),
                y=_f32([loc.y_mm for loc in placed]),
                mode="markers+text",
                text=[_plain(loc.location) for loc in placed],
                textposition="top center",
                marker=dict(
                    size=22,
                    color=levels,
                    colorscale=LEVEL_SCALE,
                    showscale=True,
                    line=dict(color=INK, width=1),
                    colorbar=dict(title=dict(text=unit_label(group.unit)), thickness=14),
                ),
                customdata=np.column_stack([levels, _f32([loc.below_top_db for loc in placed])]),
                hovertemplate="%{text}: %{customdata[0]:.1f} (%{customdata[1]:.1f} dB below the loudest)<extra></extra>",
                name="Level",
            )
        )
        if top is not None:
            fig.add_trace(
                go.Scatter(
                    x=[top.x_mm],
                    y=[top.y_mm],
                    mode="markers",
                    name="Loudest",
                    marker=dict(size=38, color="rgba(0,0,0,0)", line=dict(color=FAIL, width=3)),
                    hoverinfo="skip",
                )
            )
    fig.update_layout(
        template=TEMPLATE,
        height=380,
        showlegend=False,
        xaxis=dict(title=dict(text="x (mm)"), constrain="domain"),
        yaxis=dict(title=dict(text="y (mm)"), scaleanchor="x", scaleratio=1),
        title=dict(
            text=_plain(f"{group.probe_label}, {group.tip} at {frequency_hz / 1e6:.3f} MHz"),
            font=dict(size=13),
        ),
    )
    return fig


def zones_figure(group, *, frequency_hz: float) -> go.Figure:
    """Locations named only by zone: bars coloured by level, loudest on top."""
    locs = list(reversed(group.locations))
    levels = _f32([loc.level for loc in locs])
    fig = go.Figure(
        go.Bar(
            x=levels,
            y=[f"{loc.location} ({loc.board_side})" for loc in locs],
            orientation="h",
            marker=dict(color=levels, colorscale=LEVEL_SCALE, line=dict(color=INK, width=0.5)),
            hovertemplate="%{y}: %{x:.1f}<extra></extra>",
        )
    )
    low = float(levels.min()) - 6 if levels.size else 0
    fig.update_layout(
        template=TEMPLATE,
        height=max(170, 34 * len(locs) + 90),
        showlegend=False,
        xaxis=dict(
            title=dict(text=f"Level at {frequency_hz / 1e6:.3f} MHz ({unit_label(group.unit)})"),
            range=[low, float(levels.max()) + 2 if levels.size else 1],
        ),
        yaxis=dict(automargin=True),
    )
    return fig
