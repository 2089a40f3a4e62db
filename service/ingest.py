"""The ingest path: validate a batch -> store readings -> form the windows they complete
from *stored* readings -> score them in one batched ONNX Runtime call -> store scores ->
run the alert rule -> write alert rows. One database transaction per request: a batch is
acknowledged only after it is committed, and a rejected batch stores nothing.

Decisions (the numbers are settings, service/settings.py):

* Idempotency: a reading is identified by (asset, timestamp in epoch ms). Re-sending one
  with the same values counts it as a duplicate; with different values it is a 409 that
  names the timestamp. Within one batch the same timestamp twice with different values
  is a 422. Only timestamps up to the asset's newest stored reading (assets.last_reading_at,
  moved in the same transaction as every insert) are looked up: a later one cannot be stored.
* Completion: the window ending on grid index e (e % stride == 0, service/grid.py) is due
  once the asset has a reading at index >= e. Windows are formed from the stored readings
  around them (window + max_fill_steps of look-back), so any replica can take any request;
  each (asset, model version, window end) is scored once — a UNIQUE key in the database.
* Lateness: windows ending more than `lateness_windows` window periods before the asset's
  newest reading are not formed. Readings older than that are stored (and counted as
  `late` in the response) but start no window. Late readings within the limit complete or
  fill windows that were not scored yet; windows already scored are never re-scored.
* Gaps: a window that holds readings but spans a gap longer than the gap policy's
  max_fill_steps is not scored. It is recorded once in skipped_windows, counted in the
  response's `gap_windows` and on the asset listing; if a late reading later closes the
  gap, the window is scored and its skipped record removed. Windows before an asset's
  first reading (warm-up) and windows holding no reading at all (an outage) are neither
  scored nor counted; the asset turns `silent` (see service/db/readings.derive_state).
* Future: readings more than `future_tolerance_s` past the server clock are refused (422).
* The alert rule (service/alerting.py) runs on the newly scored windows that are newer than
  the last window the rule saw for the asset, in window-end order; its state is rebuilt
  from the last `rule.memory` stored scores and the asset's active alert, so nothing lives
  only in this process. A late window filling a hole behind that point is stored but does
  not move the rule. A shelved asset (shelved_until in the future by the server clock)
  opens no alert; an active one may still escalate and return.
* Concurrency: one asset's batches ingest one at a time (its row is locked FOR UPDATE on
  PostgreSQL; SQLite has a single writer). The UNIQUE keys on readings, window scores and
  the active alert turn any remaining race into an IntegrityError, and the whole request
  is retried (MAX_ATTEMPTS), which idempotency makes safe.
* The rule's levels and timing are the asset's newest threshold version; when the served
  model version changes, a new calibrated version is created from the new manifest. The
  asset's `rule_override` (on_k, on_n, off_m, deadband_frac) applies on top.
"""

from __future__ import annotations

import logging
import math
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Any

import numpy as np
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from service import grid
from service.alerting import AlertRule, RuleState, step
from service.api.deps import Caller
from service.db import readings as q
from service.db import rule_alerts
from service.db.models import Asset, SkippedWindow, ThresholdVersion, WindowScore
from service.db.session import Database
from service.db.thresholds import ensure_initial_version
from service.errors import BadInput, Conflict, Forbidden, TooLarge
from service.manifest import Manifest
from service.metrics import Metrics
from service.models_registry import LoadedModel, ModelRegistry
from service.settings import Settings

log = logging.getLogger("echowatch")

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


@dataclass(frozen=True)
class WindowPlan:
    """What the stored readings around a request allow: windows to score and gap windows."""

    score_ends: np.ndarray  # int64 grid indexes, ascending
    windows: np.ndarray  # float32 (B, W, C), filled, raw units
    gap_ends: np.ndarray  # int64 grid indexes of windows spanning a long gap


# --- validation (pure) ------------------------------------------------------------------


def validate_batch(
    readings: Sequence[RawReading], *, channels: Sequence[str], now_s: float, future_tolerance_s: float
) -> tuple[np.ndarray, np.ndarray, list[dict[str, float | None]]]:
    """(ts_ms int64 (N,), values float64 (N, C) with NaN for null, the values dicts in channel
    order); BadInput naming `body.readings[i]...` for unknown or missing channels, a
    timestamp too far in the future, or one timestamp twice with different values."""
    expected = list(channels)
    expected_set = set(expected)
    n = len(readings)
    ts_ms = np.empty(n, dtype=np.int64)
    values = np.empty((n, len(expected)), dtype=np.float64)
    dicts: list[dict[str, float | None]] = []
    seen: dict[int, int] = {}
    for i, r in enumerate(readings):
        where = f"body.readings[{i}]"
        unknown = [c for c in r.values if c not in expected_set]
        if unknown:
            raise BadInput(
                f"{where}.values: unknown channel {unknown[0]!r}; this asset's model has {', '.join(expected)}",
                field=f"{where}.values.{unknown[0]}",
            )
        missing = [c for c in expected if c not in r.values]
        if missing:
            raise BadInput(
                f"{where}.values: missing channel {missing[0]!r}; give every one of {', '.join(expected)} (null when not measured)",
                field=f"{where}.values.{missing[0]}",
            )
        if r.ts_s > now_s + future_tolerance_s:
            ahead = r.ts_s - now_s
            raise BadInput(
                f"{where}.ts: {iso_s(r.ts_s)} lies {ahead:.0f} s past the server clock ({iso_s(now_s)}); "
                f"at most {future_tolerance_s:.0f} s ahead is accepted",
                field=f"{where}.ts",
            )
        t = int(round(r.ts_s * 1000))
        ordered = {c: (None if r.values[c] is None else float(r.values[c])) for c in expected}  # type: ignore[arg-type]
        if t in seen and dicts[seen[t]] != ordered:
            raise BadInput(
                f"{where}.ts: {iso_ms(t)} also appears as readings[{seen[t]}] with different values; send one",
                field=f"{where}.ts",
            )
        seen.setdefault(t, i)
        ts_ms[i] = t
        values[i] = [np.nan if ordered[c] is None else ordered[c] for c in expected]
        dicts.append(ordered)
    return ts_ms, values, dicts


def iso_s(ts_s: float) -> str:
    return datetime.fromtimestamp(ts_s, tz=timezone.utc).isoformat().replace("+00:00", "Z")


def iso_ms(ts_ms: int) -> str:
    return iso_s(ts_ms / 1000.0)


# --- window formation (pure) -------------------------------------------------------------


def candidate_ends(
    *, new_idx: np.ndarray, prev_max_idx: int | None, max_idx: int, manifest: Manifest, lateness_windows: int
) -> np.ndarray:
    """Window ends a request may complete or change: due (<= max_idx), not behind the
    lateness limit, and either newly due or within reach of a new reading."""
    w, s, f = manifest.window, manifest.stride, manifest.gap_policy.max_fill_steps
    cutoff = max_idx - lateness_windows * s
    lo = max(int(new_idx.min()), cutoff)
    first = lo + (-lo) % s
    ends = np.arange(first, max_idx + 1, s, dtype=np.int64)
    if len(ends) == 0:
        return ends
    newly_due = ends > (prev_max_idx if prev_max_idx is not None else np.iinfo(np.int64).min)
    # A reading at index i changes the filled window ending at e iff e - w + 1 - f <= i <= e.
    sorted_new = np.sort(new_idx)
    lo_reach = np.searchsorted(sorted_new, ends - w + 1 - f, side="left")
    hi_reach = np.searchsorted(sorted_new, ends, side="right")
    touched = hi_reach > lo_reach
    return ends[newly_due | touched]


def plan_windows(
    *, ts_s: np.ndarray, values: np.ndarray, candidates: np.ndarray, manifest: Manifest, first_idx: int | None
) -> WindowPlan:
    """Align the stored readings around `candidates` to the grid, fill by the one gap
    policy, and split the candidates into scoreable windows and gap windows (those holding
    at least one reading; starting at or after `first_idx` when it is given)."""
    w, s, f = manifest.window, manifest.stride, manifest.gap_policy.max_fill_steps
    period = manifest.sample_period_s
    c = len(manifest.channels)
    if len(candidates) == 0:
        return WindowPlan(np.empty(0, np.int64), np.empty((0, w, c), np.float32), np.empty(0, np.int64))
    start = int(candidates.min()) - w + 1 - f
    end = int(candidates.max())
    aligned = grid.align(ts_s, values, period, start=start, end=end)
    filled = grid.Grid(aligned.start, grid.fill_gaps(aligned.values, f))
    ok = grid.window_ends(filled, w, s)
    score_ends = np.intersect1d(ok, candidates)
    # Windows that hold at least one observed point but could not be filled are gap windows.
    observed_row = np.any(np.isfinite(aligned.values), axis=1)
    obs_before = np.concatenate([[0], np.cumsum(observed_row)])
    rest = np.setdiff1d(candidates, score_ends)
    hi = rest - start + 1
    lo = hi - w
    holds_data = (obs_before[hi] - obs_before[lo]) > 0
    after_warmup = (rest - w + 1) >= first_idx if first_idx is not None else np.ones(len(rest), dtype=bool)
    gap_ends = rest[holds_data & after_warmup]
    windows = grid.cut_windows(filled, score_ends, w) if len(score_ends) else np.empty((0, w, c), np.float32)
    return WindowPlan(score_ends, windows, gap_ends)


def top_channels(shares: np.ndarray, names: Sequence[str], n: int = TOP_CHANNELS) -> list[dict[str, Any]]:
    order = np.argsort(-shares, kind="stable")[:n]
    return [{"channel": names[i], "share": round(float(shares[i]), 4)} for i in order]


def rule_for(threshold: ThresholdVersion, override: dict[str, Any] | None) -> AlertRule:
    timing = {"on_k": threshold.on_k, "on_n": threshold.on_n, "off_m": threshold.off_m, "deadband_frac": threshold.deadband_frac}
    for k in timing:
        if override and override.get(k) is not None:
            timing[k] = override[k]
    return AlertRule(warning=threshold.warning, critical=threshold.critical, **timing)


def manifest_rule(manifest: Manifest) -> dict[str, float]:
    t, r = manifest.thresholds, manifest.alert_rule
    return {"warning": t.warning, "critical": t.critical, "on_k": r.on_k, "on_n": r.on_n, "off_m": r.off_m, "deadband_frac": r.deadband_frac}


# --- the request -------------------------------------------------------------------------


def check_asset_access(session: Session, *, caller: Caller, asset_id: str) -> Asset | None:
    """The asset row (None if new); Forbidden/BadInput when a limited key may not use it."""
    asset = q.get_asset(session, asset_id=asset_id)
    if not caller.may_use_asset(asset_id):
        allowed = ", ".join(sorted(caller.assets or ()))
        if asset is not None:
            raise Forbidden(f"key {caller.name!r} may post only for {allowed}, not {asset_id!r}")
        raise BadInput(f"unknown asset {asset_id!r}: key {caller.name!r} may post only for {allowed}", field="path.asset_id")
    return asset


def resolve_model(registry: ModelRegistry, asset: Asset | None, asset_id: str) -> LoadedModel:
    model_id = asset.model_id if asset is not None else registry.model_for_asset(asset_id)
    if model_id is None:
        served = sorted(m.model_id for m in registry.models())
        raise BadInput(
            f"no model is bound to new asset {asset_id!r} and several are served ({', '.join(served)}): "
            "set ECHOWATCH_DEFAULT_MODEL or ECHOWATCH_ASSET_MODELS",
            field="path.asset_id",
        )
    return registry.get(model_id)


def ingest(
    *,
    db: Database,
    registry: ModelRegistry,
    settings: Settings,
    metrics: Metrics,
    caller: Caller,
    asset_id: str,
    readings: Sequence[RawReading],
    now: datetime | None = None,
) -> IngestResult:
    """Store one batch of an asset's readings and score what it completes; see the module docstring."""
    if len(readings) > settings.max_batch_readings:
        raise TooLarge(f"{len(readings)} readings in one post; at most {settings.max_batch_readings} are accepted", field="body.readings")
    if not readings:
        raise BadInput("body.readings: give at least one reading", field="body.readings")
    now = now or datetime.now(timezone.utc)
    bound = registry.bound_model(asset_id) if caller.may_use_asset(asset_id) else None
    if bound is not None:
        model = registry.get(bound)
    else:
        with db.session() as s:
            asset = check_asset_access(s, caller=caller, asset_id=asset_id)
        model = resolve_model(registry, asset, asset_id)
    ts_ms, values, dicts = validate_batch(
        readings, channels=model.channels, now_s=now.timestamp(), future_tolerance_s=settings.future_tolerance_s
    )
    for attempt in range(1, MAX_ATTEMPTS + 1):
        try:
            with db.transaction() as session:
                result = _ingest_tx(session, model=model, settings=settings, metrics=metrics, asset_id=asset_id,
                                    ts_ms=ts_ms, values=values, dicts=dicts, now=now)
            registry.remember_binding(asset_id, model.model_id)
            break
        except IntegrityError as e:
            if attempt == MAX_ATTEMPTS:
                raise Conflict(f"asset {asset_id!r} is being written by another request; retry the batch") from e
            log.info("ingest for %s collided with a concurrent writer (attempt %d); retrying", asset_id, attempt)
            time.sleep(0.01 * attempt)
    metrics.readings_accepted.inc(result.accepted)
    metrics.readings_duplicate.inc(result.duplicates)
    metrics.windows_scored.inc(result.windows_scored)
    metrics.windows_skipped.inc(result.gap_windows)
    return result


def _ingest_tx(
    session: Session,
    *,
    model: LoadedModel,
    settings: Settings,
    metrics: Metrics,
    asset_id: str,
    ts_ms: np.ndarray,
    values: np.ndarray,
    dicts: list[dict[str, float | None]],
    now: datetime,
) -> IngestResult:
    m = model.manifest
    period = m.sample_period_s
    result = IngestResult(asset_id, model.model_id, model.version)

    asset = q.get_asset(session, asset_id=asset_id, for_update=True)
    if asset is None:
        asset = q.create_asset(session, asset_id=asset_id, model_id=model.model_id)
    threshold = ensure_initial_version(session, asset=asset, manifest=m)
    if threshold.model_id != model.model_id or threshold.model_version != model.version:
        threshold = q.add_threshold_version(
            session, asset_id=asset_id, rule=manifest_rule(m), origin="calibrated",
            budget_per_week=m.thresholds.warning_budget_per_week,
            reason=f"model changed to {model.model_id}/{model.version}", created_by=f"model {model.model_id}/{model.version}",
            model_id=model.model_id, model_version=model.version,
        )
    result.threshold_version = threshold.version

    # 1. Readings: duplicates, conflicts, inserts.
    prev_max_ms = q.dt_to_ms(asset.last_reading_at) if asset.last_reading_at is not None else None
    # last_reading_at moves in the same transaction as every insert of readings (below, the
    # only writer), so a timestamp past it cannot be stored yet: only older ones are looked up.
    maybe_stored = ts_ms if prev_max_ms is None else ts_ms[ts_ms <= prev_max_ms]
    stored = q.existing_readings(session, asset_id=asset_id, ts_ms=maybe_stored.tolist()) if len(maybe_stored) else {}
    new_rows: list[tuple[int, dict[str, Any]]] = []
    new_pos: list[int] = []
    taken: set[int] = set()
    for i, (t, v) in enumerate(zip(ts_ms.tolist(), dicts)):
        if t in stored:
            if stored[t] != v:
                raise Conflict(
                    f"body.readings[{i}].ts: {iso_ms(t)} is already stored for {asset_id!r} with different values; "
                    "a reading cannot be changed once stored",
                    field=f"body.readings[{i}].ts",
                    details={"ts": iso_ms(t), "stored": stored[t]},
                )
            result.duplicates += 1
        elif t in taken:
            result.duplicates += 1  # the same reading twice in this batch
        else:
            taken.add(t)
            new_rows.append((t, v))
            new_pos.append(i)
    q.insert_readings(session, asset_id=asset_id, rows=new_rows, received_at=now)
    result.accepted = len(new_rows)
    if not new_rows:
        return result

    new_ms = ts_ms[new_pos]
    new_idx = grid.grid_index(new_ms / 1000.0, period)
    max_ms = int(new_ms.max()) if prev_max_ms is None else max(prev_max_ms, int(new_ms.max()))
    max_idx = int(grid.grid_index(max_ms / 1000.0, period))
    prev_max_idx = int(grid.grid_index(prev_max_ms / 1000.0, period)) if prev_max_ms is not None else None
    cutoff = max_idx - settings.lateness_windows * m.stride
    result.late = int(np.count_nonzero(new_idx < cutoff))
    asset.last_reading_at = q.ms_to_dt(max_ms)

    # 2. Windows: candidates, minus those already scored, formed from stored readings.
    # Only a window that was already due (end <= the previous newest reading) can have
    # been scored or recorded as a gap before; newer ones need no look-up.
    cands = candidate_ends(new_idx=new_idx, prev_max_idx=prev_max_idx, max_idx=max_idx, manifest=m, lateness_windows=settings.lateness_windows)
    key = {"asset_id": asset_id, "model_id": model.model_id, "model_version": model.version}
    was_due = cands[cands <= prev_max_idx] if prev_max_idx is not None else cands[:0]
    if len(was_due):
        done = q.window_ends_in(session, table=WindowScore, lo=int(was_due.min()), hi=int(was_due.max()), **key)
        if done:
            cands = cands[~np.isin(cands, np.fromiter(done, np.int64, len(done)))]
    if len(cands) == 0:
        return result
    reach_lo = int(cands.min()) - m.window + 1 - m.gap_policy.max_fill_steps
    start_ms = int(math.floor((reach_lo - 0.5) * period * 1000))
    end_ms_excl = int(math.ceil((int(cands.max()) + 0.5) * period * 1000))
    first_new_ms = int(new_ms.min())
    if prev_max_ms is not None and prev_max_ms < first_new_ms and not stored:
        # A pure append: nothing is stored from the batch's first reading on, so only the
        # look-back comes from the database and the rest is this batch.
        rows = q.readings_between(session, asset_id=asset_id, start_ms=start_ms, end_ms=min(first_new_ms, end_ms_excl))
        rows += [(t, v) for t, v in sorted(new_rows) if start_ms <= t < end_ms_excl]
    else:
        rows = q.readings_between(session, asset_id=asset_id, start_ms=start_ms, end_ms=end_ms_excl)
    names = model.channels
    ts_all = np.array([t for t, _ in rows], dtype=np.float64) / 1000.0
    vals_all = np.array([[np.nan if v.get(c) is None else v[c] for c in names] for _, v in rows], dtype=np.float64).reshape(len(rows), len(names))
    plan = plan_windows(ts_s=ts_all, values=vals_all, candidates=cands, manifest=m, first_idx=None)

    # Gap windows: record once; windows before the asset's first reading are warm-up, not gaps.
    gap_ends = plan.gap_ends
    if len(gap_ends):
        first_ms, _ = q.reading_span_ms(session, asset_id=asset_id)
        first_idx = int(grid.grid_index(first_ms / 1000.0, period)) if first_ms is not None else max_idx
        gap_ends = gap_ends[(gap_ends - m.window + 1) >= first_idx]
    if len(gap_ends):
        already = q.window_ends_in(session, table=SkippedWindow, lo=int(gap_ends.min()), hi=int(gap_ends.max()), **key)
        fresh = [int(e) for e in gap_ends if int(e) not in already]
        q.insert_skipped(session, rows=[{**key, "window_end_index": e, "window_end_ms": int(round(e * period * 1000)), "reason": "gap"} for e in fresh])
        result.gap_windows = len(fresh)
    if len(plan.score_ends) == 0:
        return result
    # A gap closed by a late reading: its window is scored now and its gap record goes.
    refilled = plan.score_ends[plan.score_ends <= prev_max_idx] if prev_max_idx is not None else plan.score_ends[:0]
    if len(refilled):
        q.delete_skipped(session, ends=[int(e) for e in refilled], **key)

    # 3. Score every window of the request in one batched call.
    t0 = time.perf_counter()
    scored = model.scorer.score(plan.windows)
    metrics.scoring_seconds.observe(time.perf_counter() - t0)
    shares = scored.contributions  # (B, C)
    end_ms = np.round(plan.score_ends * period * 1000).astype(np.int64)
    q.insert_window_scores(session, rows=[
        {**key, "window_end_index": int(e), "window_end_ms": int(ms), "score": float(sc),
         "contributions": {c: round(float(x), 6) for c, x in zip(names, sh)}, "threshold_version_id": threshold.id, "created_at": now}
        for e, ms, sc, sh in zip(plan.score_ends, end_ms, scored.score, shares)
    ])
    result.windows_scored = len(plan.score_ends)
    result.first_window_end = q.ms_to_dt(int(end_ms[0]))
    result.last_window_end = q.ms_to_dt(int(end_ms[-1]))

    # 4. The alert rule over the windows newer than the last one it saw.
    fresh_mask = end_ms > (asset.last_window_end_ms if asset.last_window_end_ms is not None else np.iinfo(np.int64).min)
    if not np.any(fresh_mask):
        return result
    _run_rule(session, asset=asset, model=model, threshold=threshold, ends=plan.score_ends[fresh_mask], end_ms=end_ms[fresh_mask],
              scores=scored.score[fresh_mask], shares=shares[fresh_mask], now=now, result=result, metrics=metrics)
    asset.last_window_end_ms = int(end_ms[fresh_mask][-1])
    asset.last_score = float(scored.score[fresh_mask][-1])
    return result


def _run_rule(
    session: Session, *, asset: Asset, model: LoadedModel, threshold: ThresholdVersion, ends: np.ndarray, end_ms: np.ndarray,
    scores: np.ndarray, shares: np.ndarray, now: datetime, result: IngestResult, metrics: Metrics,
) -> None:
    rule = rule_for(threshold, asset.rule_override)
    history = q.recent_scores(session, asset_id=asset.asset_id, model_id=model.model_id, model_version=model.version,
                              before_index=int(ends[0]), limit=rule.memory)
    alert = q.active_alert(session, asset_id=asset.asset_id)
    state = RuleState.from_history(history, alert.severity if alert else None, rule)  # type: ignore[arg-type]
    shelved = asset.shelved_until is not None and asset.shelved_until > now
    names = model.channels
    for ms, score, sh in zip(end_ms.tolist(), scores.tolist(), shares):
        at = q.ms_to_dt(ms)
        state, transition = step(state, score, rule, shelved=shelved)
        tops = top_channels(sh, names)
        detail = {"score": round(score, 6), "warning": rule.warning, "critical": rule.critical, "threshold_version": threshold.version}
        if transition is not None and transition.kind == "open":
            alert = rule_alerts.open_alert(
                session, asset_id=asset.asset_id, severity=transition.severity, at=at, score=score, top_channels=tops,
                model_id=model.model_id, model_version=model.version, threshold_version_id=threshold.id, details=detail,
            )
            result.alerts_opened += 1
            result.opened_alert_ids.append(alert.id)
            metrics.alerts_opened.inc(severity=transition.severity)
            continue
        if alert is None:
            continue
        rule_alerts.extend_alert(alert, at=at, score=score, top_channels=tops)
        if transition is not None and transition.kind == "escalate":
            rule_alerts.escalate_alert(session, alert, at=at, details=detail)
            result.alerts_escalated += 1
        elif transition is not None and transition.kind == "return":
            rule_alerts.return_alert(session, alert, at=at, details=detail)
            result.alerts_returned += 1
            alert = None
    session.flush()
