"""The dashboard's SVG charts: well-formed, faithful to the data, escaped."""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET
from datetime import datetime, timezone

import pytest

from service.web import charts
from service.web.charts import Lane, Preview, Span, Trace

SVG = "{http://www.w3.org/2000/svg}"
T0 = int(datetime(2026, 3, 2, 6, 0, tzinfo=timezone.utc).timestamp() * 1000)
STEP = 60_000


def parse(markup: str) -> ET.Element:
    return ET.fromstring(str(markup))


def points_of(root: ET.Element, css: str) -> list[list[tuple[float, float]]]:
    lines = [el for el in root.iter(f"{SVG}polyline") if css in el.get("class", "").split()]
    return [[tuple(map(float, p.split(","))) for p in el.get("points").split()] for el in lines]


def level_y(root: ET.Element, css: str) -> float:
    (line,) = [el for el in root.iter(f"{SVG}line") if css in el.get("class", "").split()]
    assert line.get("y1") == line.get("y2")
    return float(line.get("y1"))


def test_score_chart_draws_every_point_in_time_order_and_levels_in_place() -> None:
    scores = [0.2, 0.3, 0.25, 1.4, 2.6, 1.1, 0.3]
    t = [T0 + i * STEP for i in range(len(scores))]
    root = parse(charts.score_chart(t_ms=t, scores=scores, warning=1.0, critical=2.0, highlight=Span(t[3], t[5])))
    (line,) = points_of(root, "score-line")
    assert len(line) == len(scores)
    xs = [p[0] for p in line]
    assert xs == sorted(xs) and len(set(xs)) == len(xs)
    # SVG y grows downwards: a higher score sits higher on the page.
    ys = [p[1] for p in line]
    assert ys[4] < ys[3] < ys[0]
    warn_y, crit_y = level_y(root, "level-warning"), level_y(root, "level-critical")
    assert crit_y < warn_y
    # The 2.6 point is above the critical line, the 1.4 point between the two lines.
    assert ys[4] < crit_y < ys[3] < warn_y
    (shade,) = [el for el in root.iter(f"{SVG}rect") if "span-alert" in el.get("class", "")]
    x0, w = float(shade.get("x")), float(shade.get("width"))
    assert x0 == pytest.approx(xs[3], abs=0.11) and x0 + w == pytest.approx(xs[5], abs=0.2)
    assert root.find(f".//{SVG}g[@data-points='7']") is not None


def test_missing_windows_break_the_score_line() -> None:
    t = [T0 + i * STEP for i in range(5)] + [T0 + (20 + i) * STEP for i in range(5)]
    root = parse(charts.score_chart(t_ms=t, scores=[0.5] * 10, warning=1.0, critical=2.0))
    runs = points_of(root, "score-line")
    assert [len(r) for r in runs] == [5, 5]


def test_every_score_chart_uses_one_log_scale_so_levels_stay_apart() -> None:
    """One scale rule (service/web/charts.py): log whatever the peak, so two alerts' charts
    never switch between log and linear, and the levels stay apart under a large peak."""
    t = [T0 + i * STEP for i in range(5)]
    big = charts.score_chart(t_ms=t, scores=[0.4, 0.5, 0.6, 400.0, 0.5], warning=1.0, critical=2.0)
    small = charts.score_chart(t_ms=t, scores=[0.4, 0.5, 1.6, 1.8, 0.5], warning=1.0, critical=2.0)
    assert "score (log scale)" in str(big) and "score (log scale)" in str(small)
    root = parse(big)
    gap_px = level_y(root, "level-warning") - level_y(root, "level-critical")
    # On a linear axis up to 400 the two levels would be under 1 px apart.
    assert gap_px > 10


def test_preview_draws_proposed_levels_and_lanes() -> None:
    t = [T0 + i * STEP for i in range(30)]
    scores = [0.5 + 0.05 * i for i in range(30)]
    lanes = [
        Lane("recorded", [Span(t[2], t[6], "false_alarm", "alert 4: false alarm")]),
        Lane("proposed", [Span(t[20], t[29], "proposed"), Span(t[8], t[9], "proposed")], kind="proposed"),
    ]
    root = parse(charts.score_chart(t_ms=t, scores=scores, warning=1.0, critical=2.0, preview=Preview(1.5, 2.5), lanes=lanes))
    proposed = [el for el in root.iter(f"{SVG}line") if "level-proposed" in el.get("class", "").split()]
    assert len(proposed) == 2
    assert float(proposed[0].get("y1")) < level_y(root, "level-warning")
    spans = {g.get("class"): g.get("data-spans") for g in root.iter(f"{SVG}g") if "lane" in g.get("class", "").split()}
    assert spans == {"lane lane-recorded": "1", "lane lane-proposed": "2"}


def test_text_is_escaped() -> None:
    nasty = '<script>alert("x")</script>'
    markup = str(charts.contribution_bars(shares=[(nasty, 0.7), ("flow_m3h", 0.3)]))
    assert "<script>" not in markup
    parse(markup)  # still well-formed
    tr = Trace(name=nasty, unit="<b>bar</b>", t_ms=[T0, T0 + STEP], values=[1.0, 2.0])
    markup = str(charts.readings_chart(traces=[tr]))
    assert "<script>" not in markup and "<b>" not in markup
    parse(markup)
    lane = Lane(nasty, [Span(T0, T0 + STEP, "x", nasty)])
    markup = str(charts.score_chart(t_ms=[T0, T0 + STEP], scores=[1.0, 2.0], warning=1.0, critical=2.0, lanes=[lane]))
    assert "<script>" not in markup


def test_contribution_bars_sorted_and_rest_folded_into_one_bar() -> None:
    shares = [(f"ch{i}", w) for i, w in enumerate([0.05, 0.4, 0.1, 0.2, 0.05, 0.05, 0.05, 0.05, 0.05])]
    root = parse(charts.contribution_bars(shares=shares, limit=4))
    rows = [g.get("data-channel") for g in root.iter(f"{SVG}g") if g.get("class") == "bar-row"]
    assert rows == ["ch1", "ch3", "ch2", "6 other channels"]
    widths = [float(r.get("width")) for r in root.iter(f"{SVG}rect") if r.get("class", "").startswith("bar") and "track" not in r.get("class")]
    assert widths[:3] == sorted(widths[:3], reverse=True)  # the folded bar comes last whatever its size
    assert widths[3] == pytest.approx(widths[0] * 0.3 / 0.4)
    values = [t.text for t in root.iter(f"{SVG}text") if t.get("class") == "bar-value"]
    assert values == ["40%", "20%", "10%", "30%"]


def test_readings_chart_one_panel_per_channel_with_unit_and_gaps() -> None:
    t = [T0 + i * STEP for i in range(6)]
    traces = [
        Trace("discharge_pressure", "bar", t, [5.0, 5.1, None, 5.3, 5.2, 5.0]),
        Trace("bearing_temp", "degC", t, [40.0, 41.0, 42.0, 43.0, 44.0, 45.0]),
    ]
    root = parse(charts.readings_chart(traces=traces, highlight=Span(t[1], t[4])))
    panels = [g for g in root.iter(f"{SVG}g") if g.get("class") == "panel"]
    assert [p.get("data-channel") for p in panels] == ["discharge_pressure", "bearing_temp"]
    assert [p.get("data-readings") for p in panels] == ["5", "6"]
    units = [t.text for t in root.iter(f"{SVG}text") if t.get("class") == "panel-unit"]
    assert units == ["bar", "degC"]
    first = [[tuple(map(float, p.split(","))) for p in el.get("points").split()] for el in panels[0].iter(f"{SVG}polyline")]
    assert [len(r) for r in first] == [2, 3]  # the missing reading splits the line


def test_empty_inputs_say_so() -> None:
    assert "No window scores" in str(charts.score_chart(t_ms=[], scores=[], warning=1.0, critical=2.0))
    assert "No contribution" in str(charts.contribution_bars(shares=[]))
    assert "No raw readings" in str(charts.readings_chart(traces=[]))
    with pytest.raises(ValueError, match="scores has 1"):
        charts.score_chart(t_ms=[T0, T0 + 1], scores=[1.0], warning=1.0, critical=2.0)


@pytest.mark.parametrize("lo,hi", [(0, 1), (0, 7.3), (0.013, 0.021), (-3, 12), (100, 100), (0, 2300)])
def test_nice_ticks_cover_range_with_round_even_steps(lo: float, hi: float) -> None:
    ticks = charts.nice_ticks(lo, hi, 5)
    assert 2 <= len(ticks) <= 12
    steps = {round(b - a, 9) for a, b in zip(ticks, ticks[1:])}
    assert len(steps) == 1
    (step,) = steps
    mantissa = step / 10 ** math.floor(math.log10(step))
    assert round(mantissa, 6) in (1, 2, 2.5, 5)
    assert ticks[0] >= lo - 1e-9 and ticks[0] - lo < step + 1e-9


def test_time_ticks_sit_on_round_utc_times() -> None:
    ticks = charts.time_ticks(T0 + 7 * STEP, T0 + 6 * 3600_000, count=6)
    assert 3 <= len(ticks) <= 7
    for t, _ in ticks:
        assert t % 3600_000 == 0
    assert ticks[0][1] == "02 Mar 07:00" and ticks[1][1] == "08:00"
    days = charts.time_ticks(T0, T0 + 20 * 86400_000, count=6)
    assert all(t % 86400_000 == 0 for t, _ in days)
    assert days[1][0] - days[0][0] == 7 * 86400_000 and days[0][1] == "05 Mar"  # 20 days in <= 6 ticks: weekly


@pytest.mark.parametrize(
    "value,text", [(0, "0"), (1.0, "1"), (0.123456, "0.123"), (12.345, "12.3"), (2500.0, "2500"), (1.5e-5, "< 0.001"),
     (2.5e6, "2.5 million"), (1.69e-42, "< 0.001"), (float("nan"), "–")]
)
def test_format_number(value: float, text: str) -> None:
    assert charts.format_number(value) == text


def test_decimate_keeps_extremes_in_time_order_and_bounds_the_point_count() -> None:
    n = 100_000
    t = [T0 + i * 1000 for i in range(n)]
    values = [math.sin(i / 500) for i in range(n)]
    values[12_345] = 50.0  # a one-sample spike
    values[77_777] = -50.0
    values[40_000:40_010] = [None] * 10
    dt, dv = charts.decimate(t, values, max_points=1000)
    assert len(dt) <= 1000 and dt == sorted(dt)
    kept = [v for v in dv if v is not None]
    assert max(kept) == 50.0 and min(kept) == -50.0
    small_t, small_v = charts.decimate(t[:10], values[:10], max_points=1000)
    assert small_t == t[:10] and small_v == values[:10]


def test_long_series_draws_a_bounded_line_but_counts_every_window() -> None:
    n = 20_000
    t = [T0 + i * STEP for i in range(n)]
    scores = [0.5 + (3.0 if i == 15_000 else 0.0) for i in range(n)]
    root = parse(charts.score_chart(t_ms=t, scores=scores, warning=1.0, critical=2.0))
    group = root.find(f".//{SVG}g[@data-windows='{n}']")
    assert group is not None
    drawn = sum(len(r) for r in points_of(root, "score-line"))
    assert drawn == int(group.get("data-points")) <= charts.MAX_DRAWN_POINTS
    assert min(p[1] for r in points_of(root, "score-line") for p in r) < level_y(root, "level-critical")  # the spike survives


def test_level_labels_keep_the_lines_order_and_do_not_overlap() -> None:
    """Levels close together (warning 54.6, critical 74.3 under a peak of 8000 on a log axis):
    the critical label must sit above the warning label, as its line does, and 12 px apart."""
    t = [T0 + i * STEP for i in range(20)]
    scores = [3.0] * 8 + [8000.0] * 4 + [3.0] * 8
    root = parse(charts.score_chart(t_ms=t, scores=scores, warning=54.6, critical=74.3, preview=Preview(43.7, 59.4)))
    labels = {el.text.split()[0] + (" " + el.text.split()[1] if el.text.startswith("new") else ""): float(el.get("y"))
              for el in root.iter(f"{SVG}text") if "level-label" in el.get("class", "")}
    assert set(labels) == {"critical", "warning", "new warn", "new crit"}
    # Lines from top to bottom: critical 74.3, new crit 59.4, warning 54.6, new warn 43.7.
    order = sorted(labels, key=labels.get)
    assert order == ["critical", "new crit", "warning", "new warn"], labels
    ys = sorted(labels.values())
    assert all(b - a >= 12 - 1e-9 for a, b in zip(ys, ys[1:]))


def test_spread_labels_moves_little_and_stays_in_bounds() -> None:
    assert charts.spread_labels([50.0, 100.0], gap=12, top=0, bottom=200) == [50.0, 100.0]  # apart already: untouched
    assert charts.spread_labels([100.0, 95.0], gap=12, top=0, bottom=200) == [107.0, 95.0]  # order kept, pushed apart
    assert charts.spread_labels([199.0, 198.0, 197.0], gap=12, top=0, bottom=200) == [200.0, 188.0, 176.0]  # pushed up from the bottom
    assert charts.spread_labels([], gap=12, top=0, bottom=10) == []


@pytest.mark.parametrize("value,text", [(1000.0, "1000"), (10000.0, "10k"), (250000.0, "250k"), (1e6, "1M"), (0.1, "0.1")])
def test_tick_text_shortens_large_values(value: float, text: str) -> None:
    assert charts.tick_text(value) == text
