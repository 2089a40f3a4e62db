"""GET /v1/models and POST /v1/models/reload on a copy of the bundled model: a valid new
version switches; a corrupt one is refused with the reason and the old one keeps serving."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest
from sqlalchemy import select

from alerts_support import MODEL_ID, Service, add_asset, bundled_model_dir, running
from service.db.models import AuditLog
from service.manifest import MANIFEST_FILE, file_sha256
from service.models_registry import version_key


@pytest.fixture()
def model_dir(tmp_path) -> Path:
    root = tmp_path / "models"
    versions = [p for p in (bundled_model_dir() / MODEL_ID).iterdir() if (p / MANIFEST_FILE).is_file()]
    bundled_version = max(versions, key=lambda p: version_key(p.name))  # the one the service serves
    shutil.copytree(bundled_version, root / MODEL_ID / bundled_version.name, ignore=shutil.ignore_patterns("report"))
    return root


@pytest.fixture()
def svc(tmp_path, model_dir):
    with running(tmp_path, model_dir=model_dir) as s:
        add_asset(s, "pump-01")
        add_asset(s, "pump-02")
        yield s


def new_version(model_dir: Path, version: str, edit=None) -> Path:
    """Copy the served folder as `version`, optionally editing the manifest dict."""
    src = sorted((model_dir / MODEL_ID).iterdir())[0]
    dst = model_dir / MODEL_ID / version
    shutil.copytree(src, dst)
    manifest = json.loads((dst / MANIFEST_FILE).read_text())
    manifest["version"] = version
    if edit:
        edit(manifest, dst)
    (dst / MANIFEST_FILE).write_text(json.dumps(manifest))
    return dst


def served(svc: Service) -> str:
    (m,) = svc.client.get("/v1/models", headers=svc.h("admin")).json()["items"]
    return m["version"]


def score_version(svc: Service) -> str:
    man = svc.app.state.registry.get(MODEL_ID).manifest
    window = [man.scaler.center] * man.window
    r = svc.client.post("/v1/score", json={"windows": [window]}, headers=svc.h("machine"))
    assert r.status_code == 200, r.text
    return r.json()["model_version"]


def test_list_models(svc: Service):
    r = svc.client.get("/v1/models", headers=svc.h("admin"))
    assert r.status_code == 200
    (m,) = r.json()["items"]
    man = svc.manifest()
    assert (m["model_id"], m["version"], m["versions_available"]) == (MODEL_ID, man.version, [man.version])
    assert [c["name"] for c in m["channels"]] == man.channel_names
    assert (m["window"], m["stride"], m["window_period_s"]) == (man.window, man.stride, man.window_period_s)
    assert m["assets"] == ["pump-01", "pump-02"]
    assert m["onnx_sha256"] == man.onnx_sha256


def test_reload_switches_to_a_valid_new_version(svc: Service, model_dir: Path):
    old = served(svc)
    same = svc.client.post("/v1/models/reload", headers=svc.h("admin"))
    assert same.status_code == 200 and same.json()["changed"] == {}
    new_version(model_dir, "2")
    r = svc.client.post("/v1/models/reload", headers=svc.h("admin"))
    assert r.status_code == 200, r.text
    assert r.json()["served"] == {MODEL_ID: "2"}
    assert r.json()["changed"] == {MODEL_ID: {"from": old, "to": "2"}}
    assert served(svc) == "2" and score_version(svc) == "2"
    (m,) = svc.client.get("/v1/models", headers=svc.h("admin")).json()["items"]
    assert m["versions_available"] == [old, "2"]


def _flip_bytes(_manifest: dict, folder: Path) -> None:
    data = bytearray((folder / "model.onnx").read_bytes())
    data[len(data) // 2] ^= 0xFF
    (folder / "model.onnx").write_bytes(bytes(data))


def _garbage_with_matching_sha(manifest: dict, folder: Path) -> None:
    (folder / "model.onnx").write_bytes(b"this is not an ONNX graph")
    manifest["onnx_sha256"] = file_sha256(folder / "model.onnx")


def _wrong_window(manifest: dict, _folder: Path) -> None:
    manifest["window"] = manifest["window"] + 1


def _wrong_folder_name(manifest: dict, _folder: Path) -> None:
    manifest["version"] = "7"


@pytest.mark.parametrize(
    ("edit", "reason"),
    [
        (_flip_bytes, "sha256"),
        (_garbage_with_matching_sha, "could not load"),
        (_wrong_window, "does not match"),
        (_wrong_folder_name, "folder must be"),
    ],
)
def test_a_bad_candidate_is_refused_and_the_old_model_keeps_serving(svc: Service, model_dir: Path, edit, reason):
    old = served(svc)
    new_version(model_dir, "3", edit)
    r = svc.client.post("/v1/models/reload", headers=svc.h("admin"))
    assert r.status_code == 409, r.text
    err = r.json()["error"]
    assert err["code"] == "model_invalid"
    assert reason in err["message"] and "keep serving" in err["message"] and "/3" in err["message"]
    assert served(svc) == old and score_version(svc) == old
    with svc.db.session() as s:
        refused = list(s.scalars(select(AuditLog).where(AuditLog.action == "model.reload_refused")))
    assert len(refused) == 1 and reason in refused[0].details["reason"] and refused[0].actor == "admin-tester"


def test_models_need_an_admin(svc: Service):
    for role in ("machine", "maintenance", "operator"):
        assert svc.client.get("/v1/models", headers=svc.h(role)).status_code == 403
        assert svc.client.post("/v1/models/reload", headers=svc.h(role)).status_code == 403
    assert svc.client.get("/v1/models").status_code == 401
    assert svc.client.post("/v1/models/reload").status_code == 401


def _points(target: str):
    def edit(manifest: dict, _folder: Path) -> None:
        manifest["onnx_file"] = target

    return edit


def _symlink_out(manifest: dict, folder: Path) -> None:
    outside = folder.parent.parent / "elsewhere.onnx"
    (folder / "model.onnx").rename(outside)
    (folder / "model.onnx").symlink_to(outside)


@pytest.mark.parametrize(
    ("edit", "reason"),
    [
        (_points("../1/model.onnx"), "onnx_file"),
        (_points("/etc/passwd"), "onnx_file"),
        (_points(".."), "onnx_file"),
        (_symlink_out, "inside the model folder"),
    ],
)
def test_a_manifest_cannot_point_outside_its_folder(svc: Service, model_dir: Path, edit, reason):
    """The graph a manifest names is a file of its own folder: a path to another version's
    graph, to any file on the machine, or a symlink leading out is refused before it is read."""
    old = served(svc)
    new_version(model_dir, "4", edit)
    r = svc.client.post("/v1/models/reload", headers=svc.h("admin"))
    assert r.status_code == 409, r.text
    message = r.json()["error"]["message"]
    assert reason in message and "/4" in message
    assert "sha256" not in message  # nothing outside the folder was hashed
    assert served(svc) == old
