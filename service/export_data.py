"""`kilter export`: the service's stored readings and closed alerts, written in the trainer's
own input formats, so export -> train -> reload -> evaluate is one path (README, "Close the loop").

Files (README, "Prepare data"):

- `readings.csv`, the wide layout: `timestamp,asset,<channel>...`, one row per stored
  reading, ISO-8601 UTC with a `Z` (milliseconds only when a reading has them), an empty
  cell where a channel was null. Channels in the served model's order.
- `events.csv`: `asset,start,end,kind,note`, one row per alert worth keeping out of training:

  | alert outcome         | kind              | train (`--exclude`) | evaluate                          |
  |-----------------------|-------------------|---------------------|-----------------------------------|
  | confirmed fault       | `confirmed_fault` | excluded            | a fault                           |
  | planned work          | `maintenance`     | excluded            | neither fault nor false alarm     |
  | unknown, or not closed| `unreviewed`      | excluded            | give `--ignore-kinds maintenance,unreviewed` |
  | false alarm           | (no row)          | kept as normal      | normal                            |

  Unreviewed alerts are kept out of training because nobody has said they were normal.
  An event starts one window span plus the on-delay's n windows before the alert opened
  (the first window that scored high covers readings that far back) and ends when the
  alert returned (or was last seen, if it has not); the trainer widens it by its margin.

Both files are written under temporary names and renamed into place, events last, so a
failed export leaves nothing half-written. Only service code: runs in the service image.
"""

from __future__ import annotations

import csv
import math
import os
import tempfile
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from service.db import export as q
from service.grid import iso_ms
from service.db.models import Alert
from service.db.session import Database
from service.manifest import Manifest, load_manifest
from service.models_registry import version_key

READINGS_FILE = "readings.csv"
EVENTS_FILE = "events.csv"
OUTCOME_KINDS: dict[str | None, str | None] = {
    "confirmed_fault": "confirmed_fault",
    "planned_work": "maintenance",
    "unknown": "unreviewed",
    None: "unreviewed",  # not closed yet
    "false_alarm": None,  # normal: no event, its readings train the next model
}
DEFAULT_LEAD_S = 3600.0  # when the alert's model folder is gone: one hour before it opened


class ExportError(RuntimeError):
    """The export cannot be made (nothing to export, files in the way); the message says why."""


@dataclass(frozen=True)
class EventRow:
    asset: str
    start_ms: int
    end_ms: int
    kind: str
    note: str


@dataclass
class ExportSummary:
    folder: Path
    assets: list[str]
    channels: list[str]
    readings: dict[str, int] = field(default_factory=dict)
    events: dict[str, int] = field(default_factory=dict)  # kind -> rows
    false_alarms_kept: int = 0
    units: dict[str, str] = field(default_factory=dict)

    def line(self) -> str:
        kinds = ", ".join(f"{n} {k}" for k, n in sorted(self.events.items())) or "none"
        return (
            f"exported {sum(self.readings.values())} readings of {len(self.assets)} assets "
            f"({', '.join(self.assets)}) and events: {kinds}; {self.false_alarms_kept} false alarms kept as normal"
        )


def _to_ms(t: datetime) -> int:
    return int(round(t.astimezone(timezone.utc).timestamp() * 1000))


def alert_lead_s(manifest: Manifest | None, on_n: int | None = None) -> float:
    """How far before its opening an alert's readings may already be abnormal."""
    if manifest is None:
        return DEFAULT_LEAD_S
    n = on_n if on_n is not None else manifest.alert_rule.on_n
    return manifest.window_span_s + n * manifest.window_period_s


def event_rows(alerts: Iterable[Alert], lead_s: dict[str, float]) -> tuple[list[EventRow], int]:
    """(events to write, false alarms kept as normal) for these alerts (table in the module docstring).

    `lead_s` maps a model id to alert_lead_s of its model; others get DEFAULT_LEAD_S.
    """
    rows: list[EventRow] = []
    kept = 0
    for a in alerts:
        kind = OUTCOME_KINDS.get(a.outcome, "unreviewed")
        if kind is None:
            kept += 1
            continue
        lead_ms = int(round(lead_s.get(a.model_id, DEFAULT_LEAD_S) * 1000))
        start = _to_ms(a.opened_at) - lead_ms
        end = max(_to_ms(a.returned_at or a.last_seen_at), _to_ms(a.opened_at) + 1000)
        note = f"alert #{a.id} ({a.severity})" + (f": {a.close_note}" if a.close_note else "")
        rows.append(EventRow(a.asset_id, start, end, kind, " ".join(note.split())))
    rows.sort(key=lambda r: (r.start_ms, r.asset, r.kind))
    return rows, kept


def served_manifest(model_dir: Path, model_id: str) -> Manifest | None:
    """The highest version's manifest of a model id under the model folder, or None."""
    base = Path(model_dir) / model_id
    if not base.is_dir():
        return None
    for version in sorted((p.name for p in base.iterdir() if (p / "manifest.json").is_file()), key=version_key, reverse=True):
        try:
            return load_manifest(base / version)
        except ValueError:
            continue
    return None


def _cell(v: Any) -> str:
    if v is None:
        return ""
    f = float(v)
    return repr(f) if math.isfinite(f) else ""  # shortest text that reads back to the same float


class _Atomic:
    """A file written beside its target and renamed into place on commit()."""

    def __init__(self, target: Path) -> None:
        self.target = target
        fd, name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".partial", dir=target.parent)
        self.tmp = Path(name)
        self.fh = os.fdopen(fd, "w", newline="", encoding="utf-8")

    def commit(self) -> None:
        self.fh.flush()
        os.fsync(self.fh.fileno())
        self.fh.close()
        os.replace(self.tmp, self.target)

    def discard(self) -> None:
        if not self.fh.closed:
            self.fh.close()
        self.tmp.unlink(missing_ok=True)


def export(
    db: Database,
    model_dir: Path,
    out_dir: Path,
    *,
    assets: Sequence[str] | None = None,
    since: datetime | None = None,
    until: datetime | None = None,
    overwrite: bool = False,
) -> ExportSummary:
    """Write out_dir/readings.csv and out_dir/events.csv; ExportError says what stopped it."""
    out_dir = Path(out_dir)
    targets = [out_dir / READINGS_FILE, out_dir / EVENTS_FILE]
    if not overwrite and any(t.exists() for t in targets):
        raise ExportError(f"{out_dir}: {READINGS_FILE} or {EVENTS_FILE} exists already: choose another --out or give --overwrite")
    if since is not None and until is not None and not until > since:
        raise ExportError("--until must be after --since")
    with db.session() as s:
        known = q.asset_ids(s, only=assets)
        if assets is not None:
            missing = sorted(set(assets) - set(known))
            if missing:
                raise ExportError(f"no stored readings for asset(s) {', '.join(missing)}: the service knows {', '.join(q.asset_ids(s)) or 'no asset yet'}")
        if not known:
            raise ExportError("the database holds no readings yet: nothing to export")
        models = q.asset_models(s, assets=known)
        manifests = {m: served_manifest(model_dir, m) for m in sorted(set(models.values()))}
        alerts = q.alerts_between(s, assets=known, since=since, until=until)
    for a in alerts:  # an alert's own model version sets its lead, else the served one
        if a.model_id not in manifests:
            manifests[a.model_id] = served_manifest(model_dir, a.model_id)
    channels: list[str] = []
    units: dict[str, str] = {}
    for m in manifests.values():
        for c in m.channels if m is not None else []:
            if c.name not in channels:
                channels.append(c.name)
                units[c.name] = c.unit
    since_ms = _to_ms(since) if since is not None else None
    until_ms = _to_ms(until) if until is not None else None
    out_dir.mkdir(parents=True, exist_ok=True)
    summary = ExportSummary(out_dir, known, channels, units=units)
    files = [_Atomic(t) for t in targets]
    try:
        writer = csv.writer(files[0].fh, lineterminator="\n")
        with db.session() as s:
            if not channels:  # no model folder to name them: the channels the readings carry
                first = next((v for a in known for _, v in q.readings(s, asset_id=a, since_ms=since_ms, until_ms=until_ms, page=1)), {})
                channels.extend(sorted(first))
            writer.writerow(["timestamp", "asset", *channels])
            for asset in known:
                n = 0
                for ts_ms, values in q.readings(s, asset_id=asset, since_ms=since_ms, until_ms=until_ms):
                    extra = set(values) - set(channels)
                    if extra:
                        raise ExportError(f"asset {asset} has readings of channel(s) {', '.join(sorted(extra))} its model does not name")
                    writer.writerow([iso_ms(ts_ms), asset, *(_cell(values.get(c)) for c in channels)])
                    n += 1
                summary.readings[asset] = n
        if not sum(summary.readings.values()):
            raise ExportError("no stored readings in that time range: nothing to export")
        leads = {m: alert_lead_s(man) for m, man in manifests.items()}
        rows, summary.false_alarms_kept = event_rows(alerts, leads)
        ew = csv.writer(files[1].fh, lineterminator="\n")
        ew.writerow(["asset", "start", "end", "kind", "note"])
        for r in rows:
            ew.writerow([r.asset, iso_ms(r.start_ms), iso_ms(r.end_ms), r.kind, r.note])
            summary.events[r.kind] = summary.events.get(r.kind, 0) + 1
        for f in files:
            f.commit()
    except BaseException:
        for f in files:
            f.discard()
        raise
    return summary
