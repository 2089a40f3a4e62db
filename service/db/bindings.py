"""Which model version the cluster serves, kept in the database so every worker and
replica agrees (issue 11).

* `model_bindings` holds one row per model id: the version served and who switched to it.
  A process serves what this table says, never just the highest folder on its own disk;
  the first process to see a model id records the highest version it found (`seed`).
* `cluster_counters['registry_generation']` moves with every switch. Each process reads
  that one row before a batch (`generation`) and reloads from disk only when it moved
  (service/models_registry.py), so a reload served by one worker is picked up by every
  other worker and replica before its next batch.
* A switch (`switch`, one transaction) locks the rows of the assets bound to the model id,
  gives each of them one new threshold version holding the new model's calibrated levels
  (created by the person who switched; the audit row names them), moves the binding and
  the generation. Nothing else creates threshold versions for a model change: an ingest
  whose model is older than the binding stores nothing and says so (`ensure_threshold`
  raises ModelSwitched), so a worker that has not seen the switch yet never undoes it.

Callers commit; these functions add and flush.
"""

from __future__ import annotations

from datetime import datetime, timezone

from typing import Any

from sqlalchemy import Connection, Select, bindparam, select, update
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from service.db import readings as q
from service.db.models import Asset, AuditLog, ClusterCounter, ModelBinding
from service.db.prepared import prepared
from service.db.thresholds import ensure_initial_version
from service.errors import ModelSwitched
from service.manifest import Manifest

GENERATION = "registry_generation"


def _generation_statement() -> Select[Any]:
    return select(ClusterCounter.value).where(ClusterCounter.name == bindparam("name"))


def generation(conn: Connection) -> int:
    """The registry generation (0 before any switch): the one-row check made before each
    batch, as one compiled statement on the cursor (service/db/prepared.py), since every
    request pays it."""
    rows = prepared(conn.dialect, "registry_generation", _generation_statement).rows(conn, {"name": GENERATION})
    return int(rows[0][0]) if rows else 0


def bound_versions(conn: Connection | Session) -> dict[str, str]:
    """model id -> the version the cluster serves."""
    return {m: v for m, v in conn.execute(select(ModelBinding.model_id, ModelBinding.version))}


def seed(session: Session, *, found: dict[str, str], actor: str) -> list[str]:
    """Record a binding for each model id in `found` (id -> version) that has none yet; the
    model ids seeded. Another process seeding the same id at once wins harmlessly (the
    primary key decides; the savepoint keeps this transaction usable)."""
    have = bound_versions(session)
    seeded = []
    for model_id, version in sorted(found.items()):
        if model_id in have:
            continue
        try:
            with session.begin_nested():
                session.add(ModelBinding(model_id=model_id, version=version, switched_by=actor))
                session.flush()
        except IntegrityError:
            continue
        session.add(AuditLog(actor=actor, action="model.bind", target=f"model:{model_id}", details={"version": version}))
        seeded.append(model_id)
    return seeded


def switch(session: Session, *, manifests: dict[str, Manifest], actor: str, reason: str) -> tuple[dict[str, tuple[str | None, str]], int]:
    """Bind each model id of `manifests` to that manifest's version, in this transaction.

    For every model id whose binding moves: each asset bound to it (row-locked, in id order,
    so two switches queue instead of deadlocking) gets one calibrated threshold version from
    the new manifest, created by `actor`. Returns ({model id: (old version, new)}, the
    registry generation after the switch; unchanged when nothing moved)."""
    have = bound_versions(session)
    changed: dict[str, tuple[str | None, str]] = {}
    now = datetime.now(timezone.utc)
    for model_id, m in sorted(manifests.items()):
        old = have.get(model_id)
        if old == m.version:
            continue
        changed[model_id] = (old, m.version)
        assets = list(session.scalars(
            select(Asset).where(Asset.model_id == model_id).order_by(Asset.asset_id).with_for_update()
        ))
        versions = {}
        for asset in assets:
            row = _calibrated_version(session, asset_id=asset.asset_id, manifest=m, actor=actor,
                                      reason=f"model switched from {model_id}/{old} to {model_id}/{m.version}: {reason}")
            versions[asset.asset_id] = row.version
        if old is None:
            session.add(ModelBinding(model_id=model_id, version=m.version, switched_at=now, switched_by=actor))
        else:
            session.execute(update(ModelBinding).where(ModelBinding.model_id == model_id)
                            .values(version=m.version, switched_at=now, switched_by=actor))
        session.add(AuditLog(actor=actor, action="model.switch", target=f"model:{model_id}",
                             details={"from": old, "to": m.version, "reason": reason, "threshold_versions": versions}))
    if changed:
        session.execute(update(ClusterCounter).where(ClusterCounter.name == GENERATION).values(value=ClusterCounter.value + 1))
    session.flush()
    return changed, int(session.scalar(select(ClusterCounter.value).where(ClusterCounter.name == GENERATION)) or 0)


def _calibrated_version(session: Session, *, asset_id: str, manifest: Manifest, actor: str, reason: str):  # noqa: ANN202
    t, r = manifest.thresholds, manifest.alert_rule
    return q.add_threshold_version(
        session, asset_id=asset_id, origin="calibrated", reason=reason, created_by=actor,
        rule={"warning": t.warning, "critical": t.critical, "on_k": r.on_k, "on_n": r.on_n, "off_m": r.off_m, "deadband_frac": r.deadband_frac},
        budget_per_week=t.warning_budget_per_week, model_id=manifest.model_id, model_version=manifest.version,
    )


def ensure_threshold(session: Session, *, asset_id: str, manifest: Manifest, first: bool) -> None:
    """Under the ingest's write lock, for a batch scored with `manifest`'s model: version 1
    from the manifest for a new asset, or, when the asset's threshold in force names another
    model version, the calibrated version the asset missed (once: the lock serialises).

    ModelSwitched when the binding names another version than the one the batch was scored
    with: this process has not seen a switch yet; the caller stores nothing."""
    binding = session.get(ModelBinding, manifest.model_id)
    if binding is not None and binding.version != manifest.version:
        raise ModelSwitched(
            f"model {manifest.model_id} was switched to version {binding.version} while this batch was scored with "
            f"version {manifest.version}; nothing was stored: send the batch again",
            field="path.asset_id",
        )
    asset = session.get(Asset, asset_id)
    assert asset is not None
    if first:
        ensure_initial_version(session, asset=asset, manifest=manifest)
    else:
        # An asset bound before the switch but skipped by it (created by a process that had
        # not seen the switch, or a database from before bindings existed).
        who = binding.switched_by if binding is not None else "startup"
        _calibrated_version(session, asset_id=asset_id, manifest=manifest, actor=who,
                            reason=f"model {manifest.model_id}/{manifest.version} is bound (switched by {who})")
    session.flush()
