"""Play a readings file into a running service as the machines would: per asset in time
order, in batches, interleaved across assets by time, with retries and a progress bar.

Retrying is safe because ingest is idempotent on (asset, timestamp): a batch whose
response was lost is re-sent and its readings count as duplicates.

A batch the service refuses for its content (409: a reading stored before with other
values; 422: a bad value, say one outside the model's plausible limits) is skipped, with
the server's message kept, and the replay carries on: the rest of the file is still worth
having, and ingest stores nothing of a refused batch, so the skip is clean. The summary
lists every skipped batch (the command prints them and exits 1). Refusals that every
batch would get (401/403: the key; 404; 413: --batch too large) stop the replay at once,
and so do `MAX_REFUSED_IN_A_ROW` content refusals in a row (the file does not fit the
model at all, e.g. other channels). `stop_on_refusal` stops at the first one.
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
SKIP_STATUS = {409, 422}  # the batch's content was refused: skip it, report it, carry on
MAX_REFUSED_IN_A_ROW = 10


class ReplayError(RuntimeError):
    """The file cannot be read or the service refused a batch; the message says which."""


class BatchRefused(ReplayError):
    """The service refused one batch for its content (SKIP_STATUS)."""

    def __init__(self, message: str, *, status: int, server_message: str) -> None:
        super().__init__(message)
        self.status, self.server_message = status, server_message


@dataclass(frozen=True)
class RefusedBatch:
    """A batch the service refused and the replay skipped."""

    where: str  # "asset pump-01 readings 120..179"
    status: int
    message: str  # the server's own message (it names the reading, channel and value)

    def line(self) -> str:
        return f"{self.where}: refused ({self.status}): {self.message}"


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
    refused: list[RefusedBatch] = field(default_factory=list)
    refused_readings: int = 0

    def line(self) -> str:
        skipped = f", {len(self.refused)} batches ({self.refused_readings} readings) refused and skipped" if self.refused else ""
        return (
            f"replayed {self.readings} readings in {self.requests} requests ({self.retries} retries) in {self.seconds:.1f} s: "
            f"accepted {self.accepted}, duplicates {self.duplicates}, late {self.late}, windows scored {self.windows_scored}, "
            f"gap windows {self.gap_windows}, alerts opened {self.alerts_opened}{skipped}"
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
    stop_on_refusal: bool = False,
    backfill: bool = False,
) -> ReplaySummary:
    """Post every asset's readings in batches of `batch`; `speed` = times real time (None: as
    fast as possible). Batches refused for their content are skipped and listed in the
    summary's `refused` (see the module docstring). `backfill` (an admin key): the service
    scores every due window of the history and marks the alerts it opens as backfilled
    (service/stream.py)."""
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
    in_a_row = 0  # content refusals since the last accepted batch
    try:
        for first_ts, asset, lo, hi in plan:
            if speed is not None:
                wait = (first_ts - t_data0) / speed - (time.monotonic() - t_wall0)
                if wait > 0:
                    sleep(wait)
            body = _body(channels, series[asset], lo, hi)
            where = f"asset {asset} readings {lo}..{hi - 1}"
            try:
                path = f"/v1/assets/{asset}/readings" + ("?backfill=true" if backfill else "")
                out = _post(http, path, body, headers, retries, backoff_s, summary, sleep, where=where)
            except BatchRefused as e:
                summary.requests += 1
                summary.refused.append(RefusedBatch(where, e.status, e.server_message))
                summary.refused_readings += hi - lo
                in_a_row += 1
                if stop_on_refusal or in_a_row >= MAX_REFUSED_IN_A_ROW:
                    why = "" if stop_on_refusal else f"{in_a_row} batches in a row were refused, so the file does not fit; "
                    raise ReplayError(f"{why}stopping at {e}") from e
                bar.update(hi - lo)
                continue
            in_a_row = 0
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
            if r.status_code in SKIP_STATUS:
                msg = _message(r)
                raise BatchRefused(f"{where}: the service refused the batch ({r.status_code}): {msg}", status=r.status_code, server_message=msg)
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
