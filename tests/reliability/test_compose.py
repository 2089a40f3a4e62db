"""What can be checked of docker/ without a Docker engine: the compose file parses and is
consistent (services, ports, environment, the proxy's upstreams), the images' install steps
are the Makefile's, the service image carries no torch, and the service starts with the
settings the compose file gives it (against the test PostgreSQL when it is installed,
else SQLite), after the migrate service's command has run."""

from __future__ import annotations

import os
import re
import subprocess
import time
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import httpx
import pytest

import support

yaml = pytest.importorskip("yaml", reason="PyYAML is in the dev extra")

DOCKER = support.REPO / "docker"
REPLICAS = ("service-a", "service-b")


def compose() -> dict[str, Any]:
    return yaml.safe_load((DOCKER / "compose.yaml").read_text())


def substitute(value: str, env: dict[str, str]) -> str:
    """Compose's ${VAR}, ${VAR:-default} and ${VAR:?message} interpolation."""

    def one(m: re.Match[str]) -> str:
        name, op, arg = m.group(1), m.group(2), m.group(3)
        if name in env and env[name] != "":
            return env[name]
        if op == ":?":
            raise ValueError(f"{name} must be set: {arg}")
        return arg if op == ":-" else ""

    return re.sub(r"\$\{([A-Z_][A-Z0-9_]*)(?:(:[-?])([^}]*))?\}", one, value)


def makefile_install_line() -> str:
    text = (support.REPO / "Makefile").read_text()
    m = re.search(r"\$\(BIN\)/pip install (--quiet )?-c constraints.txt -e '?\.\[[a-z,]+\]'?", text)
    assert m, "the Makefile's install target should pip install -c constraints.txt -e '.[...]'"
    return m.group(0)


def test_compose_file_is_consistent() -> None:
    doc = compose()
    services = doc["services"]
    assert {"db", "migrate", *REPLICAS, "proxy"} <= set(services)
    db = services["db"]
    assert db["image"].startswith("postgres:")
    pg_env = db["environment"]
    for name in REPLICAS + ("migrate",):
        svc = services[name]
        assert svc["build"]["dockerfile"] == "docker/Dockerfile.service"
        env = svc["environment"]
        url = urlsplit(substitute(env["KILTER_DATABASE_URL"], {"KILTER_DB_PASSWORD": "pw"}))
        assert url.scheme == "postgresql+psycopg"
        assert url.hostname == "db" and url.port == 5432
        assert url.username == pg_env["POSTGRES_USER"] and url.path.lstrip("/") == pg_env["POSTGRES_DB"]
        # Both sides take the password from the same variable, which must be set.
        assert "${KILTER_DB_PASSWORD:?" in env["KILTER_DATABASE_URL"] and "${KILTER_DB_PASSWORD:?" in pg_env["POSTGRES_PASSWORD"]
        with pytest.raises(ValueError, match="KILTER_DB_PASSWORD"):
            substitute(env["KILTER_DATABASE_URL"], {})
        assert env["KILTER_AUTO_UPGRADE"] == "false"
    assert services["migrate"]["command"][:3] == ["kilter", "db", "upgrade"]
    # Every setting the replicas must agree on is set, once, for both (one anchor), and parses.
    from service.settings import SHARED_SETTINGS, Settings

    envs = [services[n]["environment"] for n in REPLICAS]
    assert envs[0] == envs[1]
    missing = [n for n in SHARED_SETTINGS if f"KILTER_{n.upper()}" not in envs[0]]
    assert not missing, f"compose.yaml leaves these shared settings to each replica's defaults: {missing}"
    parsed = Settings(_env_file=None, **{n: substitute(str(envs[0][f"KILTER_{n.upper()}"]), {"KILTER_DB_PASSWORD": "pw"})
                                         for n in SHARED_SETTINGS if n != "asset_models"})
    assert parsed.auto_upgrade is False
    assert "FORWARDED_ALLOW_IPS" not in envs[0], "uvicorn's own trust of forwarded headers is off; KILTER_TRUSTED_PROXIES decides"
    # The only proxy trusted is the proxy: its fixed address on the replicas' network.
    proxy_address = services["proxy"]["networks"]["backend"]["ipv4_address"]
    assert parsed.trusted_proxy_list == [proxy_address]
    assert services["migrate"]["depends_on"]["db"]["condition"] == "service_healthy"
    for name in REPLICAS:
        svc = services[name]
        assert svc["depends_on"]["migrate"]["condition"] == "service_completed_successfully"
        assert "ports" not in svc, "replicas are reached only through the proxy"
        cmd = svc["command"]
        port = cmd[cmd.index("--port") + 1]
        assert svc["expose"] == [port]
        assert int(cmd[cmd.index("--workers") + 1]) >= 1
    assert services[REPLICAS[0]]["command"] == services[REPLICAS[1]]["command"]
    # The proxy publishes on loopback only and forwards to exactly the replicas' ports.
    proxy = services["proxy"]
    assert all(p.startswith("127.0.0.1:") for p in proxy["ports"])
    conf = (DOCKER / "nginx.conf").read_text()
    upstream = re.search(r"upstream\s+(\w+)\s*\{([^}]*)\}", conf)
    assert upstream
    servers = re.findall(r"server\s+([\w.-]+):(\d+)", upstream.group(2))
    assert sorted(servers) == sorted((n, services[n]["command"][services[n]["command"].index("--port") + 1]) for n in REPLICAS)
    assert f"proxy_pass http://{upstream.group(1)};" in conf
    listen = re.search(r"listen\s+(\d+);", conf)
    assert listen and all(p.endswith(f":{listen.group(1)}") for p in proxy["ports"])
    assert "./nginx.conf:/etc/nginx/nginx.conf:ro" in proxy["volumes"]
    # The edge cap is the service's default body cap (2 MB).
    from service.settings import Settings

    cap = re.search(r"client_max_body_size\s+(\d+)m;", conf)
    assert cap and int(cap.group(1)) * 1_000_000 == Settings.model_fields["max_body_bytes"].default


def test_images_install_like_the_makefile_and_the_service_has_no_torch() -> None:
    make = makefile_install_line()
    assert "-c constraints.txt -e" in make
    service = (DOCKER / "Dockerfile.service").read_text()
    trainer = (DOCKER / "Dockerfile.trainer").read_text()
    assert "pip install --quiet --upgrade pip" in (support.REPO / "Makefile").read_text()
    assert re.search(r"pip install --quiet --upgrade pip\s*\\\s*&& pip install --quiet -c constraints.txt -e \.\s", service)
    assert re.search(r"pip install --quiet --upgrade pip\s*\\\s*&& pip install --quiet -c constraints.txt -e '\.\[train\]'", trainer)
    assert "torch" not in re.sub(r"#.*", "", service).replace('! python -c "import torch"', "")
    assert '! python -c "import torch"' in service, "the service image build should prove torch is absent"
    for text in (service, trainer):
        assert re.search(r"^USER (?!root)\w+", text, re.M), "images run as a non-root user"
    # What the image installs (the base dependencies) names no torch and includes the PostgreSQL driver.
    import tomllib

    deps = tomllib.loads((support.REPO / "pyproject.toml").read_text())["project"]["dependencies"]
    assert not [d for d in deps if d.lower().startswith(("torch", "onnx>", "onnx=", "onnx "))]
    assert any(d.startswith("psycopg") for d in deps)
    cmd = re.search(r'^CMD (\[.*\])$', service, re.M)
    assert cmd and yaml.safe_load(cmd.group(1)) == compose()["services"][REPLICAS[0]]["command"]


@pytest.fixture
def compose_database(tmp_path: Path, request: pytest.FixtureRequest) -> Any:
    if support.pg_server.available():
        url = support.pg_server.schema_url(request.getfixturevalue("pg_base"), f"compose-{tmp_path}")
        try:
            yield url
        finally:
            support.pg_server.drop_schema(url)
    else:
        yield f"sqlite:///{tmp_path / 'compose.db'}"


def test_the_service_starts_with_the_compose_settings(tmp_path: Path, compose_database: str) -> None:
    """The replica's environment and command from compose.yaml, with only what a container
    changes replaced: the database host (-> the test server), /app (-> this checkout) and
    the bind address (-> 127.0.0.1: tests stay on loopback)."""
    services = compose()["services"]
    env = {k: substitute(str(v), {"KILTER_DB_PASSWORD": "unused"}) for k, v in services[REPLICAS[0]]["environment"].items()}
    env["KILTER_DATABASE_URL"] = compose_database
    env["KILTER_MODEL_DIR"] = env["KILTER_MODEL_DIR"].replace("/app", str(support.REPO))
    base = {k: v for k, v in os.environ.items() if not k.startswith("KILTER_")}
    full_env = {**base, **env, "CI": "1"}
    # First the migrate service's command, as compose runs it before the replicas.
    migrate = services["migrate"]["command"]
    done = subprocess.run([support.KILTER, *migrate[1:]], env=full_env, cwd=tmp_path, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    cmd = list(services[REPLICAS[0]]["command"])
    port = support.free_port()
    cmd[cmd.index("--host") + 1] = "127.0.0.1"
    cmd[cmd.index("--port") + 1] = str(port)
    log = tmp_path / "replica.log"
    with open(log, "wb") as out:
        proc = subprocess.Popen([support.KILTER, *cmd[1:]], env=full_env, cwd=tmp_path, stdout=out, stderr=subprocess.STDOUT, start_new_session=True)
    try:
        server = support.Server(full_env, tmp_path, port=port)
        server.proc = proc
        ready = None
        for _ in range(600):
            if proc.poll() is not None:
                break
            try:
                ready = httpx.get(f"http://127.0.0.1:{port}/readyz", timeout=1.0)
                if ready.status_code == 200:
                    break
            except httpx.HTTPError:
                pass
            time.sleep(0.1)
        assert ready is not None and ready.status_code == 200, log.read_text(errors="replace")[-2000:]
        checks = ready.json()["checks"]
        assert checks["database"] == "ok" and checks["models"]
        assert "serving" in log.read_text()
    finally:
        server.stop()
