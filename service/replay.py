"""Play a readings file into a running service as the machines would: per asset in time
order, in batches, interleaved across assets by time, with retries and a progress bar.

Retrying is safe because ingest is idempotent on (asset, timestamp): a batch whose
response was lost is re-sent and its readings count as duplicates.
"""

from __future__ import annotations

import csv
import math
import os
import sys
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx
import numpy as np

from service.grid import TimestampError, parse_timestamp

RETRY_STATUS = {429, 500, 502, 503, 504}


class ReplayError(RuntimeError):
    """The file cannot be read or the service refused a batch; the message says which."""


@dataclass(frozen=True)
class AssetSeries:
    times_s: np.ndarray  # (N,) epoch seconds, ascending
    values: np.ndarray  # (N, C), NaN = missing


@dataclass
class ReplaySummary:
    readings: int = 0
    requests: int = 0
    retries: int = 0
    accepted: int = 0
    duplicates: int = 0
    late: int = 0
    windows_scored: int = 0
    gap_windows: int = 0
    alerts_opened: int = 0
    alerts_returned: int = 0
    seconds: float = 0.0
    per_asset: dict[str, dict[str, int]] = field(default_factory=dict)

    def line(self) -> str:
        return (
            f"replayed {self.readings} readings in {self.requests} requests ({self.retries} retries) in {self.seconds:.1f} s: "
            f"accepted {self.accepted}, duplicates {self.duplicates}, late {self.late}, windows scored {self.windows_scored}, "
            f"gap windows {self.gap_windows}, alerts opened {self.alerts_opened}"
        )


def read_file(path: Path) -> tuple[tuple[str, ...], dict[str, AssetSeries]]:
    """(channels, per-asset series) from a readings CSV, wide or long layout (README, "Prepare data").

    One parser wherever replay runs: the standard library's csv module (the service image has
    no pyarrow, and a replay must not read a file differently depending on what else is
    installed). Columns are found by name: `timestamp` and `asset`, then either `channel`
    and `value` (long layout; an optional `unit` column is ignored) or one column per channel
    (wide). Parquet is refused with a message: write the readings as CSV to replay them.
    """
    path = Path(path)
    if not path.is_file():
        raise ReplayError(f"{path}: no such file")
    if path.suffix.lower() in (".parquet", ".pq"):
        raise ReplayError(f"{path}: replay reads CSV only (the service's own parser, no pyarrow); write the readings as CSV")
    return _read_csv(path)


def _read_csv(path: Path) -> tuple[tuple[str, ...], dict[str, AssetSeries]]:
    with open(path, newline="", encoding="utf-8") as f:
        reader = csv.reader(f)
        try:
            header = [h.strip() for h in next(reader)]
        except StopIteration:
            raise ReplayError(f"{path}: empty file") from None
        missing = [c for c in ("timestamp", "asset") if c not in header]
        if missing:
            raise ReplayError(
                f"{path}: line 1 has no {' or '.join(repr(c) for c in missing)} column: give `timestamp,asset,<channel>,...` "
                "(wide) or `timestamp,asset,channel,value[,unit]` (long)"
            )
        t_col, a_col = header.index("timestamp"), header.index("asset")
        long = "channel" in header and "value" in header
        if long:
            c_col, v_col = header.index("channel"), header.index("value")
            channels: list[str] = []
            value_cols: list[tuple[str, int]] = [("value", v_col)]
        else:
            channels = [h for i, h in enumerate(header) if i not in (t_col, a_col)]
            if not channels:
                raise ReplayError(f"{path}: line 1 names no channel column")
            value_cols = [(h, i) for i, h in enumerate(header) if i not in (t_col, a_col)]
        rows: dict[str, dict[float, dict[str, float]]] = {}
        for line_no, row in enumerate(reader, start=2):
            if not row:
                continue
            if len(row) != len(header):
                raise ReplayError(f"{path}: line {line_no} has {len(row)} fields, the header has {len(header)}")
            try:
                ts = parse_timestamp(row[t_col])
            except TimestampError as e:
                raise ReplayError(f"{path}: line {line_no}, column timestamp: {e}") from e
            point = rows.setdefault(row[a_col], {}).setdefault(ts, {})
            for name, i in value_cols:
                cell = row[i].strip()
                try:
                    value = float(cell) if cell else math.nan
                except ValueError:
                    raise ReplayError(f"{path}: line {line_no}, column {name}: {row[i]!r} is not a number") from None
                if long:
                    channel = row[c_col].strip()
                    if channel not in channels:
                        channels.append(channel)
                    point[channel] = value
                else:
                    point[name] = value
    out = {}
    for asset, points in sorted(rows.items()):
        times = sorted(points)
        values = np.array([[points[t].get(c, math.nan) for c in channels] for t in times], dtype=np.float64)
        out[asset] = AssetSeries(np.array(times, dtype=np.float64), values.reshape(len(times), len(channels)))
    return tuple(channels), out


def _batches(series: Mapping[str, AssetSeries], batch: int) -> list[tuple[float, str, int, int]]:
    """(first time, asset, start, stop) of every batch, ordered by time across assets."""
    out = []
    for asset, s in series.items():
        for i in range(0, len(s.times_s), batch):
            out.append((float(s.times_s[i]), asset, i, min(i + batch, len(s.times_s))))
    out.sort(key=lambda b: (b[0], b[1]))
    return out


def _body(channels: Sequence[str], s: AssetSeries, lo: int, hi: int) -> dict[str, Any]:
    readings = []
    for t, row in zip(s.times_s[lo:hi], s.values[lo:hi]):
        readings.append({"ts": float(t), "values": {c: (None if not math.isfinite(v) else float(v)) for c, v in zip(channels, row)}})
    return {"readings": readings}


def replay(
    *,
    url: str,
    key: str,
    channels: Sequence[str],
    series: Mapping[str, AssetSeries],
    batch: int = 60,
    speed: float | None = None,
    retries: int = 6,
    backoff_s: float = 0.25,
    timeout_s: float = 30.0,
    progress: bool = True,
    client: httpx.Client | None = None,
    sleep: Callable[[float], None] = time.sleep,
) -> ReplaySummary:
    """Post every asset's readings in batches of `batch`; `speed` = times real time (None: as fast as possible)."""
    if batch < 1:
        raise ReplayError("--batch must be at least 1")
    if speed is not None and not speed > 0:
        raise ReplayError("--speed must be > 0 (times real time)")
    from tqdm import tqdm

    plan = _batches(series, batch)
    summary = ReplaySummary(readings=sum(len(s.times_s) for s in series.values()))
    own = client is None
    http = client or httpx.Client(base_url=url.rstrip("/"), timeout=timeout_s)
    headers = {"Authorization": f"Bearer {key}"}
    bar = tqdm(total=summary.readings, unit="reading", file=sys.stderr, mininterval=1.0,
               disable=(not progress) or bool(os.environ.get("CI")))
    t_wall0 = time.monotonic()
    t_data0 = plan[0][0] if plan else 0.0
    try:
        for first_ts, asset, lo, hi in plan:
            if speed is not None:
                wait = (first_ts - t_data0) / speed - (time.monotonic() - t_wall0)
                if wait > 0:
                    sleep(wait)
            body = _body(channels, series[asset], lo, hi)
            out = _post(http, f"/v1/assets/{asset}/readings", body, headers, retries, backoff_s, summary, sleep,
                        where=f"asset {asset} readings {lo}..{hi - 1}")
            summary.requests += 1
            per = summary.per_asset.setdefault(asset, {"accepted": 0, "windows_scored": 0, "alerts_opened": 0})
            for k in ("accepted", "duplicates", "late", "windows_scored", "gap_windows", "alerts_opened", "alerts_returned"):
                setattr(summary, k, getattr(summary, k) + int(out.get(k, 0)))
                if k in per:
                    per[k] += int(out.get(k, 0))
            bar.update(hi - lo)
    finally:
        bar.close()
        if own:
            http.close()
    summary.seconds = time.monotonic() - t_wall0
    return summary


def _post(
    http: httpx.Client, path: str, body: dict[str, Any], headers: dict[str, str], retries: int, backoff_s: float,
    summary: ReplaySummary, sleep: Callable[[float], None], where: str,
) -> dict[str, Any]:
    for attempt in range(retries + 1):
        try:
            r = http.post(path, json=body, headers=headers)
        except (httpx.TransportError,) as e:
            reason = f"{type(e).__name__}: {e}"
        else:
            if r.status_code == 200:
                return r.json()
            if r.status_code not in RETRY_STATUS:
                raise ReplayError(f"{where}: the service refused the batch ({r.status_code}): {_message(r)}")
            reason = f"HTTP {r.status_code}: {_message(r)}"
        if attempt == retries:
            raise ReplayError(f"{where}: gave up after {retries + 1} attempts; last error {reason}")
        summary.retries += 1
        sleep(backoff_s * (2**attempt))
    raise AssertionError("unreachable")


def _message(r: httpx.Response) -> str:
    try:
        return str(r.json()["error"]["message"])
    except (ValueError, KeyError, TypeError):
        return r.text[:200]
