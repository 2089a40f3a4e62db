"""Server-rendered SVG charts for the dashboard: plain data in, escaped markup out.

Every chart is an inline <svg> with a viewBox (it scales with the page), a <title> and
<desc> for screen readers, and CSS classes for colour (service/web/static/kilter.css),
so the palette lives in one place. Times are epoch milliseconds, drawn in UTC.

Charts:
* score_chart      window score over time, warning/critical lines, shaded alert span,
                   optional "lanes" of spans under the plot (recorded alerts, proposed
                   alerts) and an optional preview (proposed levels drawn dashed);
* contribution_bars per-channel share of the window residual, largest first;
* readings_chart   raw readings of a few channels, one panel per channel with its unit.

One scale rule for score charts: the score axis is always logarithmic, from the lowest score
(but no lower than a twentieth of the lowest level drawn, nor above two thirds of it) to one and a half times the larger
of the highest score and the highest level. Anomaly scores range over orders of magnitude
(a fault may score 15x the warning level, normal windows a tenth of it), and a log axis
keeps the warning and critical lines apart and readable whatever the peak, so every alert's
chart reads the same way; scores below the floor sit on the bottom edge. Readings charts
stay linear (engineering units, where differences matter).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import datetime, timezone

from markupsafe import Markup, escape

__all__ = [
    "Span",
    "Lane",
    "Preview",
    "Trace",
    "score_chart",
    "contribution_bars",
    "readings_chart",
    "nice_ticks",
    "time_ticks",
    "format_number",
    "decimate",
]

LOG_FLOOR_DIVISOR = 20.0  # the score axis starts at the lowest level / 20 (or the lowest score above it)
MAX_DRAWN_POINTS = 2400  # per line: more than the chart has pixels, so nothing visible is lost


# Plot margins in SVG units, shared by the score and readings charts so that stacked
# charts of one alert line up in time.
PLOT_LEFT = 58.0
PLOT_RIGHT = 124.0


@dataclass(frozen=True)
class Span:
    """A stretch of time [start_ms, end_ms]; `kind` picks its CSS class (span-<kind>)."""

    start_ms: int
    end_ms: int
    kind: str = "alert"
    label: str = ""


@dataclass(frozen=True)
class Lane:
    """A row of spans drawn under the plot, e.g. recorded alerts or proposed alerts."""

    label: str
    spans: Sequence[Span] = ()
    kind: str = "recorded"


@dataclass(frozen=True)
class Preview:
    """Proposed levels drawn dashed over the current ones."""

    warning: float
    critical: float


@dataclass(frozen=True)
class Trace:
    """One channel's raw readings: values may hold None where nothing was read."""

    name: str
    unit: str
    t_ms: Sequence[int]
    values: Sequence[float | None]


@dataclass
class _Frame:
    """Plot area in SVG user units and the data ranges it maps."""

    left: float
    top: float
    width: float
    height: float
    t0: float
    t1: float
    y0: float
    y1: float
    log: bool = False
    extra: dict[str, float] = field(default_factory=dict)

    def x(self, t_ms: float) -> float:
        span = self.t1 - self.t0 or 1.0
        return self.left + (t_ms - self.t0) / span * self.width

    def y(self, v: float) -> float:
        if self.log:
            v = math.log10(max(v, self.y0))
            lo, hi = math.log10(self.y0), math.log10(self.y1)
        else:
            lo, hi = self.y0, self.y1
        span = hi - lo or 1.0
        frac = (v - lo) / span
        frac = min(max(frac, -0.02), 1.02)  # clip a hair outside so off-scale points show at the edge
        return self.top + (1.0 - frac) * self.height


def format_number(v: float, digits: int = 3) -> str:
    """A short human number: 3 significant digits and never an exponent (people read
    "1.2 million" and "< 0.001", not 1.2e+06 and 1.5e-05)."""
    if v is None or not math.isfinite(v):
        return "–"
    if v == 0:
        return "0"
    mag = abs(v)
    if mag < 1e-3:
        return "< 0.001" if v > 0 else "> -0.001"
    if mag >= 1e6:
        for size, word in ((1e12, "trillion"), (1e9, "billion"), (1e6, "million")):
            if mag >= size:
                return f"{format_number(v / size, digits)} {word}"
    decimals = max(0, digits - 1 - int(math.floor(math.log10(mag))))
    text = f"{v:.{decimals}f}"
    if "." in text:
        text = text.rstrip("0").rstrip(".")
    return text


def nice_ticks(lo: float, hi: float, count: int = 5) -> list[float]:
    """Round tick values (1, 2, 2.5, 5 x 10^k steps) covering [lo, hi]."""
    if not (math.isfinite(lo) and math.isfinite(hi)):
        return []
    if hi <= lo:
        hi = lo + (abs(lo) or 1.0)
    raw = (hi - lo) / max(count, 1)
    power = 10 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1, 2, 2.5, 5, 10) if m * power >= raw)
    first = math.ceil(lo / step - 1e-9) * step
    ticks = []
    v = first
    while v <= hi + step * 1e-9:
        ticks.append(round(v, 12))
        v += step
    return ticks


def log_ticks(lo: float, hi: float) -> list[float]:
    """Powers of ten (and 2x, 5x when few decades) inside [lo, hi], for a log axis."""
    ticks: list[float] = []
    decades = math.log10(hi) - math.log10(lo)
    mults = (1, 2, 5) if decades < 3 else (1,)
    for k in range(math.floor(math.log10(lo)), math.ceil(math.log10(hi)) + 1):
        for m in mults:
            v = m * 10.0**k
            if lo <= v <= hi:
                ticks.append(v)
    return ticks


_TIME_STEPS_S = (60, 300, 600, 900, 1800, 3600, 2 * 3600, 3 * 3600, 6 * 3600, 12 * 3600, 86400, 2 * 86400, 7 * 86400)


def time_ticks(t0_ms: float, t1_ms: float, count: int = 6) -> list[tuple[int, str]]:
    """Tick positions on round UTC minutes/hours/days, each with a short UTC label."""
    if t1_ms <= t0_ms:
        t1_ms = t0_ms + 60_000
    span_s = (t1_ms - t0_ms) / 1000.0
    step_s = next((s for s in _TIME_STEPS_S if span_s / s <= count), _TIME_STEPS_S[-1])
    first = math.ceil(t0_ms / 1000.0 / step_s) * step_s
    out: list[tuple[int, str]] = []
    t = first
    previous_day = None
    while t * 1000 <= t1_ms:
        when = datetime.fromtimestamp(t, tz=timezone.utc)
        day = when.date()
        if step_s >= 86400:
            label = when.strftime("%d %b")
        elif previous_day is None or day != previous_day:
            label = when.strftime("%d %b %H:%M")
        else:
            label = when.strftime("%H:%M")
        previous_day = day
        out.append((int(t * 1000), label))
        t += step_s
    return out


def _clip(text: str, n: int) -> str:
    return text if len(text) <= n else text[: n - 1] + "…"


def _fmt_utc(t_ms: float) -> str:
    return datetime.fromtimestamp(t_ms / 1000.0, tz=timezone.utc).strftime("%Y-%m-%d %H:%M UTC")


def _polylines(frame: _Frame, t_ms: Sequence[int], values: Sequence[float | None], gap_ms: float | None) -> list[str]:
    """Point lists for <polyline>; a missing value or a gap longer than gap_ms breaks the line."""
    runs: list[list[str]] = []
    current: list[str] = []
    last_t: float | None = None
    for t, v in zip(t_ms, values):
        broken = v is None or not math.isfinite(v) or (gap_ms is not None and last_t is not None and t - last_t > gap_ms)
        if broken and current:
            runs.append(current)
            current = []
        if v is not None and math.isfinite(v):
            current.append(f"{frame.x(t):.1f},{frame.y(v):.1f}")
            last_t = t
    if current:
        runs.append(current)
    return [" ".join(run) for run in runs]


def decimate(
    t_ms: Sequence[int], values: Sequence[float | None], max_points: int = MAX_DRAWN_POINTS
) -> tuple[list[int], list[float | None]]:
    """At most about `max_points` points: per time bucket its lowest and highest value, in
    time order, so peaks and dips survive; missing values (None) are kept as breaks."""
    n = len(t_ms)
    if n <= max_points:
        return list(t_ms), list(values)
    buckets = max(1, max_points // 2)
    out_t: list[int] = []
    out_v: list[float | None] = []
    for b in range(buckets):
        lo, hi = b * n // buckets, (b + 1) * n // buckets
        idx = [i for i in range(lo, hi) if values[i] is not None and math.isfinite(values[i])]  # type: ignore[arg-type]
        if not idx:
            out_t.append(int(t_ms[lo]))
            out_v.append(None)
            continue
        i_min = min(idx, key=lambda i: values[i])  # type: ignore[arg-type, return-value]
        i_max = max(idx, key=lambda i: values[i])  # type: ignore[arg-type, return-value]
        for i in sorted({i_min, i_max}):
            out_t.append(int(t_ms[i]))
            out_v.append(values[i])
    return out_t, out_v


def _typical_step(t_ms: Sequence[int]) -> float | None:
    if len(t_ms) < 2:
        return None
    steps = sorted(b - a for a, b in zip(t_ms, t_ms[1:]) if b > a)
    return float(steps[len(steps) // 2]) if steps else None


def _time_axis(frame: _Frame, parts: list[str], *, labels: bool = True) -> None:
    bottom = frame.top + frame.height
    for t, label in time_ticks(frame.t0, frame.t1, count=max(3, int(frame.width // 130))):
        x = frame.x(t)
        parts.append(f'<line class="grid" x1="{x:.1f}" y1="{frame.top:.1f}" x2="{x:.1f}" y2="{bottom:.1f}"/>')
        if labels:
            parts.append(f'<text class="tick" x="{x:.1f}" y="{bottom + 16:.1f}" text-anchor="middle">{escape(label)}</text>')


def spread_labels(ys: Sequence[float], *, gap: float, top: float, bottom: float) -> list[float]:
    """Baselines for labels wanted at `ys`, at least `gap` apart and in the same top-to-bottom
    order as the lines they name (a label never swaps places with its neighbour's), moved
    as little as a downward then upward sweep allows, kept within [top, bottom] when they fit."""
    order = sorted(range(len(ys)), key=lambda i: ys[i])
    placed = [ys[i] for i in order]
    for k in range(1, len(placed)):
        placed[k] = max(placed[k], placed[k - 1] + gap)
    if placed and placed[-1] > bottom:
        placed[-1] = bottom
        for k in range(len(placed) - 2, -1, -1):
            placed[k] = min(placed[k], placed[k + 1] - gap)
    if placed and placed[0] < top:
        shift = top - placed[0]
        placed = [y + shift for y in placed]
    out = [0.0] * len(ys)
    for k, i in enumerate(order):
        out[i] = placed[k]
    return out


def tick_text(v: float) -> str:
    """An axis tick: as format_number, with 10,000 and up as 10k, 250k, 1M, so the value
    axis stays narrow beside a large peak."""
    mag = abs(v)
    if mag >= 1e6:
        return f"{format_number(v / 1e6)}M"
    if mag >= 1e4:
        return f"{format_number(v / 1e3)}k"
    return format_number(v)


def _value_axis(frame: _Frame, parts: list[str], ticks: Sequence[float]) -> None:
    right = frame.left + frame.width
    for v in ticks:
        y = frame.y(v)
        parts.append(f'<line class="grid" x1="{frame.left:.1f}" y1="{y:.1f}" x2="{right:.1f}" y2="{y:.1f}"/>')
        parts.append(
            f'<text class="tick" x="{frame.left - 6:.1f}" y="{y + 4:.1f}" text-anchor="end">{escape(tick_text(v))}</text>'
        )


def _open_svg(width: int, height: int, title: str, desc: str, css_class: str) -> list[str]:
    return [
        f'<svg class="chart {css_class}" viewBox="0 0 {width} {height}" width="100%" role="img" '
        f'preserveAspectRatio="xMidYMid meet" xmlns="http://www.w3.org/2000/svg">',
        f"<title>{escape(title)}</title>",
        f"<desc>{escape(desc)}</desc>",
    ]


def _empty(width: int, height: int, title: str, message: str, css_class: str) -> Markup:
    parts = _open_svg(width, height, title, message, css_class)
    parts.append(f'<rect class="plot-bg" x="0" y="0" width="{width}" height="{height}"/>')
    parts.append(f'<text class="empty" x="{width / 2:.0f}" y="{height / 2:.0f}" text-anchor="middle">{escape(message)}</text>')
    parts.append("</svg>")
    return Markup("".join(parts))


def score_chart(
    *,
    t_ms: Sequence[int],
    scores: Sequence[float],
    warning: float,
    critical: float,
    highlight: Span | None = None,
    lanes: Sequence[Lane] = (),
    preview: Preview | None = None,
    t_range: tuple[int, int] | None = None,
    title: str = "Window score",
    width: int = 960,
    height: int = 300,
) -> Markup:
    """Window score line with threshold lines, an optional shaded span and span lanes.

    The y axis is logarithmic on every score chart (the module's scale rule).
    """
    if len(t_ms) != len(scores):
        raise ValueError(f"t_ms has {len(t_ms)} points but scores has {len(scores)}")
    finite = [s for s in scores if s is not None and math.isfinite(s)]
    lane_h = 18.0
    plot_bottom_pad = 28.0 + lane_h * len(lanes) + (6.0 if lanes else 0.0)
    if not finite and t_range is None:
        return _empty(width, height, title, "No window scores in this range yet", "score-chart")

    levels = [warning, critical] + ([preview.warning, preview.critical] if preview else [])
    top_level = max(levels)
    s_max = max(finite) if finite else top_level
    positives = [s for s in finite if s > 0]
    use_log = True  # the one scale rule (module docstring)
    lowest = min(positives) if positives else 0.0
    # From the lowest score, but no lower than lowest level / 20 and low enough that the
    # lowest level's line stands clear of the bottom edge.
    y0 = min(max(min(levels) / LOG_FLOOR_DIVISOR, lowest), min(levels) / 1.5)
    y1 = max(s_max, top_level) * 1.5
    t0, t1 = t_range if t_range else (min(t_ms), max(t_ms))
    if highlight:
        t0, t1 = min(t0, highlight.start_ms), max(t1, highlight.end_ms)
    left = 84.0 if lanes else PLOT_LEFT
    frame = _Frame(left=left, top=12, width=width - left - PLOT_RIGHT, height=height - 12 - plot_bottom_pad, t0=t0, t1=t1, y0=y0, y1=y1, log=use_log)

    peak_i = max(range(len(scores)), key=lambda i: scores[i] if scores[i] is not None and math.isfinite(scores[i]) else -math.inf) if finite else None
    desc = (
        f"{len(finite)} window scores from {_fmt_utc(t0)} to {_fmt_utc(t1)}; "
        f"warning level {format_number(warning)}, critical level {format_number(critical)}"
    )
    if peak_i is not None:
        desc += f"; highest score {format_number(scores[peak_i])} at {_fmt_utc(t_ms[peak_i])}"
    if preview:
        desc += f"; proposed warning {format_number(preview.warning)}, proposed critical {format_number(preview.critical)}"
    parts = _open_svg(width, height, title, desc, "score-chart")
    parts.append(f'<rect class="plot-bg" x="{frame.left}" y="{frame.top}" width="{frame.width:.1f}" height="{frame.height:.1f}"/>')

    if highlight:
        x0, x1 = frame.x(highlight.start_ms), frame.x(highlight.end_ms)
        parts.append(
            f'<rect class="span span-{escape(highlight.kind)}" x="{x0:.1f}" y="{frame.top}" '
            f'width="{max(x1 - x0, 2):.1f}" height="{frame.height:.1f}"><title>{escape(highlight.label or "alert span")}</title></rect>'
        )

    ticks = log_ticks(y0, y1) if use_log else nice_ticks(y0, y1, 5)
    _value_axis(frame, parts, ticks)
    _time_axis(frame, parts)

    right = frame.left + frame.width
    drawn = [("warning", warning, "level-warning", "warning"), ("critical", critical, "level-critical", "critical")]
    if preview:
        drawn += [
            ("proposed warning", preview.warning, "level-proposed", "new warn"),
            ("proposed critical", preview.critical, "level-proposed level-proposed-critical", "new crit"),
        ]
    line_ys = [frame.y(level) for _, level, _, _ in drawn]
    label_ys = spread_labels([y + 4 for y in line_ys], gap=12.0, top=frame.top + 8, bottom=frame.top + frame.height + 4)
    for (name, level, css, short), y, ly in zip(drawn, line_ys, label_ys):
        parts.append(
            f'<line class="level {css}" x1="{frame.left}" y1="{y:.1f}" x2="{right:.1f}" y2="{y:.1f}">'
            f"<title>{escape(name)} {escape(format_number(level))}</title></line>"
        )
        parts.append(f'<text class="level-label {css}" x="{right + 6:.1f}" y="{ly:.1f}">{escape(short)} {escape(format_number(level))}</text>')

    gap_ms = (_typical_step(t_ms) or 0) * 2.5 or None
    drawn_t, drawn_v = decimate(t_ms, scores)
    lines = _polylines(frame, drawn_t, drawn_v, gap_ms)
    n_drawn = sum(1 for v in drawn_v if v is not None and math.isfinite(v))
    parts.append(f'<g class="series score-series" data-points="{n_drawn}" data-windows="{len(finite)}">')
    for pts in lines:
        parts.append(f'<polyline class="score-line" points="{pts}"/>')
    parts.append("</g>")
    if peak_i is not None:
        px, py = frame.x(t_ms[peak_i]), frame.y(scores[peak_i])
        parts.append(
            f'<circle class="peak-mark" cx="{px:.1f}" cy="{py:.1f}" r="4">'
            f"<title>highest {escape(format_number(scores[peak_i]))} at {escape(_fmt_utc(t_ms[peak_i]))}</title></circle>"
        )

    lane_top = frame.top + frame.height + 26
    for i, lane in enumerate(lanes):
        y = lane_top + i * lane_h
        parts.append(f'<g class="lane lane-{escape(lane.kind)}" data-spans="{len(lane.spans)}">')
        parts.append(f'<rect class="lane-bg" x="{frame.left}" y="{y:.1f}" width="{frame.width:.1f}" height="{lane_h - 4:.1f}"/>')
        parts.append(f'<text class="lane-label" x="{frame.left - 6:.1f}" y="{y + 11:.1f}" text-anchor="end">{escape(lane.label)}</text>')
        for span in lane.spans:
            x0 = frame.x(max(span.start_ms, t0))
            x1 = frame.x(min(span.end_ms, t1))
            parts.append(
                f'<rect class="lane-span span-{escape(span.kind)}" x="{x0:.1f}" y="{y:.1f}" width="{max(x1 - x0, 3):.1f}" '
                f'height="{lane_h - 4:.1f}"><title>{escape(span.label or span.kind)}</title></rect>'
            )
        parts.append("</g>")
    axis_label = "score (log scale)" if use_log else "score"
    parts.append(f'<text class="axis-label" x="4" y="{frame.top + 2:.0f}" transform="rotate(90 4 {frame.top + 2:.0f})">{axis_label}</text>')
    parts.append("</svg>")
    return Markup("".join(parts))


def contribution_bars(
    *,
    shares: Sequence[tuple[str, float]],
    limit: int = 8,
    title: str = "Channel contributions",
    width: int = 480,
) -> Markup:
    """Horizontal bars of each channel's share of the residual, largest first.

    Shares are fractions (they need not sum to exactly 1); channels past `limit` are
    summed into one "other channels" bar.
    """
    items = sorted(((str(n), float(s)) for n, s in shares if s is not None and math.isfinite(s)), key=lambda p: -p[1])
    if not items:
        return _empty(width, 80, title, "No contribution figures for this window", "bars-chart")
    if len(items) > limit:
        rest = sum(s for _, s in items[limit - 1 :])
        items = items[: limit - 1] + [(f"{len(items) - limit + 1} other channels", rest)]
    row_h, label_w, pct_w = 26, 150, 56
    height = 10 + row_h * len(items)
    bar_w = width - label_w - pct_w - 12
    top = max(s for _, s in items) or 1.0
    desc = "; ".join(f"{n} {s * 100:.0f}%" for n, s in items)
    parts = _open_svg(width, height, title, desc, "bars-chart")
    for i, (name, share) in enumerate(items):
        y = 6 + i * row_h
        w = max(bar_w * share / top, 1.0)
        css = "bar bar-top" if i == 0 else "bar"
        shown = name if len(name) <= 22 else name[:21] + "…"
        parts.append(f'<g class="bar-row" data-channel="{escape(name)}">')
        parts.append(f'<text class="bar-label" x="{label_w - 8}" y="{y + 16}" text-anchor="end">{escape(shown)}</text>')
        parts.append(f'<rect class="bar-track" x="{label_w}" y="{y + 3}" width="{bar_w:.1f}" height="{row_h - 8}"/>')
        parts.append(
            f'<rect class="{css}" x="{label_w}" y="{y + 3}" width="{w:.1f}" height="{row_h - 8}">'
            f"<title>{escape(name)}: {share * 100:.1f}% of the residual</title></rect>"
        )
        parts.append(f'<text class="bar-value" x="{label_w + bar_w + 8:.1f}" y="{y + 16}">{share * 100:.0f}%</text>')
        parts.append("</g>")
    parts.append("</svg>")
    return Markup("".join(parts))


def readings_chart(
    *,
    traces: Sequence[Trace],
    highlight: Span | None = None,
    t_range: tuple[int, int] | None = None,
    title: str = "Raw readings",
    width: int = 960,
    panel_height: int = 120,
) -> Markup:
    """One panel per channel sharing the time axis, each with its own scale and unit."""
    if not traces or not any(any(v is not None for v in tr.values) for tr in traces):
        return _empty(width, 80, title, "No raw readings stored for this span", "readings-chart")
    all_t = [t for tr in traces for t in tr.t_ms]
    t0, t1 = t_range if t_range else (min(all_t), max(all_t))
    gap = 10.0
    height = int(len(traces) * (panel_height + gap) + 22)
    desc = "; ".join(f"{tr.name} in {tr.unit}, {sum(v is not None for v in tr.values)} readings" for tr in traces)
    parts = _open_svg(width, height, title, f"{desc}; {_fmt_utc(t0)} to {_fmt_utc(t1)}", "readings-chart")
    for i, tr in enumerate(traces):
        vals = [v for v in tr.values if v is not None and math.isfinite(v)]
        lo, hi = (min(vals), max(vals)) if vals else (0.0, 1.0)
        pad = (hi - lo) * 0.08 or (abs(hi) * 0.05 or 1.0)
        top = 8 + i * (panel_height + gap)
        frame = _Frame(
            left=PLOT_LEFT, top=top, width=width - PLOT_LEFT - PLOT_RIGHT, height=panel_height - 8, t0=t0, t1=t1, y0=lo - pad, y1=hi + pad
        )
        parts.append(f'<g class="panel" data-channel="{escape(tr.name)}" data-readings="{len(vals)}">')
        parts.append(f'<rect class="plot-bg" x="{frame.left}" y="{frame.top}" width="{frame.width:.1f}" height="{frame.height:.1f}"/>')
        if highlight:
            x0, x1 = frame.x(max(highlight.start_ms, t0)), frame.x(min(highlight.end_ms, t1))
            parts.append(
                f'<rect class="span span-{escape(highlight.kind)}" x="{x0:.1f}" y="{frame.top}" width="{max(x1 - x0, 2):.1f}" height="{frame.height:.1f}"/>'
            )
        _value_axis(frame, parts, nice_ticks(frame.y0, frame.y1, 4))
        _time_axis(frame, parts, labels=(i == len(traces) - 1))
        drawn_t, drawn_v = decimate(tr.t_ms, tr.values)
        for pts in _polylines(frame, drawn_t, drawn_v, (_typical_step(tr.t_ms) or 0) * 3 or None):
            parts.append(f'<polyline class="reading-line reading-line-{i}" points="{pts}"/>')
        right = frame.left + frame.width
        parts.append(f'<text class="panel-name" x="{right + 8:.1f}" y="{frame.top + 16:.1f}">{escape(_clip(tr.name, 17))}</text>')
        parts.append(f'<text class="panel-unit" x="{right + 8:.1f}" y="{frame.top + 34:.1f}">{escape(_clip(tr.unit, 17))}</text>')
        parts.append("</g>")
    parts.append("</svg>")
    return Markup("".join(parts))
