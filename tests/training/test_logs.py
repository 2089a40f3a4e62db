"""Reading logs and event lists: layouts, formats, time zones, units and every bad input."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

pa = pytest.importorskip("pyarrow")
pq = pytest.importorskip("pyarrow.parquet")

from service.grid import parse_timestamp  # noqa: E402
from training import demo_data  # noqa: E402
from training.logs import DataError, from_arrays, parse_units, read_events, read_logs, unit_from_suffix  # noqa: E402

HEADER = "timestamp,asset,flow_m3h,suction_kpa"


@pytest.fixture(scope="module")
def demo_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("demo")
    demo_data.write(demo_data.generate(assets=2, days=1.5, seed=3), out)
    return out


def _write(tmp_path: Path, text: str, name: str = "log.csv") -> Path:
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def _long_rows(path: Path) -> list[str]:
    """The wide file's readings re-laid as timestamp,asset,channel,value,unit (empty values dropped)."""
    lines = path.read_text().splitlines()
    channels = lines[0].split(",")[2:]
    out = ["timestamp,asset,channel,value,unit"]
    for line in lines[1:]:
        ts, asset, *vals = line.split(",")
        for ch, v in zip(channels, vals):
            if v:
                out.append(f"{ts},{asset},{ch},{v},{demo_data.UNITS[ch]}")
    return out


def _same(a, b) -> None:  # type: ignore[no-untyped-def]
    assert a.channels == b.channels and a.units == b.units and a.asset_ids == b.asset_ids
    for name in a.assets:
        np.testing.assert_array_equal(a.assets[name].times_s, b.assets[name].times_s)
        np.testing.assert_array_equal(a.assets[name].values, b.assets[name].values)


# ---------------------------------------------------------------------------- layouts and formats


def test_wide_csv_reads_back_the_generated_arrays(demo_dir: Path) -> None:
    demo = demo_data.generate(assets=2, days=1.5, seed=3)
    logs = read_logs(demo_dir / "readings.csv")
    assert logs.layout == "wide" and logs.channels == demo_data.CHANNELS
    assert logs.units == demo_data.UNITS  # inferred from the name suffixes
    assert logs.n_rows == demo.n_rows and len(logs.sha256) == 64
    for a in demo.assets:
        np.testing.assert_array_equal(logs.assets[a].times_s, demo.times_s[a])
        np.testing.assert_allclose(logs.assets[a].values, demo.values[a], rtol=0, atol=1e-9)
        assert np.all(np.diff(logs.assets[a].times_s) > 0)


def test_wide_long_csv_and_parquet_give_identical_arrays(demo_dir: Path, tmp_path: Path) -> None:
    wide = read_logs(demo_dir / "readings.csv")
    long_path = _write(tmp_path, "\n".join(_long_rows(demo_dir / "readings.csv")) + "\n", "long.csv")
    long = read_logs(long_path)
    assert long.layout == "long"
    _same(wide, long)

    table = pa.csv.read_csv(demo_dir / "readings.csv")  # typed columns: numbers as float64
    pq.write_table(table, tmp_path / "wide.parquet")
    _same(wide, read_logs(tmp_path / "wide.parquet"))
    long_table = pa.csv.read_csv(long_path, convert_options=pa.csv.ConvertOptions(column_types={"timestamp": pa.string()}))
    pq.write_table(long_table, tmp_path / "long.parquet")
    _same(wide, read_logs(tmp_path / "long.parquet"))
    # A Parquet timestamp column with a zone, and one with epoch seconds.
    ts = pa.array(wide.assets["pump-01"].times_s * 1e6, pa.int64()).cast(pa.timestamp("us", tz="UTC"))
    v = wide.assets["pump-01"].values
    cols = {"timestamp": ts, "asset": ["pump-01"] * len(v)} | {c: v[:, j] for j, c in enumerate(wide.channels)}
    pq.write_table(pa.table(cols), tmp_path / "typed.parquet")
    typed = read_logs(tmp_path / "typed.parquet")
    np.testing.assert_array_equal(typed.assets["pump-01"].times_s, wide.assets["pump-01"].times_s)
    cols["timestamp"] = wide.assets["pump-01"].times_s
    pq.write_table(pa.table(cols), tmp_path / "epoch.parquet")
    np.testing.assert_array_equal(read_logs(tmp_path / "epoch.parquet").assets["pump-01"].values, v)


def test_epoch_seconds_offsets_and_z_agree(tmp_path: Path) -> None:
    text = (
        f"{HEADER}\n"
        "2026-09-01T00:00:00Z,p1,1,2\n"
        "2026-09-01T02:01:00+02:00,p1,2,3\n"
        "1788220920,p1,3,4\n"
        "1788220980.5,p1,4,5\n"
        "2026-09-01 00:04:00.25Z,p1,5,6\n"
        "2026-09-01T01:05:00+0100,p1,6,7\n"  # not on the fast path: the scalar rules read it
    )
    logs = read_logs(_write(tmp_path, text))
    t0 = parse_timestamp("2026-09-01T00:00:00Z")
    np.testing.assert_array_equal(logs.assets["p1"].times_s - t0, [0, 60, 120, 180.5, 240.25, 300])


def test_naive_timestamps_refused_without_tz_and_placed_with_it(tmp_path: Path) -> None:
    p = _write(tmp_path, f"{HEADER}\n2026-07-01T12:00:00Z,p1,1,2\n2026-07-01T12:01:00,p1,1,3\n")
    with pytest.raises(DataError, match=r"line 3, column 'timestamp'.*no UTC offset"):
        read_logs(p)
    p = _write(tmp_path, f"{HEADER}\n2026-07-01T12:00:00,p1,1,2\n2026-01-15T12:00:00,p1,2,3\n")
    logs = read_logs(p, tz="Europe/Berlin")
    # CEST is UTC+2 in July, CET UTC+1 in January (from memory).
    assert logs.assets["p1"].times_s.tolist() == [
        parse_timestamp("2026-01-15T11:00:00Z"),
        parse_timestamp("2026-07-01T10:00:00Z"),
    ]
    with pytest.raises(DataError, match="unknown time zone"):
        read_logs(p, tz="Nowhere/Atlantis")


_local = st.datetimes(
    min_value=__import__("datetime").datetime(2025, 1, 1), max_value=__import__("datetime").datetime(2027, 12, 31)
)


@settings(max_examples=40, deadline=None)
@given(
    stamps=st.lists(_local, min_size=2, max_size=20, unique=True),
    zone=st.sampled_from(["UTC", "Europe/Berlin", "America/New_York", "Australia/Lord_Howe", "Asia/Kolkata"]),
    style=st.sampled_from(["naive", "offset", "z"]),
)
def test_vectorised_times_match_the_scalar_parser(tmp_path_factory, stamps, zone, style) -> None:  # type: ignore[no-untyped-def]
    """The fast path must agree with service.grid.parse_timestamp (the one definition), DST days included."""
    if style == "naive":
        texts = [d.isoformat(timespec="seconds") for d in stamps]
    elif style == "offset":
        texts = [d.isoformat(timespec="microseconds") + "+05:30" for d in stamps]
    else:
        texts = [d.strftime("%Y-%m-%d %H:%M") + "Z" for d in stamps]
    expected = [parse_timestamp(t, zone) for t in texts]
    if len(set(expected)) != len(expected):
        return  # two wall-clock times that map to one instant (DST fall-back) would be duplicates
    body = "".join(f"{t},p1,{i},{i % 2}\n" for i, t in enumerate(texts))
    path = tmp_path_factory.mktemp("tz") / "t.csv"
    path.write_text(f"{HEADER}\n{body}")
    logs = read_logs(path, tz=zone)
    assert logs.assets["p1"].times_s.tolist() == sorted(expected)


# ---------------------------------------------------------------------------- units


def test_units_from_suffix_argument_and_unit_column(tmp_path: Path) -> None:
    assert unit_from_suffix("vibration_mm_s") == "mm/s"  # the longest suffix wins
    assert unit_from_suffix("shaft_rad_s") == "rad/s" and unit_from_suffix("level_m") == "m"
    assert unit_from_suffix("speed") is None and unit_from_suffix("_a") is None
    p = _write(tmp_path, "timestamp,asset,speed,flow_m3h\n0,p1,1450,2\n60,p1,1460,3\n")
    with pytest.raises(DataError, match=r"channel 'speed' has no unit.*--units speed=UNIT"):
        read_logs(p)
    assert read_logs(p, units=parse_units("speed=rpm")).units == {"speed": "rpm", "flow_m3h": "m3/h"}
    with pytest.raises(DataError, match=r"units given for pressure"):
        read_logs(p, units={"speed": "rpm", "pressure": "kPa"})
    lp = _write(tmp_path, "timestamp,asset,channel,value,unit\n0,p1,speed,1450,rpm\n60,p1,speed,1460,rpm\n", "l.csv")
    assert read_logs(lp).units == {"speed": "rpm"}
    with pytest.raises(DataError, match=r"channel 'speed': the file's unit column says 'rpm' but 'Hz'"):
        read_logs(lp, units={"speed": "Hz"})
    lp2 = _write(tmp_path, "timestamp,asset,channel,value,unit\n0,p1,speed,1450,rpm\n60,p1,speed,24,Hz\n", "l2.csv")
    with pytest.raises(DataError, match=r"channel 'speed' is given in several units: Hz, rpm"):
        read_logs(lp2)
    with pytest.raises(DataError, match="CHANNEL=UNIT"):
        parse_units("speed")


# ---------------------------------------------------------------------------- bad input


@pytest.mark.parametrize(
    ("text", "pattern"),
    [
        ("", r"empty file"),
        (f"{HEADER}\n", r"no data rows"),
        ("time,asset,flow_m3h\n0,p1,1\n", r"missing required column\(s\) timestamp.*found time, asset, flow_m3h"),
        ("timestamp,flow_m3h\n0,1\n", r"missing required column\(s\) asset"),
        ("timestamp,asset\n0,p1\n", r"no channel columns"),
        ("timestamp,asset,flow_m3h,flow_m3h\n0,p1,1,2\n", r"repeats column\(s\) flow_m3h"),
        ("timestamp,asset,flow_m3h,value\n0,p1,1,2\n", r"mixes the layouts"),
        (f"{HEADER}\n0,p1,1,2\n60,p1,abc,3\n", r"line 3, column 'flow_m3h': 'abc' is not a number"),
        (f"{HEADER}\n0,p1,1,2\n60,p1,4,inf\n", r"line 3, column 'suction_kpa': inf is not a finite number"),
        (f"{HEADER}\n0,p1,1,2\n60,p1,1\n", r"line 3 has 3 fields, the header has 4"),
        (f"{HEADER}\n0,p1,1,2\nsoon,p1,1,3\n", r"line 3, column 'timestamp': 'soon' cannot be parsed"),
        (f"{HEADER}\n0,p1,1,2\n2026-02-30T00:00:00Z,p1,1,3\n", r"line 3, column 'timestamp'.*cannot be parsed"),
        (f"{HEADER}\n0,p1,1,2\n,p1,1,3\n", r"line 3, column 'timestamp': missing timestamp"),
        (f"{HEADER}\n0,p1,1,2\n60,,1,3\n", r"line 3, column 'asset': missing asset id"),
        (
            f"{HEADER}\n0,p1,1,2\n60,p2,1,3\n120,p1,2,4\n0,p1,5,5\n",
            r"asset 'p1': duplicate timestamp 1970-01-01T00:00:00Z at line 2 and line 5",
        ),
        (f"{HEADER}\n0,p1,,2\n60,p1,,3\n120,p2,1,4\n", r"channel 'flow_m3h' of asset 'p1' has no values \(all 2 readings"),
        (f"{HEADER}\n0,p1,4,2\n60,p1,4,3\n120,p2,4,4\n", r"channel 'flow_m3h' is constant \(4 in every reading\)"),
    ],
)
def test_bad_wide_csv(tmp_path: Path, text: str, pattern: str) -> None:
    p = _write(tmp_path, text)
    with pytest.raises(DataError, match=pattern) as info:
        read_logs(p)
    assert str(p) in str(info.value)


@pytest.mark.parametrize(
    ("text", "pattern"),
    [
        (
            "timestamp,asset,channel,value\n0,p1,flow_m3h,1\n60,p1,flow_m3h,2\n0,p1,flow_m3h,3\n",
            r"asset 'p1', channel 'flow_m3h': duplicate timestamp .* at line 2 and line 4",
        ),
        ("timestamp,asset,channel,value\n0,p1,flow_m3h,1\n60,p1,,2\n", r"line 3, column 'channel': missing channel name"),
        ("timestamp,asset,channel,value\n0,p1,flow_m3h,1\n60,p1,flow_m3h,x\n", r"line 3, column 'value': 'x' is not a number"),
        ("timestamp,asset,channel,value,site\n0,p1,flow_m3h,1,a\n", r"unknown column\(s\) 'site' in the long layout"),
    ],
)
def test_bad_long_csv(tmp_path: Path, text: str, pattern: str) -> None:
    with pytest.raises(DataError, match=pattern):
        read_logs(_write(tmp_path, text))


def test_channels_argument_requires_exactly_those_channels_in_that_order(tmp_path: Path) -> None:
    p = _write(tmp_path, f"{HEADER}\n0,p1,1,2\n60,p1,2,4\n")
    logs = read_logs(p, channels=["suction_kpa", "flow_m3h"])
    assert logs.channels == ("suction_kpa", "flow_m3h")
    np.testing.assert_array_equal(logs.assets["p1"].values, [[2, 1], [4, 2]])
    with pytest.raises(DataError, match=r"missing column\(s\) for channel\(s\) current_a"):
        read_logs(p, channels=["flow_m3h", "suction_kpa", "current_a"])
    with pytest.raises(DataError, match=r"unknown column\(s\) 'suction_kpa': expected only the channels flow_m3h"):
        read_logs(p, channels=["flow_m3h"])


def test_parquet_errors_name_the_row(tmp_path: Path) -> None:
    pq.write_table(pa.table({"timestamp": [0.0, 60.0, 60.0], "asset": ["p1"] * 3, "flow_m3h": [1.0, 2.0, 3.0]}), tmp_path / "d.parquet")
    with pytest.raises(DataError, match=r"duplicate timestamp .* at row 2 and row 3"):
        read_logs(tmp_path / "d.parquet")
    pq.write_table(pa.table({"timestamp": ["0", "x"], "asset": ["p1"] * 2, "flow_m3h": [1.0, 2.0]}), tmp_path / "t.parquet")
    with pytest.raises(DataError, match=r"row 2, column 'timestamp'"):
        read_logs(tmp_path / "t.parquet")
    naive = pa.array([0, 60_000_000], pa.int64()).cast(pa.timestamp("us"))
    pq.write_table(pa.table({"timestamp": naive, "asset": ["p1"] * 2, "flow_m3h": [1.0, 2.0]}), tmp_path / "n.parquet")
    with pytest.raises(DataError, match=r"without a time zone"):
        read_logs(tmp_path / "n.parquet")
    assert read_logs(tmp_path / "n.parquet", tz="UTC").assets["p1"].times_s.tolist() == [0.0, 60.0]
    (tmp_path / "bad.parquet").write_bytes(b"not parquet")
    with pytest.raises(DataError, match=r"cannot read as Parquet"):
        read_logs(tmp_path / "bad.parquet")
    with pytest.raises(DataError, match=r"no such file"):
        read_logs(tmp_path / "absent.csv")


def test_from_arrays_checks_like_the_reader() -> None:
    t = {"p1": np.array([60.0, 0.0])}
    logs = from_arrays(t, {"p1": np.array([[1.0], [2.0]])}, ["flow_m3h"], {"flow_m3h": "m3/h"})
    assert logs.assets["p1"].times_s.tolist() == [0.0, 60.0] and logs.assets["p1"].values[:, 0].tolist() == [2.0, 1.0]
    with pytest.raises(DataError, match="constant"):
        from_arrays(t, {"p1": np.array([[1.0], [1.0]])}, ["flow_m3h"], {"flow_m3h": "m3/h"})
    with pytest.raises(DataError, match="duplicate"):
        from_arrays({"p1": np.array([0.0, 0.0])}, {"p1": np.array([[1.0], [2.0]])}, ["flow_m3h"], {"flow_m3h": "m3/h"})


# ---------------------------------------------------------------------------- events


def test_read_events_from_the_demo(demo_dir: Path) -> None:
    events = read_events(demo_dir / "events.csv")
    assert events and all(e.end_s > e.start_s for e in events)
    assert [e.start_s for e in events] == sorted(e.start_s for e in events)


@pytest.mark.parametrize(
    ("text", "pattern"),
    [
        ("asset,start,kind\n", r"missing column\(s\) end"),
        ("asset,start,end,kind,who\n", r"unknown column\(s\) 'who'"),
        ("asset,start,end,kind\np1,2026-09-01T00:00:00Z,2026-09-01T00:00:00Z,x\n", r"line 2: end .* is not after start"),
        ("asset,start,end,kind\np1,2026-09-01T00:00:00Z,later,x\n", r"line 2, column 'end': 'later' cannot be parsed"),
        ("asset,start,end,kind\np1,2026-09-01T00:00:00,2026-09-02T00:00:00Z,x\n", r"line 2, column 'start'.*no UTC offset"),
        ("asset,start,end,kind\n,0,60,x\n", r"line 2, column 'asset': missing asset id"),
        ("asset,start,end,kind\np1,0,60,\n", r"line 2, column 'kind': missing kind"),
        ("asset,start,end,kind\np1,0,60\n", r"line 2 has 3 fields"),
    ],
)
def test_bad_events(tmp_path: Path, text: str, pattern: str) -> None:
    p = _write(tmp_path, text, "events.csv")
    with pytest.raises(DataError, match=pattern) as info:
        read_events(p)
    assert str(p) in str(info.value)


def test_events_naive_accepted_with_tz(tmp_path: Path) -> None:
    p = _write(tmp_path, "asset,start,end,kind,note\np1,2026-09-01T02:00:00,2026-09-01T03:00:00,maintenance,seal\n", "e.csv")
    (e,) = read_events(p, tz="Europe/Berlin")
    assert (e.start_s, e.end_s) == (parse_timestamp("2026-09-01T00:00:00Z"), parse_timestamp("2026-09-01T01:00:00Z"))
