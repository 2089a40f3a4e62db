"""The OpenAPI document and `/docs` (issue 9): assets from the package, the bearer scheme
declared, the service's real error body documented, a user-facing readings route."""

from __future__ import annotations

import re

from service_env import Env


def test_docs_page_loads_nothing_from_outside(env: Env) -> None:
    page = env.client.get("/docs")
    assert page.status_code == 200
    refs = re.findall(r'(?:src|href)="([^"]+)"', page.text)
    assert refs and all(r.startswith("/") for r in refs), refs
    for ref in refs:
        r = env.client.get(ref)
        assert r.status_code == 200, ref
    js = env.client.get("/docs/assets/swagger-ui-bundle.js")
    assert js.headers["content-type"].startswith("text/javascript") and len(js.content) > 500_000
    # Only the two files the page uses are served from the bundle.
    assert env.client.get("/docs/assets/index.html").status_code == 404
    assert env.client.get("/docs/assets/..%2F__init__.py").status_code == 404


def test_openapi_declares_bearer_and_the_real_error_body(env: Env) -> None:
    doc = env.client.get("/openapi.json").json()
    assert doc["components"]["securitySchemes"]["apiKey"] == {
        "type": "http", "scheme": "bearer", "description": doc["components"]["securitySchemes"]["apiKey"]["description"],
    }
    schemas = doc["components"]["schemas"]
    assert "HTTPValidationError" not in schemas
    assert schemas["ErrorBody"]["properties"]["error"]["required"] == ["code", "message"]
    readings = doc["paths"]["/v1/assets/{asset_id}/readings"]["post"]
    assert readings["security"] == [{"apiKey": []}]
    for code in ("401", "403", "409", "413", "422"):
        assert readings["responses"][code]["content"]["application/json"]["schema"] == {"$ref": "#/components/schemas/ErrorBody"}
    assert "Needs a **machine** key" in readings["description"]
    assert "bench" not in readings["description"] and "event loop" not in readings["description"]
    example = readings["requestBody"]["content"]["application/json"]["example"]
    assert example["readings"][0]["ts"] == "2026-10-13T09:00:00Z"
    assert "security" not in doc["paths"]["/healthz"]["get"]
    assert "409" not in doc["paths"]["/v1/score"]["post"]["responses"]


def test_documented_error_body_is_what_the_service_answers(env: Env) -> None:
    """Each documented error status answers with the ErrorBody shape."""
    no_key = env.client.post("/v1/assets/pump-01/readings", json={"readings": []})
    assert no_key.status_code == 401 and set(no_key.json()["error"]) >= {"code", "message"}
    bad = env.post("pump-01", [{"ts": "yesterday", "values": {}}])
    assert bad.status_code == 422 and bad.json()["error"]["field"].startswith("body.readings[0]")
