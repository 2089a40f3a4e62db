"""The ingest path, a thin transaction script around the streaming core (service/stream.py):
validate a batch -> plan: find duplicates, ask the core which windows the new readings make
due (from *stored* readings plus the batch), score them in one batched ONNX Runtime call ->
write, in one database transaction: readings, gap records, scores, the alert rule's alert
rows, the asset's marks. A batch is acknowledged only after it is committed, and a rejected
batch stores nothing.

Decisions (the numbers are settings, service/settings.py):

* Idempotency: a reading is identified by (asset, timestamp in epoch ms). Re-sending one
  with the same values counts it as a duplicate; with different values it is a 409 that
  names the timestamp. Within one batch the same timestamp twice with different values
  is a 422. Only timestamps up to the asset's newest stored reading (assets.last_reading_at,
  moved in the same transaction as every insert) are looked up: a later one cannot be stored.
* Windows (the core's rule, stated in service/stream.py): the window ending on grid index e
  (e % stride == 0, service/grid.py) is due once the asset's newest reading is at index
  >= e + `hold_steps`, and is then formed once from the stored readings around it (window +
  max_fill_steps of look-back), so any replica can take any request; each (asset, model
  version, window end) is scored once — a UNIQUE key in the database. Where a batch is cut
  never matters: the outcome is that of posting its readings one at a time in arrival order.
* Lateness: a reading at or more than `hold_steps` behind the newest reading before it is
  late; it is stored and never changes a scored window, but it can complete a window that
  is due and not scored (a gap window, an outage) ending within `lateness_windows` window
  periods of that newest reading. Readings too old even for that are counted as `late`.
* Gaps: a formed window that holds readings but spans a gap longer than the gap policy's
  max_fill_steps is not scored. It is recorded once in skipped_windows, counted in the
  response's `gap_windows` and on the asset listing; if a late reading later closes the
  gap, the window is scored and its skipped record removed. Windows before an asset's
  first reading (warm-up) and windows holding no reading at all (an outage) are neither
  scored nor counted; the asset turns `silent` (see service/db/readings.derive_state).
* Future: readings more than `future_tolerance_s` past the server clock are refused (422).
* Retention: readings older than `retention_days` before the server clock are refused
  (422 naming the first): retention prunes by reading time, so they would be stored and
  then silently deleted within the hour.
* The alert rule (service/alerting.py) runs on the scored windows that end after every
  window it saw before (service/stream.py marks them `rule_saw`), in the order they were
  formed; its state is rebuilt from the last `rule.memory` stored scores it saw and the
  asset's active alert, so nothing lives only in this process. A late window filling a
  hole behind that point is stored (rule_saw false) but does not move the rule. A shelved
  asset (shelved_until in the future by the server clock) opens no alert; an active one
  may still escalate and return. The active alert is read with a row lock and only the
  rule's own columns are written back (service/db/ingest_sql.py), so a person's close
  during the request is never undone.
* Backfill (`backfill=True`, admin keys; `kilter replay --backfill`): the core forms every
  window of the batch's history that is not scored yet, with no lateness limit; alerts it
  opens are marked backfilled (no notifications). Resending a backfill changes nothing.
* Plan before the lock, write under it: the plan (the costly part: reads, windows,
  scoring) is made outside the write transaction, so it runs beside other requests'
  writes (SQLite has one writer; `serve --workers N` plans in N processes at once). The
  write transaction locks the asset row (FOR UPDATE on PostgreSQL; SQLite's BEGIN
  IMMEDIATE) and uses the plan only if the asset's `ingest_seq`, moved by every batch that
  stores readings, is what the plan saw; otherwise it plans again inside the transaction
  (counted in kilter_ingest_replans_total). The write then reads the rule's state
  (recent scores, active alert, shelving, threshold) as it is under the lock.
* Concurrency: one asset's batches write one at a time (the row lock above). The UNIQUE
  keys on readings, window scores and the active alert turn any remaining race into an
  IntegrityError, and the write is retried with a fresh plan (MAX_ATTEMPTS), which
  idempotency makes safe.
* Speed: the statements of the usual course are compiled once per engine and run on the
  DBAPI cursor (service/db/prepared.py); an ORM session joins the transaction only for the
  rare steps (a new asset, a new threshold version, gap records).
* The rule's levels and timing are the asset's newest threshold version; a model switch
  gives it one new calibrated version, at the switch (service/db/bindings.py). The
  asset's `rule_override` (on_k, on_n, off_m, deadband_frac) applies on top.
"""

from __future__ import annotations

import dataclasses
import logging
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Any

import numpy as np
from sqlalchemy.exc import IntegrityError
from sqlalchemy import Connection
from sqlalchemy.orm import Session

from service import grid
from service.grid import iso_ms, iso_s
from service import stream
from service.alerting import RuleState, manifest_rule, rule_of
from service.caller import Caller
from service.db import readings as q
from service.db import rule_alerts
from service.db import ingest_sql as store
from service.db.ingest_sql import AssetRow, ThresholdRow
from service.db.models import Asset, SkippedWindow
from service.db.session import Database
from service.db.bindings import ensure_threshold
from service.errors import BadInput, Conflict, Forbidden, ModelSwitched, TooLarge
from service.metrics import Metrics
from service.models_registry import LoadedModel, ModelRegistry
from service.scoring import first_implausible, implausible_message
from service.settings import Settings

log = logging.getLogger("kilter")

TOP_CHANNELS = 3
MAX_ATTEMPTS = 4  # a concurrent writer of the same rows makes the transaction retry


@dataclass(frozen=True)
class RawReading:
    """One reading as posted: epoch seconds (already parsed) and {channel: value | None}."""

    ts_s: float
    values: dict[str, float | None]


@dataclass
class IngestResult:
    asset_id: str
    model_id: str
    model_version: str
    accepted: int = 0
    duplicates: int = 0
    late: int = 0
    windows_scored: int = 0
    gap_windows: int = 0
    alerts_opened: int = 0
    alerts_escalated: int = 0
    alerts_returned: int = 0
    threshold_version: int | None = None
    first_window_end: datetime | None = None
    last_window_end: datetime | None = None
    opened_alert_ids: list[int] = field(default_factory=list)


# --- validation (pure) ------------------------------------------------------------------


def validate_batch(
    readings: Sequence[RawReading], *, channels: Sequence[str], now_s: float, future_tolerance_s: float,
    manifest: Manifest | None = None,
) -> tuple[np.ndarray, np.ndarray, list[dict[str, float | None]]]:
    """(ts_ms int64 (N,), values float64 (N, C) in channel order with NaN for null, the values
    dicts as given); BadInput naming `body.readings[i]...` for unknown or missing channels, a
    timestamp too far in the future, one timestamp twice with different values, or (given
    the model's `manifest`) a value outside its plausible limits (service/manifest.py): a
    finite 1e300 or 3e38 would otherwise be stored and break every later window of the asset."""
    expected = list(channels)
    expected_set = set(expected)
    latest_ok = now_s + future_tolerance_s
    nan = float("nan")
    ts_list: list[int] = []
    rows: list[list[float]] = []
    dicts: list[dict[str, float | None]] = []
    seen: dict[int, int] = {}
    for i, r in enumerate(readings):
        given = r.values
        if given.keys() != expected_set:
            _channel_error(i, given, expected)
        if r.ts_s > latest_ok:
            where = f"body.readings[{i}]"
            raise BadInput(
                f"{where}.ts: {iso_s(r.ts_s)} lies {r.ts_s - now_s:.0f} s past the server clock ({iso_s(now_s)}); "
                f"at most {future_tolerance_s:.0f} s ahead is accepted",
                field=f"{where}.ts",
            )
        t = int(round(r.ts_s * 1000))
        # The route's model has made every value a float or None; its key order is the
        # sender's (dict equality, and so the duplicate check, ignores order).
        first = seen.setdefault(t, i)
        if first != i and dicts[first] != given:
            raise BadInput(
                f"body.readings[{i}].ts: {iso_ms(t)} also appears as readings[{first}] with different values; send one",
                field=f"body.readings[{i}].ts",
            )
        ts_list.append(t)
        row = [given[c] for c in expected]
        rows.append([nan if x is None else float(x) for x in row])  # type: ignore[arg-type]
        dicts.append(given)
    ts_ms = np.array(ts_list, dtype=np.int64)
    values = np.array(rows, dtype=np.float64).reshape(len(rows), len(expected))
    if manifest is not None:
        bad = first_implausible(values, manifest)
        if bad is not None:
            i, c = bad
            where = f"body.readings[{i}].values.{expected[c]}"
            raise BadInput(f"{where}: {implausible_message(float(values[i, c]), c, manifest)}", field=where)
    return ts_ms, values, dicts


def _channel_error(i: int, given: dict[str, float | None], expected: list[str]) -> None:
    where = f"body.readings[{i}]"
    unknown = [c for c in given if c not in set(expected)]
    if unknown:
        raise BadInput(
            f"{where}.values: unknown channel {unknown[0]!r}; this asset's model has {', '.join(expected)}",
            field=f"{where}.values.{unknown[0]}",
        )
    missing = [c for c in expected if c not in given]
    raise BadInput(
        f"{where}.values: missing channel {missing[0]!r}; give every one of {', '.join(expected)} (null when not measured)",
        field=f"{where}.values.{missing[0]}",
    )


def check_retention(ts_ms: np.ndarray, *, now: datetime, retention_days: float) -> None:
    """BadInput naming the first reading older than the retention horizon: it would be pruned
    within the hour (retention prunes by reading time), so it is refused, never accepted and
    then silently deleted. retention_days 0 keeps everything."""
    if retention_days <= 0 or len(ts_ms) == 0:
        return
    horizon_ms = int((now.timestamp() - retention_days * 86400.0) * 1000)
    old = np.flatnonzero(ts_ms < horizon_ms)
    if len(old):
        i = int(old[0])
        raise BadInput(
            f"body.readings[{i}].ts: {iso_ms(int(ts_ms[i]))} is older than the retention horizon "
            f"({iso_ms(horizon_ms)}, KILTER_RETENTION_DAYS={retention_days:g}); readings that old would be pruned, "
            f"so {len(old)} reading(s) of this batch are refused and nothing is stored",
            field=f"body.readings[{i}].ts",
        )


# --- helpers (pure) ----------------------------------------------------------------------


def top_channels(shares: np.ndarray, names: Sequence[str], n: int = TOP_CHANNELS) -> list[dict[str, Any]]:
    order = np.argsort(-shares, kind="stable")[:n]
    return [{"channel": names[i], "share": round(float(shares[i]), 4)} for i in order]


# --- the request -------------------------------------------------------------------------


def check_asset_access(session: Session, *, caller: Caller, asset_id: str) -> Asset | None:
    """The asset row (None if new); Forbidden when a limited key may not use the asset.

    The answer is the same 403 whether or not the asset exists, and it does not list the
    key's allowed assets: a caller learns nothing about other assets from it."""
    if not caller.may_use_asset(asset_id):
        raise Forbidden(f"key {caller.name!r} may not post readings for asset {asset_id!r}", field="path.asset_id")
    return q.get_asset(session, asset_id=asset_id)


def resolve_model(registry: ModelRegistry, asset: Asset | None, asset_id: str, *, db: Database, model_id: str | None = None) -> LoadedModel:
    """The model version the cluster serves for this asset, after the registry's one-row
    check of the database's generation (service/models_registry.py: ModelRegistry.sync)."""
    registry.sync(db)
    if model_id is None:
        model_id = asset.model_id if asset is not None else registry.model_for_asset(asset_id)
    if model_id is None:
        served = sorted(m.model_id for m in registry.models())
        raise BadInput(
            f"no model is bound to new asset {asset_id!r} and several are served ({', '.join(served)}): "
            "set KILTER_DEFAULT_MODEL or KILTER_ASSET_MODELS",
            field="path.asset_id",
        )
    return registry.get(model_id)


def ingest(**kwargs: Any) -> IngestResult:
    """Store one batch of an asset's readings (keyword arguments as `_ingest_once`).

    When the cluster switched the asset's model while this process planned with the old
    one, nothing was stored (ModelSwitched, service/db/bindings.py); the batch is planned
    once more with the model the database now names, so the machine sees no 503 for a
    switch it could not know about. A second switch within that retry is answered 503."""
    try:
        return _ingest_once(**kwargs)
    except ModelSwitched:
        log.info("model switched while planning a batch for %s; planning it again", kwargs.get("asset_id"))
        return _ingest_once(**kwargs)


def _ingest_once(
    *,
    db: Database,
    registry: ModelRegistry,
    settings: Settings,
    metrics: Metrics,
    caller: Caller,
    asset_id: str,
    readings: Sequence[RawReading],
    now: datetime | None = None,
    backfill: bool = False,
) -> IngestResult:
    """Store one batch of an asset's readings and score what it makes due; see the module
    docstring. `backfill` (people keys, checked by the route) forms the windows of history
    with no lateness limit and marks the alerts it opens as backfilled."""
    if len(readings) > settings.max_batch_readings:
        raise TooLarge(f"{len(readings)} readings in one post; at most {settings.max_batch_readings} are accepted", field="body.readings")
    if not readings:
        raise BadInput("body.readings: give at least one reading", field="body.readings")
    now = now or datetime.now(timezone.utc)
    if backfill and caller.role != "admin":
        raise Forbidden(
            f"key {caller.name!r} ({caller.role}) may not backfill: a backfill opens the alerts history would have opened, "
            "so it takes an admin key; post without backfill for live readings",
            field="query.backfill",
        )
    bound = registry.bound_model(asset_id) if caller.may_use_asset(asset_id) else None
    if bound is not None:
        model = resolve_model(registry, None, asset_id, db=db, model_id=bound)
    else:
        with db.session() as s:
            asset = check_asset_access(s, caller=caller, asset_id=asset_id)
        model = resolve_model(registry, asset, asset_id, db=db)
    ts_ms, values, dicts = validate_batch(
        readings, channels=model.channels, now_s=now.timestamp(), future_tolerance_s=settings.future_tolerance_s,
        manifest=model.manifest,
    )
    check_retention(ts_ms, now=now, retention_days=settings.retention_days)
    batch = _Batch(asset_id=asset_id, ts_ms=ts_ms, values=values, dicts=dicts, now=now, backfill=backfill)
    # The plan (duplicates, windows, scores) is made before the write lock, from one view of
    # the asset's stored rows; under the lock it is used only if the asset's ingest_seq has
    # not moved since, else made again there. Scoring, the costly part, so runs beside other
    # requests' writes instead of queueing behind them.
    with db.connect() as conn:
        view = _Tx(conn)
        try:
            plan: _Plan | None = _prepare(view, batch, model=model, settings=settings, metrics=metrics,
                                          asset=store.asset_row(conn, asset_id))
        finally:
            view.close()
        result = _write(db, conn, plan, batch, registry=registry, model=model, settings=settings, metrics=metrics)
    metrics.readings_accepted.inc(result.accepted)
    metrics.readings_duplicate.inc(result.duplicates)
    metrics.windows_scored.inc(result.windows_scored)
    metrics.windows_skipped.inc(result.gap_windows)
    return result


def _write(
    db: Database, conn: Connection, plan: _Plan | None, batch: _Batch, *,
    registry: ModelRegistry, model: LoadedModel, settings: Settings, metrics: Metrics,
) -> IngestResult:
    """Under the write lock: use the plan if the asset is as it was, else plan again; write."""
    asset_id = batch.asset_id
    for attempt in range(1, MAX_ATTEMPTS + 1):
        try:
            with db.write_transaction(conn):
                tx = _Tx(conn)
                asset = store.asset_for_update(conn, asset_id)
                if plan is None or plan.seq != (asset.ingest_seq if asset is not None else None):
                    metrics.ingest_replans.inc()
                    plan = _prepare(tx, batch, model=model, settings=settings, metrics=metrics, asset=asset)
                result = _apply(tx, plan, batch, model=model, metrics=metrics, asset=asset)
                tx.finish()
            registry.remember_binding(asset_id, model.model_id)
            break
        except IntegrityError as e:
            plan = None
            if attempt == MAX_ATTEMPTS:
                raise Conflict(f"asset {asset_id!r} is being written by another request; retry the batch") from e
            log.info("ingest for %s collided with a concurrent writer (attempt %d); retrying", asset_id, attempt)
            time.sleep(0.01 * attempt)
    return result


class _Tx:
    """A connection for the usual course, and an ORM session on the same connection (and
    transaction) only when a rare step (a new asset, a new threshold version, gap windows, a
    sparse duplicate check) needs one."""

    def __init__(self, conn: Connection) -> None:
        self.conn = conn
        self._session: Session | None = None

    @property
    def session(self) -> Session:
        if self._session is None:
            self._session = Session(bind=self.conn, expire_on_commit=False)
        return self._session

    def finish(self) -> None:
        """Flush what the joined session holds; the connection's block commits it."""
        if self._session is not None:
            self._session.flush()

    def close(self) -> None:
        """End a read-only session (and the transaction it began on the connection)."""
        if self._session is not None:
            self._session.close()
            self._session = None


@dataclass(frozen=True)
class _Batch:
    """A validated batch: epoch-ms times, values (N, C) with NaN for null, the values dicts."""

    asset_id: str
    ts_ms: np.ndarray
    values: np.ndarray
    dicts: list[dict[str, float | None]]
    now: datetime
    backfill: bool = False


@dataclass
class _Plan:
    """What a batch does to its asset, worked out from one view of the asset's stored rows."""

    seq: int | None  # the asset's ingest_seq in that view; None: the asset had no row yet
    duplicates: int = 0
    late: int = 0
    new_rows: list[tuple[int, dict[str, Any]]] = field(default_factory=list)
    max_ms: int | None = None  # the asset's newest reading once the batch is stored
    windows: stream.BatchPlan = field(default_factory=stream.BatchPlan)
    scores: np.ndarray = field(default_factory=lambda: np.empty(0, np.float32))
    shares: np.ndarray = field(default_factory=lambda: np.empty((0, 0)))


class _StoredView:
    """The streaming core's view of one asset's stored rows (service/stream.StoredView)."""

    def __init__(self, tx: _Tx, *, asset_id: str, model: LoadedModel, exists: bool) -> None:
        self.tx, self.asset_id, self.exists = tx, asset_id, exists
        self.key = {"asset_id": asset_id, "model_id": model.model_id, "model_version": model.version}
        self.names = model.channels

    def readings(self, lo_ms: int, hi_ms: int) -> tuple[np.ndarray, np.ndarray]:
        rows = store.readings_between(self.tx.conn, self.asset_id, lo_ms, hi_ms) if self.exists else []
        return np.fromiter((t for t, _ in rows), dtype=np.int64, count=len(rows)), _value_rows(rows, self.names)

    def scored(self, lo: int, hi: int) -> set[int]:
        return store.scored_between(self.tx.conn, lo=lo, hi=hi, **self.key) if self.exists else set()

    def gaps(self, lo: int, hi: int) -> set[int]:
        return q.window_ends_in(self.tx.session, table=SkippedWindow, lo=lo, hi=hi, **self.key) if self.exists else set()

    def first_ms(self) -> int | None:
        return q.reading_span_ms(self.tx.session, asset_id=self.asset_id)[0] if self.exists else None


def _prepare(
    tx: _Tx, batch: _Batch, *, model: LoadedModel, settings: Settings, metrics: Metrics, asset: AssetRow | None
) -> _Plan:
    """Duplicates, conflicts and the windows the new readings make due (service/stream.py),
    scored; nothing written."""
    m = model.manifest
    period = m.sample_period_s
    asset_id, ts_ms, dicts = batch.asset_id, batch.ts_ms, batch.dicts
    plan = _Plan(seq=asset.ingest_seq if asset is not None else None)

    # 1. Readings: duplicates and conflicts.
    prev_max_ms = q.dt_to_ms(asset.last_reading_at) if asset is not None and asset.last_reading_at is not None else None
    # last_reading_at moves in the same transaction as every insert of readings (the only
    # writer), so a timestamp past it cannot be stored yet: only older ones are looked up.
    maybe_stored = ts_ms if prev_max_ms is None else ts_ms[ts_ms <= prev_max_ms]
    stored = _stored_values(tx, asset_id=asset_id, ts_ms=maybe_stored, period=period) if len(maybe_stored) and asset is not None else {}
    new_pos, plan.duplicates = stream.new_readings(asset_id, ts_ms, dicts, stored)
    if not new_pos and not (batch.backfill and asset is not None):
        return plan
    plan.new_rows = [(int(ts_ms[i]), dicts[i]) for i in new_pos]
    new_ms = ts_ms[new_pos]
    newest = [t for t in (prev_max_ms, int(new_ms.max()) if len(new_ms) else None) if t is not None]
    plan.max_ms = max(newest)

    # 2. Windows: the one streaming core, over a view of the stored rows.
    spec = stream.StreamSpec.of(m, hold_steps=settings.hold_steps, lateness_windows=settings.lateness_windows)
    marks = stream.Marks(prev_max_ms, _rule_last_idx(asset, period))
    view = _StoredView(tx, asset_id=asset_id, model=model, exists=asset is not None)
    plan.windows = stream.plan_batch(spec, marks, view, new_ms, batch.values[new_pos], backfill=batch.backfill,
                                     span_ms=(int(ts_ms.min()), int(ts_ms.max())))
    plan.late = plan.windows.late
    if len(plan.windows.ends) == 0:
        return plan

    # 3. Score every window of the request in one batched call.
    t0 = time.perf_counter()
    scored = model.scorer.score(plan.windows.windows(m.window))
    metrics.scoring_seconds.observe(time.perf_counter() - t0)
    plan.scores, plan.shares = scored.score, scored.contributions
    return plan


def _rule_last_idx(asset: AssetRow | None, period: float) -> int | None:
    """The last window end the rule saw, as a grid index (the asset row keeps its time)."""
    if asset is None or asset.last_window_end_ms is None:
        return None
    return int(grid.grid_index(asset.last_window_end_ms / 1000.0, period))


def _apply(
    tx: _Tx, plan: _Plan, batch: _Batch, *, model: LoadedModel, metrics: Metrics, asset: AssetRow | None
) -> IngestResult:
    """Write what `plan` found, under the write lock: readings, gap records, scores, the alert
    rule's alerts, and the asset's marks. `asset` is the row as locked now."""
    m = model.manifest
    period = m.sample_period_s
    asset_id, now, conn = batch.asset_id, batch.now, tx.conn
    result = IngestResult(asset_id, model.model_id, model.version, duplicates=plan.duplicates, late=plan.late)
    if asset is None:
        q.create_asset(tx.session, asset_id=asset_id, model_id=model.model_id)
        asset = store.asset_for_update(conn, asset_id)
        assert asset is not None
    threshold = store.threshold_in_force(conn, asset_id)
    if threshold is None or threshold.model_id != model.model_id or threshold.model_version != model.version:
        _new_threshold_version(tx.session, asset_id=asset_id, model=model, first=threshold is None)
        threshold = store.threshold_in_force(conn, asset_id)
        assert threshold is not None
    result.threshold_version = threshold.version
    wp = plan.windows
    if not plan.new_rows and not len(wp.ends) and not len(wp.gap_new):
        return result
    assert plan.max_ms is not None
    store.insert_readings(conn, asset_id, plan.new_rows, now)
    result.accepted = len(plan.new_rows)

    key = {"asset_id": asset_id, "model_id": model.model_id, "model_version": model.version}
    if len(wp.gap_new):
        q.insert_skipped(tx.session, rows=[{**key, "window_end_index": int(e), "window_end_ms": int(round(int(e) * period * 1000)), "reason": "gap"} for e in wp.gap_new.tolist()])
        result.gap_windows = len(wp.gap_new)
    if len(wp.refilled):
        q.delete_skipped(tx.session, ends=[int(e) for e in wp.refilled], **key)

    last_window_end_ms, last_score = asset.last_window_end_ms, asset.last_score
    if len(wp.ends):
        names = model.channels
        end_ms = np.round(wp.ends * period * 1000).astype(np.int64)
        store.insert_scores(conn, [
            {**key, "window_end_index": int(e), "window_end_ms": int(ms), "score": float(sc),
             "contributions": {c: round(float(x), 6) for c, x in zip(names, sh)}, "threshold_version_id": threshold.id,
             "created_at": now, "rule_saw": bool(saw)}
            for e, ms, sc, sh, saw in zip(wp.ends.tolist(), end_ms.tolist(), plan.scores, plan.shares, wp.rule_saw.tolist())
        ])
        result.windows_scored = len(wp.ends)
        result.first_window_end = q.ms_to_dt(int(end_ms.min()))
        result.last_window_end = q.ms_to_dt(int(end_ms.max()))
        # 4. The alert rule over the windows it sees (newer than every one it saw before).
        saw = wp.rule_saw
        if np.any(saw):
            _run_rule(conn, asset=asset, model=model, threshold=threshold, ends=wp.ends[saw], end_ms=end_ms[saw],
                      scores=plan.scores[saw], shares=plan.shares[saw], now=now, result=result, metrics=metrics,
                      backfilled=batch.backfill)
            last_window_end_ms, last_score = int(end_ms[saw][-1]), float(plan.scores[saw][-1])
    # Every batch that stored readings moves the asset's newest-reading mark (the duplicate
    # check relies on it) and its ingest_seq (the plan check relies on it).
    store.update_asset(conn, asset_id=asset_id, last_reading_at=q.ms_to_dt(plan.max_ms), last_window_end_ms=last_window_end_ms,
                     last_score=last_score, ingest_seq=asset.ingest_seq + 1)
    return result


def _value_rows(rows: list[tuple[int, dict[str, Any]]], names: Sequence[str]) -> np.ndarray:
    """(N, C) float64 of stored readings' values in channel order, NaN for null."""
    nan = float("nan")
    flat = [nan if (x := v.get(c)) is None else x for _, v in rows for c in names]
    return np.array(flat, dtype=np.float64).reshape(len(rows), len(names))


def _new_threshold_version(session: Session, *, asset_id: str, model: LoadedModel, first: bool) -> None:
    """Version 1 from the manifest for a new asset; otherwise the asset's threshold names
    another model version: service/db/bindings.ensure_threshold decides (ModelSwitched when
    this process's model is the stale one; the version the asset missed when it is not)."""
    ensure_threshold(session, asset_id=asset_id, manifest=model.manifest, first=first)


# A batch whose stored-looking timestamps span at most this many grid points per reading
# is checked for duplicates with one range scan; a sparse one (readings years apart) with
# an IN list, so a range never walks an asset's whole history.
DENSE_SPAN_PER_READING = 4


def _stored_values(
    tx: _Tx, *, asset_id: str, ts_ms: np.ndarray, period: float
) -> dict[int, dict[str, Any]]:
    """Stored values of those of `ts_ms` the asset already has."""
    lo, hi = int(ts_ms.min()), int(ts_ms.max())
    if (hi - lo) / (period * 1000.0) <= DENSE_SPAN_PER_READING * len(ts_ms) + 64:
        wanted = set(ts_ms.tolist())
        return {t: v for t, v in store.readings_between(tx.conn, asset_id, lo, hi) if t in wanted}
    return q.existing_readings(tx.session, asset_id=asset_id, ts_ms=ts_ms.tolist())


def _run_rule(
    conn: Connection, *, asset: AssetRow, model: LoadedModel, threshold: ThresholdRow, ends: np.ndarray,
    end_ms: np.ndarray, scores: np.ndarray, shares: np.ndarray, now: datetime, result: IngestResult, metrics: Metrics,
    backfilled: bool,
) -> None:
    """The core's rule transitions over the windows the rule sees, written as alert rows."""
    rule = rule_of(threshold, asset.rule_override)
    history = store.recent_scores(conn, asset_id=asset.asset_id, model_id=model.model_id, model_version=model.version,
                                before_index=int(ends[0]), limit=rule.memory)
    alert = store.active_alert(conn, asset.asset_id)
    state = RuleState.from_history(history, alert.severity if alert else None, rule)  # type: ignore[arg-type]
    shelved = asset.shelved_until is not None and asset.shelved_until > now
    _, transitions = stream.rule_steps(state, scores, rule, shelved=shelved)
    names = model.channels
    for ms, score, sh, transition in zip(end_ms.tolist(), scores.tolist(), shares, transitions):
        if transition is None and alert is None:
            continue
        at = q.ms_to_dt(ms)
        tops = top_channels(sh, names)
        detail = {"score": round(score, 6), "warning": rule.warning, "critical": rule.critical, "threshold_version": threshold.version}
        if transition is not None and transition.kind == "open":
            alert = rule_alerts.open_alert(
                conn, asset_id=asset.asset_id, severity=transition.severity, at=at, score=score, top_channels=tops,
                model_id=model.model_id, model_version=model.version, threshold_version_id=threshold.id, details=detail,
                backfilled=backfilled,
            )
            result.alerts_opened += 1
            result.opened_alert_ids.append(alert.id)
            metrics.alerts_opened.inc(severity=transition.severity)
            continue
        if alert is None:
            continue
        rule_alerts.extend_alert(alert, at=at, score=score, top_channels=tops)
        if transition is not None and transition.kind == "escalate":
            rule_alerts.escalate_alert(conn, alert, at=at, details=detail)
            result.alerts_escalated += 1
        elif transition is not None and transition.kind == "return":
            rule_alerts.return_alert(conn, alert, at=at, details=detail)
            result.alerts_returned += 1
            alert = None
    if alert is not None and alert.dirty:
        store.save_alert(conn, alert)
