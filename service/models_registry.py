"""The model registry: every model folder under the model directory
(`<model_id>/<version>/manifest.json + model.onnx + calibration_scores.json`), loaded
with OnnxScorer and validated before it serves.

Validation of a folder: the manifest parses, ONNX Runtime loads the graph, its input and
output names and shapes match the manifest, the file's sha256 matches the manifest, the
calibration scores parse, and a test window gives finite outputs. The version a model id serves is the cluster's choice, kept in the database
(service/db/bindings.py), so every worker and replica serves the same one: the first process
to see a model id binds its highest version on disk (numeric parts compared as numbers);
after that only `reload()` moves it. `reload()` builds and validates a complete new registry
from the directory's highest versions before it records the switch; on any failure the old
one keeps serving and the error says which folder failed and why. Every other process picks
the switch up before its next batch: `sync()` reads the database's one-row registry
generation and, only when it moved, loads the bound versions from its own disk.

Assets are bound to a model id: `asset_models` setting, else the model whose training
assets list the asset, else `default_model`, else the only model there is.
"""

from __future__ import annotations

import re
import threading
import logging
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING

from service.errors import ModelError, Unavailable
from service.manifest import MANIFEST_FILE, CalibrationScores, Manifest, load_calibration, load_manifest
from service.scoring import DEFAULT_CHUNK, OnnxScorer, ScoringError

if TYPE_CHECKING:
    from service.db.session import Database

log = logging.getLogger("kilter")


@dataclass(frozen=True)
class LoadedModel:
    model_id: str
    version: str
    path: Path
    manifest: Manifest
    scorer: OnnxScorer
    calibration: CalibrationScores
    loaded_at: datetime

    @property
    def channels(self) -> list[str]:
        return self.manifest.channel_names


@dataclass(frozen=True)
class ReloadResult:
    served: dict[str, str]  # model id -> version now served
    changed: dict[str, tuple[str | None, str]] = field(default_factory=dict)  # id -> (old, new)


def version_key(version: str) -> tuple[tuple[int, object], ...]:
    """Sort key: '10' after '9', 'v2' after 'v1'; numbers before words at the same place."""
    parts = re.findall(r"\d+|[^\d]+", version)
    return tuple((0, int(p)) if p.isdigit() else (1, p) for p in parts)


def validate_folder(path: Path, *, threads: int = 1, chunk_size: int = DEFAULT_CHUNK) -> LoadedModel:
    """Load and validate one model folder; ModelError names the folder and the reason."""
    try:
        manifest = load_manifest(path)
    except ValueError as e:
        raise ModelError(str(e)) from e
    if manifest.model_id != path.parent.name or manifest.version != path.name:
        raise ModelError(
            f"{path}: manifest says {manifest.model_id}/{manifest.version}; the folder must be "
            f"<model_id>/<version> = {manifest.model_id}/{manifest.version}"
        )
    try:
        scorer = OnnxScorer(path, threads=threads, chunk_size=chunk_size, manifest=manifest)
        scorer.self_test()
    except ScoringError as e:
        raise ModelError(f"{path}: {e}") from e
    except ValueError as e:
        raise ModelError(f"{path}: {e}") from e
    try:
        calibration = load_calibration(path, manifest)
    except ValueError as e:
        raise ModelError(str(e)) from e
    return LoadedModel(manifest.model_id, manifest.version, path, manifest, scorer, calibration, datetime.now(timezone.utc))


def discover(model_dir: Path) -> dict[str, list[Path]]:
    """model id -> its version folders (those holding a manifest), oldest first."""
    model_dir = Path(model_dir)
    if not model_dir.is_dir():
        raise ModelError(f"{model_dir}: model directory does not exist (set KILTER_MODEL_DIR)")
    found: dict[str, list[Path]] = {}
    for model_path in sorted(p for p in model_dir.iterdir() if p.is_dir() and not p.name.startswith(".")):
        versions = [v for v in model_path.iterdir() if v.is_dir() and (v / MANIFEST_FILE).is_file()]
        if versions:
            found[model_path.name] = sorted(versions, key=lambda v: version_key(v.name))
    if not found:
        raise ModelError(f"{model_dir}: no model folders (<model_id>/<version>/{MANIFEST_FILE}) found")
    return found


class ModelRegistry:
    """Thread-safe view of the served models; swapped whole on reload."""

    def __init__(
        self,
        model_dir: Path,
        *,
        threads: int = 1,
        chunk_size: int = DEFAULT_CHUNK,
        default_model: str | None = None,
        asset_models: dict[str, str] | None = None,
    ) -> None:
        self.model_dir = Path(model_dir)
        self.threads = threads
        self.chunk_size = chunk_size
        self.default_model = default_model
        self.asset_models = dict(asset_models or {})
        self._lock = threading.Lock()
        self._served: dict[str, LoadedModel] = {}
        self._available: dict[str, list[str]] = {}
        # asset id -> model id of assets this process has seen; a binding never changes once
        # the asset exists, so a hit saves the ingest path a database round trip.
        self._bound: dict[str, str] = {}
        # The database's registry generation this process's served set matches (None: not
        # attached to a database yet); `_sync_lock` lets one thread at a time catch up.
        self._generation: int | None = None
        self._sync_lock = threading.Lock()

    def _build(self) -> tuple[dict[str, LoadedModel], dict[str, list[str]]]:
        found = discover(self.model_dir)
        served = {
            model_id: validate_folder(paths[-1], threads=self.threads, chunk_size=self.chunk_size)
            for model_id, paths in found.items()
        }
        for name, bound in [("default_model", self.default_model), *(
            (f"asset_models[{a}]", m) for a, m in self.asset_models.items()
        )]:
            if bound is not None and bound not in served:
                raise ModelError(f"setting {name} names model {bound!r}, but the model directory has {sorted(served)}")
        return served, {m: [p.name for p in paths] for m, paths in found.items()}

    def load(self) -> None:
        """Load everything; ModelError (with the reason) if any served folder fails."""
        served, available = self._build()
        with self._lock:
            self._served, self._available = served, available

    def attach(self, db: Database, *, actor: str = "startup") -> None:
        """Serve what the database binds: bind model ids it has no binding for yet to the
        versions loaded here, then load any bound version that differs (`sync`)."""
        from service.db import bindings

        with self._lock:
            found = {m: lm.version for m, lm in self._served.items()}
        with db.transaction() as s:
            seeded = bindings.seed(s, found=found, actor=actor)
        if seeded:
            log.info("bound %s to the versions found on disk", ", ".join(f"{m}/{found[m]}" for m in seeded))
        self._generation = None
        self.sync(db)

    def sync(self, db: Database) -> None:
        """Catch up with the cluster before a batch: one indexed one-row read; when the
        generation moved, the bound versions are loaded from this process's model directory.
        Unavailable (503) when a bound version cannot be loaded here: this replica must not
        answer with another model than the rest of the cluster."""
        from service.db import bindings

        with db.engine.connect() as conn:
            gen = bindings.generation(conn)
        if gen == self._generation:
            return
        with self._sync_lock:  # one thread catches up; the others wait for it, then find nothing to do
            with db.engine.connect() as conn:
                gen = bindings.generation(conn)
                bound = bindings.bound_versions(conn) if gen != self._generation else {}
            if gen == self._generation:
                return
            self._switch_to(bound)
            self._generation = gen

    def _switch_to(self, bound: dict[str, str]) -> None:
        with self._lock:
            current = dict(self._served)
        served = dict(current)
        for model_id, version in bound.items():
            if model_id in current and current[model_id].version == version:
                continue
            folder = self.model_dir / model_id / version
            try:
                served[model_id] = validate_folder(folder, threads=self.threads, chunk_size=self.chunk_size)
            except ModelError as e:
                raise Unavailable(
                    f"the cluster serves {model_id}/{version} but this replica cannot load it: {e.message}; "
                    f"copy that folder into {self.model_dir} on every replica"
                ) from None
        try:
            available = {m: [p.name for p in paths] for m, paths in discover(self.model_dir).items()}
        except ModelError:
            available = self._available
        with self._lock:
            self._served, self._available = served, available
        for model_id in served:
            if model_id not in current or current[model_id].version != served[model_id].version:
                log.info("now serving %s/%s", model_id, served[model_id].version)

    def reload(self, db: Database | None = None, *, actor: str = "reload", reason: str = "reload") -> ReloadResult:
        """Validate the directory's current contents, then switch; on error keep serving the old set.

        With `db`, the switch is recorded there (bindings, one calibrated threshold version
        per asset of a changed model, the generation) before this process serves it; every
        other process follows at its next `sync`."""
        if db is not None:
            self.sync(db)
        served, available = self._build()
        if db is not None:
            from service.db import bindings

            with db.transaction() as s:
                changed, gen = bindings.switch(s, manifests={m: lm.manifest for m, lm in served.items()}, actor=actor, reason=reason)
            with self._lock:
                self._served, self._available = served, available
            self._generation = gen
            return ReloadResult({m: lm.version for m, lm in served.items()}, changed)
        with self._lock:
            old = self._served
            self._served, self._available = served, available
        changed = {m: (old[m].version if m in old else None, lm.version) for m, lm in served.items() if m not in old or old[m].version != lm.version}
        return ReloadResult({m: lm.version for m, lm in served.items()}, changed)

    @property
    def loaded(self) -> bool:
        return bool(self._served)

    def models(self) -> list[LoadedModel]:
        with self._lock:
            return list(self._served.values())

    def available_versions(self, model_id: str) -> list[str]:
        with self._lock:
            return list(self._available.get(model_id, []))

    def get(self, model_id: str) -> LoadedModel:
        with self._lock:
            try:
                return self._served[model_id]
            except KeyError:
                raise ModelError(f"model {model_id!r} is not loaded; the registry serves {sorted(self._served)}") from None

    def bound_model(self, asset_id: str) -> str | None:
        """The model id an existing asset was bound to, if this process has seen it."""
        return self._bound.get(asset_id)

    def remember_binding(self, asset_id: str, model_id: str) -> None:
        if len(self._bound) > 100_000:
            self._bound.clear()
        self._bound[asset_id] = model_id

    def model_for_asset(self, asset_id: str) -> str | None:
        """The model id a new asset binds to, or None when the choice is ambiguous."""
        with self._lock:
            served = dict(self._served)
        if asset_id in self.asset_models:
            return self.asset_models[asset_id]
        trained_on = [m for m, lm in served.items() if asset_id in lm.manifest.training.assets]
        if len(trained_on) == 1:
            return trained_on[0]
        if self.default_model is not None:
            return self.default_model
        if len(served) == 1:
            return next(iter(served))
        return None
