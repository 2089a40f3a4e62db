"""Read equipment logs (CSV or Parquet, wide or long layout) and fault/maintenance event lists.

Layouts, detected from the header:

- wide: `timestamp`, `asset`, then one column per channel;
- long: `timestamp`, `asset`, `channel`, `value`, optionally `unit`.

Timestamps are ISO-8601 with a UTC offset (`2026-09-01T00:00:00Z`, `...+02:00`) or epoch
seconds, with the semantics of `service.grid.parse_timestamp` (vectorised here for speed);
naive timestamps are refused unless `tz` names the zone they were written in. Everything
is UTC epoch seconds inside.

Units come from the long layout's `unit` column, else from the `units` argument, else from
the channel name's suffix (`flow_m3h` -> m3/h, see UNIT_SUFFIXES).

Every user error raises DataError naming the file and the line (CSV, header = line 1) or
row (Parquet, 1-based), the column or the channel, and what would be accepted.
"""

from __future__ import annotations

import csv
import hashlib
import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from service.grid import TimestampError, parse_timestamp, resolve_tz

# Longest suffix wins (vibration_mm_s is mm/s, not s).
UNIT_SUFFIXES: dict[str, str] = {
    "_m3h": "m3/h",
    "_kpa": "kPa",
    "_bar": "bar",
    "_a": "A",
    "_c": "degC",
    "_mm_s": "mm/s",
    "_rpm": "rpm",
    "_hz": "Hz",
    "_pct": "%",
    "_v": "V",
    "_kw": "kW",
    "_m": "m",
    "_s": "s",
    "_g": "g",
    "_rad_s": "rad/s",
}
NULL_TOKENS = ("", "NA", "NaN", "nan", "null", "NULL", "None")
TIME_COLUMN, ASSET_COLUMN = "timestamp", "asset"
LONG_COLUMNS = ("channel", "value")
EVENT_COLUMNS = ("asset", "start", "end", "kind")

_NUMERIC_RE = r"^[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?$"
_DATETIME = r"^\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}(:\d{2}(\.\d{1,6})?)?"
_AWARE_RE = _DATETIME + r"(Z|[+-]\d{2}:\d{2})$"
_NAIVE_RE = _DATETIME + r"$"


class DataError(ValueError):
    """Input data that cannot be used; the message names file, line/row, column or channel."""


@dataclass(frozen=True)
class Event:
    """A labelled period of one asset, epoch seconds UTC, end exclusive."""

    asset: str
    start_s: float
    end_s: float
    kind: str


@dataclass(frozen=True)
class AssetLog:
    """One asset's readings: sorted times (epoch s, UTC) and (N, C) values with NaN = missing."""

    asset: str
    times_s: np.ndarray  # (N,) float64, strictly increasing
    values: np.ndarray  # (N, C) float64
    lines: np.ndarray  # (N,) int64 source line (CSV) or row (Parquet) of each reading


@dataclass(frozen=True)
class LogSet:
    """Logs of several assets sharing one channel list."""

    source: str
    channels: tuple[str, ...]
    units: dict[str, str]
    assets: dict[str, AssetLog]  # by asset id, in sorted order
    sha256: str
    n_rows: int  # data rows read from the source
    layout: str  # "wide", "long" or "arrays"

    @property
    def asset_ids(self) -> tuple[str, ...]:
        return tuple(self.assets)

    @property
    def n_readings(self) -> int:
        return sum(len(a.times_s) for a in self.assets.values())


def unit_from_suffix(channel: str) -> str | None:
    """The unit implied by a channel name's suffix, or None."""
    best = None
    for suffix, unit in UNIT_SUFFIXES.items():
        if channel.lower().endswith(suffix) and len(channel) > len(suffix):
            if best is None or len(suffix) > len(best[0]):
                best = (suffix, unit)
    return best[1] if best else None


def parse_units(text: str) -> dict[str, str]:
    """`flow_m3h=m3/h,speed=rpm` -> {"flow_m3h": "m3/h", "speed": "rpm"} (the CLI's --units)."""
    out: dict[str, str] = {}
    for part in filter(None, (p.strip() for p in text.split(","))):
        name, sep, unit = part.partition("=")
        if not sep or not name.strip() or not unit.strip():
            raise DataError(f"--units: {part!r} is not CHANNEL=UNIT (e.g. flow_m3h=m3/h,speed=rpm)")
        out[name.strip()] = unit.strip()
    return out


def file_sha256(path: str | os.PathLike[str]) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


# ---------------------------------------------------------------------------- reading


class _Source:
    """Names places in the file for messages."""

    def __init__(self, path: Path, parquet: bool) -> None:
        self.path = path
        self.parquet = parquet

    def at(self, i: int) -> str:
        """Row index i (0-based, data rows) as the user sees it."""
        return f"row {i + 1}" if self.parquet else f"line {i + 2}"

    def line_numbers(self, n: int) -> np.ndarray:
        return np.arange(n, dtype=np.int64) + (1 if self.parquet else 2)

    def error(self, text: str) -> DataError:
        return DataError(f"{self.path}: {text}")


def _read_table(path: Path, src: _Source) -> pa.Table:
    if src.parquet:
        import pyarrow.parquet as pq

        try:
            return pq.read_table(path)
        except (pa.ArrowException, OSError) as e:
            raise src.error(f"cannot read as Parquet: {e}") from e
    import pyarrow.csv as pacsv

    try:
        with open(path, newline="", encoding="utf-8") as fh:
            header = next(csv.reader(fh), None)
    except UnicodeDecodeError as e:
        raise src.error(f"not UTF-8 text ({e}); give a UTF-8 CSV or a Parquet file") from e
    if not header:
        raise src.error("empty file: expected a header line such as timestamp,asset,<channel>,...")
    header = [h.strip() for h in header]
    bad_rows: list[str] = []

    def on_invalid(row: pacsv.InvalidRow) -> str:
        where = f"line {row.number}" if row.number is not None else "a line"
        bad_rows.append(f"{where} has {row.actual_columns} fields, the header has {row.expected_columns}")
        return "skip"

    def read(types: dict[str, pa.DataType]) -> pa.Table:
        return pacsv.read_csv(
            path,
            read_options=pacsv.ReadOptions(column_names=header, skip_rows=1, use_threads=True),
            parse_options=pacsv.ParseOptions(invalid_row_handler=on_invalid, ignore_empty_lines=False),
            convert_options=pacsv.ConvertOptions(
                column_types=types,
                null_values=list(NULL_TOKENS),
                strings_can_be_null=True,
                quoted_strings_can_be_null=True,
            ),
        )

    # Numbers straight to float64 and ids dictionary-encoded keeps a big file's memory near
    # its arrays; if any field will not convert, read everything as text so the checks
    # below can name the line and column.
    labels = (ASSET_COLUMN, "channel", "unit")
    typed = {h: pa.string() if h == TIME_COLUMN else pa.dictionary(pa.int32(), pa.string()) if h in labels else pa.float64() for h in header}
    try:
        try:
            table = read(typed)
        except pa.ArrowInvalid:
            if bad_rows:
                raise
            bad_rows.clear()
            table = read({h: pa.string() for h in header})
    except pa.ArrowException as e:
        if not bad_rows:
            raise src.error(f"cannot read as CSV: {e}") from e
    if bad_rows:
        raise src.error(_first_ragged_line(path, len(header)) or bad_rows[0])
    return table


def _first_ragged_line(path: Path, n_fields: int) -> str | None:
    """The first line whose field count differs from the header's (the threaded reader may not know it)."""
    with open(path, newline="", encoding="utf-8") as fh:
        for number, row in enumerate(csv.reader(fh), start=1):
            if number > 1 and len(row) != n_fields:
                return f"line {number} has {len(row)} fields, the header has {n_fields}"
    return None


def _as_strings(col: pa.ChunkedArray) -> pa.ChunkedArray:
    return pc.utf8_trim_whitespace(col.cast(pa.string()))


def _first_true(mask: np.ndarray) -> int:
    return int(np.flatnonzero(mask)[0])


def _parse_numbers(col: pa.ChunkedArray, src: _Source, column: str) -> np.ndarray:
    """float64 values, NaN for missing; refuses text that is not a finite number."""
    t = col.type
    if pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t):
        out = col.cast(pa.float64()).to_numpy(zero_copy_only=False).astype(np.float64)
    elif pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_null(t):
        s = _as_strings(col)
        s = pc.if_else(pc.is_in(s, value_set=pa.array(NULL_TOKENS)), pa.scalar(None, pa.string()), s)
        try:
            out = s.cast(pa.float64()).to_numpy(zero_copy_only=False).astype(np.float64)
        except pa.ArrowInvalid:
            ok = pc.fill_null(pc.match_substring_regex(s, _NUMERIC_RE), True).to_numpy(zero_copy_only=False)
            i = _first_true(~ok)
            raise src.error(
                f"{src.at(i)}, column {column!r}: {s[i].as_py()!r} is not a number "
                f"(give a decimal number such as 12.5, or leave the field empty for a missing value)"
            ) from None
    else:
        raise src.error(f"column {column!r} has type {t}, not numbers")
    inf = np.isinf(out)
    if inf.any():
        i = _first_true(inf)
        raise src.error(f"{src.at(i)}, column {column!r}: {float(out[i])!r} is not a finite number")
    return out


def _naive_to_utc(local_s: np.ndarray, tz: str) -> np.ndarray:
    """Wall-clock seconds in zone `tz` -> UTC epoch seconds, as datetime.replace(tzinfo=zone) does.

    Offsets are looked up once per distinct wall-clock minute (zone transitions fall on
    whole minutes), so a million rows cost a few thousand zone look-ups.
    """
    zone = resolve_tz(tz)
    minute = np.floor(local_s / 60.0).astype(np.int64)
    uniq, inv = np.unique(minute, return_inverse=True)
    epoch = datetime(1970, 1, 1)
    offsets = np.empty(len(uniq))
    for k, m in enumerate(uniq.tolist()):
        wall = epoch + timedelta(minutes=m)
        offsets[k] = wall.replace(tzinfo=zone).utcoffset().total_seconds()  # type: ignore[union-attr]
    return local_s - offsets[inv]


def _parse_times(col: pa.ChunkedArray, src: _Source, tz: str | None) -> np.ndarray:
    """UTC epoch seconds for every row; DataError at the first unusable timestamp."""
    t = col.type
    n = len(col)
    null = col.is_null().to_numpy(zero_copy_only=False)
    if null.any():
        i = _first_true(null)
        raise src.error(f"{src.at(i)}, column {TIME_COLUMN!r}: missing timestamp")
    if pa.types.is_timestamp(t):
        if t.tz is not None:
            return col.cast(pa.timestamp("us", tz="UTC")).cast(pa.int64()).to_numpy(zero_copy_only=False) / 1e6
        if tz is None:
            raise src.error(
                f"column {TIME_COLUMN!r} holds timestamps without a time zone: give the zone they were "
                f"written in (--tz Europe/Berlin, or tz='UTC') or store them with one"
            )
        local = col.cast(pa.timestamp("us")).cast(pa.int64()).to_numpy(zero_copy_only=False) / 1e6
        return _naive_to_utc(local, tz)
    if pa.types.is_integer(t) or pa.types.is_floating(t):
        out = col.cast(pa.float64()).to_numpy(zero_copy_only=False).astype(np.float64)
        bad = ~np.isfinite(out)
        if bad.any():
            i = _first_true(bad)
            raise src.error(f"{src.at(i)}, column {TIME_COLUMN!r}: {float(out[i])!r} is not a finite epoch-seconds value")
        return out
    if not (pa.types.is_string(t) or pa.types.is_large_string(t)):
        raise src.error(f"column {TIME_COLUMN!r} has type {t}: give ISO-8601 text with offset or epoch seconds")

    s = _as_strings(col)
    out = np.full(n, np.nan)
    done = np.zeros(n, dtype=bool)

    def fast(pattern: str, parse) -> None:  # type: ignore[no-untyped-def]
        mask = pc.match_substring_regex(s, pattern).to_numpy(zero_copy_only=False) & ~done
        if not mask.any():
            return
        idx = np.flatnonzero(mask)
        try:
            out[idx] = parse(s if len(idx) == n else s.take(pa.array(idx)))  # usually one shape for all rows
        except pa.ArrowInvalid:
            return  # e.g. 2026-02-30: left to the exact per-value path for its message
        done[idx] = True

    fast(_NUMERIC_RE, lambda a: a.cast(pa.float64()).to_numpy(zero_copy_only=False))
    fast(_AWARE_RE, lambda a: a.cast(pa.timestamp("us", tz="UTC")).cast(pa.int64()).to_numpy(zero_copy_only=False) / 1e6)
    if tz is not None:
        fast(
            _NAIVE_RE,
            lambda a: _naive_to_utc(a.cast(pa.timestamp("us")).cast(pa.int64()).to_numpy(zero_copy_only=False) / 1e6, tz),
        )
    # Anything else (other ISO shapes, naive without tz, garbage): the exact scalar rules.
    for i in np.flatnonzero(~done).tolist():
        text = s[i].as_py()
        try:
            out[i] = parse_timestamp(text, tz)
        except TimestampError as e:
            raise src.error(f"{src.at(i)}, column {TIME_COLUMN!r}: {e}") from None
    bad = ~np.isfinite(out)
    if bad.any():
        i = _first_true(bad)
        raise src.error(f"{src.at(i)}, column {TIME_COLUMN!r}: {s[i].as_py()!r} is not a finite time")
    return out


def _label_codes(col: pa.ChunkedArray, src: _Source, column: str, what: str) -> tuple[np.ndarray, list[str]]:
    """Integer codes (0..K-1) and the distinct labels of a text column, in order of first appearance."""
    if not pa.types.is_dictionary(col.type):
        col = pc.dictionary_encode(_as_strings(col))
    index: dict[str, int] = {}  # label -> code, filled in block order, so codes follow first appearance
    parts = []
    for chunk in col.chunks:
        local = [str(v).strip() if v is not None else "" for v in chunk.dictionary.to_pylist()]
        to_global = np.array([index.setdefault(v, len(index)) if v else -1 for v in local] + [-1], dtype=np.int64)
        idx = pc.fill_null(chunk.indices, len(local)).to_numpy(zero_copy_only=False).astype(np.int64)
        parts.append(to_global[idx])
    codes = np.concatenate(parts) if parts else np.empty(0, dtype=np.int64)
    if np.any(codes < 0):
        raise src.error(f"{src.at(_first_true(codes < 0))}, column {column!r}: missing {what}")
    return codes, list(index)


def _asset_codes(col: pa.ChunkedArray, src: _Source) -> tuple[np.ndarray, list[str]]:
    return _label_codes(col, src, ASSET_COLUMN, "asset id")


def _resolve_units(
    src: _Source, channels: Sequence[str], from_file: Mapping[str, str], given: Mapping[str, str] | None
) -> dict[str, str]:
    given = dict(given or {})
    unknown = sorted(set(given) - set(channels))
    if unknown:
        raise src.error(f"units given for {', '.join(unknown)}, which the file does not have (channels: {', '.join(channels)})")
    units: dict[str, str] = {}
    for ch in channels:
        file_unit, arg_unit = from_file.get(ch), given.get(ch)
        if file_unit and arg_unit and file_unit != arg_unit:
            raise src.error(f"channel {ch!r}: the file's unit column says {file_unit!r} but {arg_unit!r} was given")
        unit = file_unit or arg_unit or unit_from_suffix(ch)
        if not unit:
            suffixes = ", ".join(f"{k} {v}" for k, v in UNIT_SUFFIXES.items())
            raise src.error(
                f"channel {ch!r} has no unit: give it with --units {ch}=UNIT (or units={{{ch!r}: ...}}), "
                f"a unit column in the long layout, or a name suffix ({suffixes})"
            )
        units[ch] = unit
    return units


def _check_channels(src: _Source, found: Sequence[str], wanted: Sequence[str] | None, what: str) -> None:
    if wanted is None:
        return
    missing = [c for c in wanted if c not in found]
    extra = [c for c in found if c not in wanted]
    if missing:
        raise src.error(f"missing {what} for channel(s) {', '.join(missing)} (expected: {', '.join(wanted)})")
    if extra:
        raise src.error(f"unknown {what} {', '.join(map(repr, extra))}: expected only the channels {', '.join(wanted)}")


def read_logs(
    path: str | os.PathLike[str],
    *,
    tz: str | None = None,
    units: Mapping[str, str] | None = None,
    channels: Sequence[str] | None = None,
) -> LogSet:
    """Read a CSV or Parquet log (wide or long layout) into per-asset sorted arrays.

    `tz`: IANA zone of naive timestamps (refused without it). `units`: channel -> unit where
    neither a unit column nor the name suffix says. `channels`: the exact channel set
    required (e.g. a model's inputs); the result then follows that order, otherwise file order.
    """
    path = Path(path)
    if not path.is_file():
        raise DataError(f"{path}: no such file")
    parquet = path.suffix.lower() in (".parquet", ".pq")
    src = _Source(path, parquet)
    if tz is not None:
        try:
            resolve_tz(tz)
        except TimestampError as e:
            raise DataError(f"--tz: {e}") from e
    table = _read_table(path, src)
    names = [str(n) for n in table.column_names]
    dupes = sorted({n for n in names if names.count(n) > 1})
    if dupes:
        raise src.error(f"header repeats column(s) {', '.join(dupes)}")
    if "" in names:
        raise src.error(f"header has an empty column name at position {names.index('') + 1}")
    missing = [c for c in (TIME_COLUMN, ASSET_COLUMN) if c not in names]
    if missing:
        raise src.error(
            f"missing required column(s) {', '.join(missing)}: expected timestamp,asset,<channel>... (wide) "
            f"or timestamp,asset,channel,value[,unit] (long); found {', '.join(names)}"
        )
    long = all(c in names for c in LONG_COLUMNS)
    n_rows = table.num_rows
    if n_rows == 0:
        raise src.error("no data rows after the header")

    times = _parse_times(table.column(TIME_COLUMN), src, tz)
    codes, asset_names = _asset_codes(table.column(ASSET_COLUMN), src)
    line_no = src.line_numbers(n_rows)
    file_units: dict[str, str] = {}

    if long:
        extra = [c for c in names if c not in (TIME_COLUMN, ASSET_COLUMN, *LONG_COLUMNS, "unit")]
        if extra:
            raise src.error(
                f"unknown column(s) {', '.join(map(repr, extra))} in the long layout: expected timestamp,asset,channel,value[,unit]"
            )
        ch_codes, file_channels = _label_codes(table.column("channel"), src, "channel", "channel name")
        _check_channels(src, file_channels, channels, "rows")
        value = _parse_numbers(table.column("value"), src, "value")
        if "unit" in names:
            unit_col = _as_strings(table.column("unit").cast(pa.string())).to_numpy(zero_copy_only=False)
            for k, ch in enumerate(file_channels):
                seen = {u for u in unit_col[ch_codes == k].tolist() if u}
                if len(seen) > 1:
                    raise src.error(f"channel {ch!r} is given in several units: {', '.join(sorted(seen))}")
                if seen:
                    file_units[ch] = seen.pop()
        out_channels = list(channels) if channels is not None else file_channels
        col_of = np.array([out_channels.index(c) for c in file_channels], dtype=np.int64)[ch_codes]
    else:
        file_channels = [c for c in names if c not in (TIME_COLUMN, ASSET_COLUMN)]
        if not file_channels:
            raise src.error("no channel columns: expected timestamp,asset,<channel>,... (wide) or timestamp,asset,channel,value (long)")
        if "unit" in file_channels or "value" in file_channels or "channel" in file_channels:
            raise src.error(
                "header mixes the layouts: a long file needs both 'channel' and 'value' columns; a wide file "
                "has one column per channel and no 'channel'/'value'/'unit' columns"
            )
        _check_channels(src, file_channels, channels, "column(s)")
        out_channels = list(channels) if channels is not None else file_channels
        # One sort by (asset, time) for the whole file; each asset's arrays are then slices.
        order = np.lexsort((times, codes))
        sorted_codes = codes[order]
        times, line_no = times[order], line_no[order]
        wide = np.empty((n_rows, len(out_channels)))
        for ch in file_channels:
            wide[:, out_channels.index(ch)] = _parse_numbers(table.column(ch), src, ch)[order]
        del order
    del table

    unit_map = _resolve_units(src, out_channels, file_units, units)
    assets: dict[str, AssetLog] = {}
    for a_code in np.argsort(np.array(asset_names, dtype=object)).tolist():
        name = asset_names[a_code]
        if long:
            rows = np.flatnonzero(codes == a_code)
            log = _pivot_long(src, name, times[rows], col_of[rows], value[rows], line_no[rows], out_channels)
        else:
            lo, hi = np.searchsorted(sorted_codes, [a_code, a_code + 1])
            t, lines = times[lo:hi], line_no[lo:hi]
            dup = np.flatnonzero(np.diff(t) == 0)
            if len(dup):
                j = int(dup[0])
                raise src.error(
                    f"asset {name!r}: duplicate timestamp {_iso(t[j])} at {_place(src, lines[j])} "
                    f"and {_place(src, lines[j + 1])}; keep one reading per asset and time"
                )
            log = AssetLog(name, t, wide[lo:hi], lines)
        _check_asset_channels(src, log, out_channels)
        assets[name] = log
    _check_constant(src, assets, out_channels)
    return LogSet(
        source=str(path),
        channels=tuple(out_channels),
        units=unit_map,
        assets=assets,
        sha256=file_sha256(path),
        n_rows=n_rows,
        layout="long" if long else "wide",
    )


def _place(src: _Source, number: int) -> str:
    return f"row {number}" if src.parquet else f"line {number}"


def _iso(ts_s: float) -> str:
    us = int(round(ts_s * 1e6))
    return str(np.datetime_as_string(np.datetime64(us, "us"), unit="s" if us % 1_000_000 == 0 else "us", timezone="UTC"))


def _pivot_long(
    src: _Source,
    asset: str,
    t: np.ndarray,
    col: np.ndarray,
    value: np.ndarray,
    lines: np.ndarray,
    channels: Sequence[str],
) -> AssetLog:
    """Long rows of one asset -> one row per distinct time with a column per channel."""
    order = np.lexsort((lines, col, t))
    t, col, value, lines = t[order], col[order], value[order], lines[order]
    same = np.flatnonzero((np.diff(t) == 0) & (np.diff(col) == 0))
    if len(same):
        j = int(same[0])
        raise src.error(
            f"asset {asset!r}, channel {channels[col[j]]!r}: duplicate timestamp {_iso(t[j])} at "
            f"{_place(src, lines[j])} and {_place(src, lines[j + 1])}; keep one value per asset, channel and time"
        )
    uniq, first, inv = np.unique(t, return_index=True, return_inverse=True)
    out = np.full((len(uniq), len(channels)), np.nan)
    out[inv, col] = value
    row_lines = np.minimum.reduceat(lines, first) if len(first) else lines[:0]
    return AssetLog(asset, uniq, out, row_lines.astype(np.int64))


def _check_asset_channels(src: _Source, log: AssetLog, channels: Sequence[str]) -> None:
    empty = ~np.any(np.isfinite(log.values), axis=0)
    if empty.any():
        ch = channels[_first_true(empty)]
        raise src.error(
            f"channel {ch!r} of asset {log.asset!r} has no values (all {len(log.times_s)} readings missing): "
            f"drop the channel or the asset, or supply its readings"
        )


def _check_constant(src: _Source, assets: Mapping[str, AssetLog], channels: Sequence[str]) -> None:
    lo = np.min([np.nanmin(a.values, axis=0) for a in assets.values()], axis=0)
    hi = np.max([np.nanmax(a.values, axis=0) for a in assets.values()], axis=0)
    const = lo == hi
    if const.any():
        j = _first_true(const)
        raise src.error(
            f"channel {channels[j]!r} is constant ({lo[j]:g} in every reading): it carries no information "
            f"and cannot be scaled; drop it from the file"
        )


def from_arrays(
    times_s: Mapping[str, np.ndarray],
    values: Mapping[str, np.ndarray],
    channels: Sequence[str],
    units: Mapping[str, str],
    *,
    source: str = "<arrays>",
) -> LogSet:
    """A LogSet from in-memory per-asset arrays (e.g. training.demo_data.generate()); sorted, checked."""
    src = _Source(Path(source), parquet=True)
    h = hashlib.sha256()
    h.update(repr((tuple(channels), sorted(units.items()))).encode())
    assets: dict[str, AssetLog] = {}
    n_rows = 0
    for name in sorted(times_s):
        t = np.asarray(times_s[name], dtype=np.float64)
        v = np.asarray(values[name], dtype=np.float64)
        if v.shape != (len(t), len(channels)):
            raise DataError(f"{source}: asset {name!r}: values shape {v.shape}, expected ({len(t)}, {len(channels)})")
        order = np.argsort(t, kind="stable")
        t, v = t[order], v[order]
        dup = np.flatnonzero(np.diff(t) == 0)
        if len(dup):
            raise DataError(f"{source}: asset {name!r}: duplicate timestamp {_iso(t[int(dup[0])])}")
        h.update(name.encode())
        h.update(t.tobytes())
        h.update(v.tobytes())
        log = AssetLog(name, t, v, order.astype(np.int64) + 1)
        _check_asset_channels(src, log, channels)
        assets[name] = log
        n_rows += len(t)
    if not assets:
        raise DataError(f"{source}: no assets")
    _check_constant(src, assets, channels)
    _resolve_units(src, channels, dict(units), None)
    return LogSet(source, tuple(channels), {c: units[c] for c in channels}, assets, h.hexdigest(), n_rows, "arrays")


# ---------------------------------------------------------------------------- events


def read_events(path: str | os.PathLike[str], *, tz: str | None = None) -> list[Event]:
    """Read `asset,start,end,kind` rows (optional `note` column ignored); sorted by start, asset."""
    path = Path(path)
    if not path.is_file():
        raise DataError(f"{path}: no such file")
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            rows = list(csv.reader(fh))
    except UnicodeDecodeError as e:
        raise DataError(f"{path}: not UTF-8 text ({e})") from e
    if not rows:
        raise DataError(f"{path}: empty file: expected the header {','.join(EVENT_COLUMNS)}")
    header = [h.strip() for h in rows[0]]
    missing = [c for c in EVENT_COLUMNS if c not in header]
    if missing:
        raise DataError(f"{path}: missing column(s) {', '.join(missing)}: expected the header {','.join(EVENT_COLUMNS)}[,note]")
    extra = [c for c in header if c not in EVENT_COLUMNS + ("note",)]
    if extra:
        raise DataError(f"{path}: unknown column(s) {', '.join(map(repr, extra))}: expected {','.join(EVENT_COLUMNS)}[,note]")
    pos = {c: header.index(c) for c in EVENT_COLUMNS}
    events: list[Event] = []
    for line, row in enumerate(rows[1:], start=2):
        if not row or all(not f.strip() for f in row):
            continue
        if len(row) != len(header):
            raise DataError(f"{path}: line {line} has {len(row)} fields, the header has {len(header)}")
        asset, kind = row[pos["asset"]].strip(), row[pos["kind"]].strip()
        if not asset:
            raise DataError(f"{path}: line {line}, column 'asset': missing asset id")
        if not kind:
            raise DataError(f"{path}: line {line}, column 'kind': missing kind (e.g. maintenance, bearing_wear)")
        times = []
        for col in ("start", "end"):
            try:
                times.append(parse_timestamp(row[pos[col]], tz))
            except TimestampError as e:
                raise DataError(f"{path}: line {line}, column {col!r}: {e}") from None
            if not np.isfinite(times[-1]):
                raise DataError(f"{path}: line {line}, column {col!r}: {row[pos[col]]!r} is not a finite time")
        if not times[1] > times[0]:
            raise DataError(f"{path}: line {line}: end {row[pos['end']].strip()} is not after start {row[pos['start']].strip()}")
        events.append(Event(asset, times[0], times[1], kind))
    events.sort(key=lambda e: (e.start_s, e.asset, e.kind))
    return events
