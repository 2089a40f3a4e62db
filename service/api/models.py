"""Model registry routes (admin): what is served and which assets use it; reload.

Reload goes through ModelRegistry.reload(), which validates every folder of the model
directory (ONNX loads, names and shapes match the manifest, sha256 matches, a test window
gives finite output) before it switches; a bad candidate is refused with the reason (409)
and the models in service keep serving. Both outcomes are audited. The switch is recorded
in the database (service/db/bindings.py: the binding, one calibrated threshold version per
asset of a changed model created by the caller, the registry generation), so every worker
and replica serves the new version from its next batch on.
"""

from __future__ import annotations

from fastapi import APIRouter
from sqlalchemy import select
from sqlalchemy.orm import Session

from service.api.deps import AdminCaller, DatabaseDep, DbSession, RegistryDep
from service.api.schemas_alerts import ModelChannel, ModelList, ModelOut, ReloadOut, RuleTiming
from service.db.models import Asset, AuditLog
from service.errors import ModelError
from service.models_registry import LoadedModel, ModelRegistry

router = APIRouter(prefix="/v1/models", tags=["models"])


def _assets_by_model(db: Session) -> dict[str, list[str]]:
    out: dict[str, list[str]] = {}
    for asset_id, model_id in db.execute(select(Asset.asset_id, Asset.model_id).order_by(Asset.asset_id)):
        out.setdefault(model_id, []).append(asset_id)
    return out


def _model_out(m: LoadedModel, registry: ModelRegistry, assets: dict[str, list[str]]) -> ModelOut:
    man = m.manifest
    return ModelOut(
        model_id=m.model_id,
        version=m.version,
        versions_available=registry.available_versions(m.model_id),
        created_at=man.created_at,
        loaded_at=m.loaded_at,
        channels=[ModelChannel(name=c.name, unit=c.unit) for c in man.channels],
        sample_period_s=man.sample_period_s,
        window=man.window,
        stride=man.stride,
        window_period_s=man.window_period_s,
        warning=man.thresholds.warning,
        critical=man.thresholds.critical,
        threshold_method=man.thresholds.method,
        provisional=man.provisional.reason if man.provisional is not None else None,
        alert_rule=RuleTiming(**man.alert_rule.model_dump()),
        score_method=man.score.method,
        onnx_sha256=man.onnx_sha256,
        assets=assets.get(m.model_id, []),
    )


@router.get("", response_model=ModelList)
def list_models(db: DbSession, _caller: AdminCaller, registry: RegistryDep) -> ModelList:
    assets = _assets_by_model(db)
    return ModelList(items=[_model_out(m, registry, assets) for m in sorted(registry.models(), key=lambda m: m.model_id)])


@router.post("/reload", response_model=ReloadOut)
def reload_models(database: DatabaseDep, caller: AdminCaller, registry: RegistryDep) -> ReloadOut:
    try:
        result = registry.reload(database, actor=caller.name, reason=f"reload by {caller.name}")
    except ModelError as e:
        with database.transaction() as s:
            s.add(AuditLog(actor=caller.name, action="model.reload_refused", target=str(registry.model_dir), details={"reason": e.message}))
        raise ModelError(f"reload refused, the models in service keep serving: {e.message}") from None
    with database.transaction() as s:
        s.add(
            AuditLog(
                actor=caller.name,
                action="model.reload",
                target=str(registry.model_dir),
                details={"served": result.served, "changed": {m: list(v) for m, v in result.changed.items()}},
            )
        )
        assets = _assets_by_model(s)
    return ReloadOut(
        served=result.served,
        changed={m: {"from": old, "to": new} for m, (old, new) in result.changed.items()},
        models=[_model_out(m, registry, assets) for m in sorted(registry.models(), key=lambda m: m.model_id)],
    )
