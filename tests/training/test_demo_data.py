"""The invented demo fleet: determinism, labelled faults, physical coupling, CLI."""

from __future__ import annotations

from collections import Counter
from pathlib import Path

import numpy as np
import pytest

from service.cli import main
from training import demo_data as dd
from training.logs import read_events, read_logs

DAY = 86400.0


@pytest.fixture(scope="module")
def fleet() -> dd.DemoData:
    return dd.generate()  # the default run: 6 pumps, 42 days, seed 7


def _normal_mask(demo: dd.DemoData, asset: str, pad_s: float = 6 * 3600.0) -> np.ndarray:
    t = demo.times_s[asset]
    ok = np.ones(len(t), dtype=bool)
    for e in demo.events:
        if e.asset == asset:
            ok &= ~((t >= e.start_s - pad_s) & (t < e.end_s + pad_s))
    return ok


def _during(demo: dd.DemoData, e: dd.DemoEvent, lo: float = 0.0, hi: float = 1.0) -> np.ndarray:
    t = 60.0 * np.round(demo.times_s[e.asset] / 60.0)  # faults act on grid minutes; readings carry clock jitter
    span = e.end_s - e.start_s
    return (t >= e.start_s + lo * span) & (t < e.start_s + hi * span)


def _before(demo: dd.DemoData, e: dd.DemoEvent, hours: float = 6.0) -> np.ndarray:
    t = demo.times_s[e.asset]
    return (t >= e.start_s - hours * 3600.0) & (t < e.start_s)


def test_same_seed_gives_byte_identical_files_and_another_seed_does_not(tmp_path: Path) -> None:
    a, b, c = (tmp_path / n for n in "abc")
    dd.write(dd.generate(assets=2, days=2, seed=5), a)
    dd.write(dd.generate(assets=2, days=2, seed=5), b)
    dd.write(dd.generate(assets=2, days=2, seed=6), c)
    for name in ("readings.csv", "events.csv"):
        assert (a / name).read_bytes() == (b / name).read_bytes()
    assert (a / "readings.csv").read_bytes() != (c / "readings.csv").read_bytes()
    header = (a / "readings.csv").read_text().splitlines()[0]
    assert header == "timestamp,asset,flow_m3h,suction_kpa,discharge_kpa,current_a,bearing_temp_c,vibration_mm_s"
    assert (a / "events.csv").read_text().splitlines()[0] == "asset,start,end,kind"


def test_default_run_shape_and_every_kind_labelled(fleet: dd.DemoData) -> None:
    assert fleet.assets == tuple(f"pump-{i:02d}" for i in range(1, 7))
    assert fleet.start_s == dd.DEFAULT_START_S == 1788220800.0  # 2026-09-01T00:00:00Z
    assert 350_000 < fleet.n_rows < 6 * 42 * 1440  # a few outages remove rows
    kinds = Counter(e.kind for e in fleet.events)
    assert all(kinds[k] >= 2 for k in dd.FAULT_KINDS), kinds
    assert kinds["maintenance"] >= 2
    tail = {e.kind for e in fleet.events if e.start_s >= fleet.start_s + 34 * DAY}
    assert set(dd.FAULT_KINDS) <= tail  # held-out last 8 days see every kind
    assert len({e.asset for e in fleet.events}) == 6
    end = fleet.start_s + 42 * DAY
    for e in fleet.events:
        assert fleet.start_s <= e.start_s < e.end_s <= end
    lines = dd.events_csv_lines(fleet.events)
    assert {line.rsplit(",", 1)[1] for line in lines[1:]} == set(dd.EVENT_KINDS)
    # labelled periods on one pump never overlap
    for a in fleet.assets:
        spans = sorted((e.start_s, e.end_s) for e in fleet.events if e.asset == a)
        assert all(s1 >= e0 for (_, e0), (s1, _) in zip(spans, spans[1:]))


def test_sampling_jitter_missing_values_and_outages(fleet: dd.DemoData) -> None:
    for a in fleet.assets:
        t = fleet.times_s[a]
        offset = t - 60.0 * np.round(t / 60.0)
        assert np.abs(offset).max() <= 4 and np.any(offset != 0)
        assert np.all(np.diff(t) > 0)
    values = np.concatenate([fleet.values[a] for a in fleet.assets])
    assert 0.001 < np.isnan(values).mean() < 0.004  # ~0.2 % dropped fields
    gaps = np.concatenate([np.diff(fleet.times_s[a]) for a in fleet.assets])
    assert 5 <= np.sum(gaps > 180) <= 60  # a few multi-minute outages across the fleet


def test_written_files_read_back_with_the_log_reader(tmp_path: Path) -> None:
    demo = dd.generate(assets=2, days=1, seed=9)
    readings, events = dd.write(demo, tmp_path / "out")
    logs = read_logs(readings)
    assert logs.units == dd.UNITS
    for a in demo.assets:
        np.testing.assert_allclose(logs.assets[a].values, demo.values[a], rtol=0, atol=1e-9)
    assert [(e.asset, e.start_s, e.end_s, e.kind) for e in read_events(events)] == [
        (e.asset, e.start_s, e.end_s, e.kind) for e in demo.events
    ]
    assert not [p for p in (tmp_path / "out").iterdir() if p.name.startswith(".")]  # no temporaries left


def test_normal_vibration_sits_in_iso_10816_class_ii_zones_a_and_b(fleet: dd.DemoData) -> None:
    # ISO 10816-1 class II boundaries A/B 1.12, B/C 2.8 mm/s r.m.s. (from secondary tables, not
    # the standard's text): normal service belongs in A/B, below B/C.
    vib = np.concatenate([fleet.values[a][_normal_mask(fleet, a), 5] for a in fleet.assets])
    vib = vib[np.isfinite(vib)]
    assert np.percentile(vib, 99.9) < 2.8
    assert 1.0 < np.median(vib) < 2.5
    assert np.percentile(vib, 5) > 0.8


def test_physical_coupling_in_normal_service(fleet: dd.DemoData) -> None:
    for a in fleet.assets:
        v = fleet.values[a][_normal_mask(fleet, a)]
        v = v[np.all(np.isfinite(v), axis=1)]
        flow, suction, discharge, current, temp = v[:, 0], v[:, 1], v[:, 2], v[:, 3], v[:, 4]
        head_kpa = discharge - suction
        # pump curve: head falls with flow squared (fit head = h0 - k Q^2 with k > 0, good fit)
        k, h0 = np.polyfit(flow**2, head_kpa, 1)
        assert k < 0 and np.corrcoef(flow**2, head_kpa)[0, 1] < -0.95
        assert np.corrcoef(flow, current)[0, 1] > 0.95  # current follows hydraulic power
        # bearing temperature lags the load: best correlation with current some 10-90 min earlier
        lags = list(range(0, 120, 5))
        corr = [np.corrcoef(current[: len(current) - lag], temp[lag:])[0, 1] for lag in lags]
        assert 10 <= lags[int(np.argmax(corr))] <= 90


def test_daily_cycle_has_morning_and_evening_peaks(fleet: dd.DemoData) -> None:
    t = fleet.times_s["pump-01"]
    flow = fleet.values["pump-01"][:, 0]
    ok = _normal_mask(fleet, "pump-01") & np.isfinite(flow)
    hour = (t[ok] / 3600.0) % 24
    weekday = ((np.floor(t[ok] / DAY).astype(int) + 3) % 7) < 5
    by_hour = np.array([np.median(flow[ok][weekday & (np.floor(hour) == h)]) for h in range(24)])
    assert by_hour[6:9].max() > 2.5 * by_hour[2:5].min()  # morning peak over the night trough
    assert by_hour[18:21].max() > 2.0 * by_hour[2:5].min()  # evening peak
    assert by_hour[10:11].max() < by_hour[6:9].max()  # a dip between the peaks


def test_each_fault_kind_is_visible(fleet: dd.DemoData) -> None:
    c = {name: j for j, name in enumerate(dd.CHANNELS)}
    for e in fleet.events:
        v = fleet.values[e.asset]
        before = np.nanmedian(v[_before(fleet, e)], axis=0)
        if e.kind == "bearing_wear":
            late = np.nanmedian(v[_during(fleet, e, 0.9, 1.0)], axis=0)
            assert late[c["vibration_mm_s"]] > 1.6 * before[c["vibration_mm_s"]]
            assert late[c["vibration_mm_s"]] < 7.1  # below ISO 10816-1 class II C/D (secondary tables)
        elif e.kind == "cavitation":
            inside = v[_during(fleet, e, 0.2, 1.0)]
            assert np.nanmedian(inside[:, c["suction_kpa"]]) < before[c["suction_kpa"]] - 30.0
            assert np.nanstd(inside[:, c["vibration_mm_s"]]) > 3 * np.nanstd(v[_before(fleet, e), c["vibration_mm_s"]])
        elif e.kind == "impeller_clog":
            # flow per ampere drops: same current pattern, less water
            inside = v[_during(fleet, e, 0.2, 1.0)]
            ratio_in = np.nanmedian(inside[:, c["flow_m3h"]] / inside[:, c["current_a"]])
            ratio_before = np.nanmedian(v[_before(fleet, e, 24), c["flow_m3h"]] / v[_before(fleet, e, 24), c["current_a"]])
            assert ratio_in < 0.9 * ratio_before
        elif e.kind == "stuck_sensor":
            col = v[_during(fleet, e), c[e.channel]]  # type: ignore[index]
            assert len(np.unique(col[np.isfinite(col)])) == 1
        elif e.kind == "spikes":
            col = v[_during(fleet, e), c[e.channel]]  # type: ignore[index]
            base = v[_before(fleet, e, 2), c[e.channel]]  # type: ignore[index]
            jumps = np.abs(np.diff(col[np.isfinite(col)]))
            assert np.sum(jumps > 8 * np.nanmedian(np.abs(np.diff(base))) + 1e-9) >= 6
        elif e.kind == "maintenance":
            inside = v[_during(fleet, e)]
            assert np.nanmax(inside[:, c["flow_m3h"]]) < 1.0 and np.nanmax(inside[:, c["current_a"]]) < 0.5


@pytest.mark.parametrize("channel", ["bearing_temp_c", "discharge_kpa"])
def test_calibration_drift_is_an_offset_growing_over_the_period(channel: str) -> None:
    t0 = dd.DEFAULT_START_S
    drift = dd.PlannedFault("pump-01", "calibration_drift", t0 + DAY, t0 + 5 * DAY, channel=channel, severity=0.5)
    faulty = dd.generate(assets=1, days=6, fault_plan=[drift], outages=False)
    clean = dd.generate(assets=1, days=6, fault_plan=[], outages=False)
    j = dd.CHANNELS.index(channel)
    offset = faulty.values["pump-01"][:, j] - clean.values["pump-01"][:, j]  # same noise, same physics
    t = 60.0 * np.round(faulty.times_s["pump-01"] / 60.0)
    outside = (t < drift.start_s) | (t >= drift.end_s)
    assert np.nanmax(np.abs(offset[outside])) < 1e-9
    final = np.nanmedian(np.abs(offset[(t >= drift.end_s - 3600) & (t < drift.end_s)]))
    typical = np.nanmedian(clean.values["pump-01"][:, j])
    assert final == pytest.approx(5.0 if channel == "bearing_temp_c" else 0.09 * typical, rel=0.05)
    daily = [np.nanmedian(np.abs(offset[(t >= drift.start_s + d * DAY) & (t < drift.start_s + (d + 1) * DAY)])) for d in range(4)]
    assert np.all(np.diff(daily) > 0)


def test_pump_parameters_do_not_depend_on_the_stretch() -> None:
    assert dd.pump_params(7, 3) == dd.pump_params(7, 3) != dd.pump_params(8, 3)
    day = dd.DEFAULT_START_S + 10 * DAY
    short = dd.generate(assets=3, days=1, seed=7, start=day, fault_plan=[], outages=False)
    longer = dd.generate(assets=3, days=3, seed=7, start=day - DAY, fault_plan=[], outages=False)
    for a in short.assets:
        same_day = (longer.times_s[a] >= day - 30) & (longer.times_s[a] < day + DAY - 30)
        m_short = np.nanmedian(short.values[a], axis=0)
        m_long = np.nanmedian(longer.values[a][same_day], axis=0)
        np.testing.assert_allclose(m_short, m_long, rtol=0.03)


def test_demo_day_has_normal_hours_then_clear_faults() -> None:
    day = dd.demo_day()
    assert day.start_s == dd.DEMO_DAY_START_S == dd.DEFAULT_START_S + 42 * DAY
    assert 1 <= len(day.events) <= 2
    assert all(e.kind in dd.FAULT_KINDS for e in day.events)
    assert min(e.start_s for e in day.events) >= day.start_s + 6 * 3600  # several normal hours first
    assert max(e.end_s for e in day.events) <= day.start_s + DAY
    assert all(np.all(np.diff(day.times_s[a]) < 120) for a in day.assets)  # no outages in the replay


def test_fault_plan_is_checked() -> None:
    t0 = dd.DEFAULT_START_S
    plan = [dd.PlannedFault("pump-01", "stuck_sensor", t0 + 3600, t0 + 7200, channel="flow_m3h")]
    demo = dd.generate(assets=1, days=0.25, fault_plan=plan)
    assert [(e.kind, e.channel) for e in demo.events] == [("stuck_sensor", "flow_m3h")]
    with pytest.raises(ValueError, match="pump-07"):
        dd.generate(assets=2, days=1, fault_plan=[dd.PlannedFault("pump-07", "spikes", t0, t0 + 600)])
    with pytest.raises(ValueError, match="kind 'leak'"):
        dd.generate(assets=1, days=1, fault_plan=[dd.PlannedFault("pump-01", "leak", t0, t0 + 600)])
    with pytest.raises(ValueError, match="cannot act on 'bearing_temp_c'"):
        dd.generate(assets=1, days=1, fault_plan=[dd.PlannedFault("pump-01", "spikes", t0, t0 + 600, "bearing_temp_c")])
    with pytest.raises(ValueError, match="scenario"):
        dd.generate(scenario="holiday")


def test_cli_writes_the_files_and_reports_bad_options(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["demo-data", "--out", str(tmp_path / "d"), "--assets", "2", "--days", "1", "--seed", "3"]) == 0
    assert "wrote" in capsys.readouterr().out
    assert (tmp_path / "d" / "readings.csv").read_bytes() == b"\n".join(
        line.encode() for line in dd.readings_csv_lines(dd.generate(assets=2, days=1, seed=3))
    ) + b"\n"
    assert main(["demo-data", "--out", str(tmp_path / "e"), "--assets", "0"]) == 2
    assert "assets must be 1..99" in capsys.readouterr().err
    assert main(["demo-data", "--out", str(tmp_path / "e"), "--start", "1 Oct 2026"]) == 2
    assert "cannot be parsed" in capsys.readouterr().err
    assert not (tmp_path / "e").exists()


def test_cli_reads_a_start_without_offset_as_utc(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """The invented district keeps UTC: a date or a naive time is UTC (it used to ask for a zone it had no option for)."""
    for start in ("2026-10-01", "2026-10-01T00:00:00"):
        assert main(["demo-data", "--out", str(tmp_path / "d"), "--assets", "1", "--days", "0.1", "--start", start]) == 0
        first = (tmp_path / "d" / "readings.csv").read_text().splitlines()[1]
        assert first.startswith("2026-10-01T00:00:") and first.split(",")[0].endswith("Z")
    capsys.readouterr()


def test_cli_demo_day_ends_at_the_current_minute(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """So that after a replay the assets read as reporting, not silent for weeks."""
    import time

    assert main(["demo-data", "--out", str(tmp_path / "d"), "--assets", "1", "--scenario", "demo_day"]) == 0
    last = (tmp_path / "d" / "readings.csv").read_text().splitlines()[-1].split(",")[0]
    from service.grid import parse_timestamp

    assert 0 < time.time() - parse_timestamp(last) < 600
    capsys.readouterr()
