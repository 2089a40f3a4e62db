"""The API's own documentation: `/docs` served from the package, and the OpenAPI document
made to say what the service really does.

* Offline: plant networks are often isolated, so the documentation page's script and
  style come from the `swagger-ui-bundle-v2` wheel (pinned in pyproject.toml; its files are
  served under `/docs/assets/`), never from a CDN. The page itself is ours (no inline
  script: its start-up is `/docs/assets/kilter-docs.js`), so it also works under a strict
  Content-Security-Policy.
* Authentication: the bearer scheme is declared once (`components.securitySchemes`) and
  every operation that needs a key names it, with the role it needs, so the page has an
  authorize control and each route shows its lock.
* Errors: every error answer of the service has one body, `{"error": {code, message,
  field?, details?}}` (service/errors.py). The framework's default 422 shape
  (`HTTPValidationError`) is replaced by that body, and 401/403/409/413/422 are documented
  where they can happen.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from pathlib import Path
from typing import Any

from fastapi import FastAPI
from fastapi import routing as fastapi_routing
from fastapi.dependencies.models import Dependant
from fastapi.responses import FileResponse, HTMLResponse, Response
from fastapi.routing import APIRoute

ASSETS_URL = "/docs/assets"
BEARER = "apiKey"
ERROR_SCHEMA = "ErrorBody"

# When each documented error answer happens (the wording shown on the page).
ERROR_TEXT = {
    401: "No key, or a key that is unknown or revoked.",
    403: "The key's role may not do this, or a limited machine key may not use this asset.",
    409: "The request conflicts with what is stored (e.g. a reading already stored with other values, an alert already closed).",
    413: "The body or batch is larger than the service accepts (KILTER_MAX_BODY_BYTES, KILTER_MAX_BATCH_READINGS).",
    422: "A field is missing, of the wrong type or out of range; `field` names it, e.g. `body.readings[3].ts`.",
}


def swagger_ui_dir() -> Path:
    """The folder of Swagger UI's built files inside the pinned wheel."""
    from swagger_ui_bundle import swagger_ui_path

    return Path(str(swagger_ui_path))


PAGE = """<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>kilter API</title>
<link rel="stylesheet" href="{assets}/swagger-ui.css">
</head>
<body>
<p style="font:14px system-ui,sans-serif;margin:12px 20px">kilter API, version {version}. Advisory only: kilter is no safety
system; follow the site's procedures, isolation and lock-out before working on a machine.
<a href="/">Dashboard</a></p>
<div id="api-docs" data-openapi="{openapi}"></div>
<script src="{assets}/swagger-ui-bundle.js"></script>
<script src="{assets}/kilter-docs.js"></script>
</body>
</html>
"""

START_SCRIPT = """window.addEventListener("load", function () {
  var el = document.getElementById("api-docs");
  window.ui = SwaggerUIBundle({
    url: el.getAttribute("data-openapi"),
    dom_id: "#api-docs",
    deepLinking: true,
    persistAuthorization: false,
    tryItOutEnabled: false
  });
});
"""

# Write-method operations that change nothing stored, so never answer 409.
STORES_NOTHING = {("POST", "/v1/score"), ("POST", "/v1/assets/{asset_id}/threshold/preview")}

# The only files of the bundle the page uses; nothing else of the package is served.
SERVED = {
    "swagger-ui.css": "text/css; charset=utf-8",
    "swagger-ui-bundle.js": "text/javascript; charset=utf-8",
}


def install_docs(app: FastAPI) -> None:
    """Serve `/docs` from the package and post-process the OpenAPI document (module docstring).

    Call after every router is included; the app must be built with `docs_url=None`."""
    folder = swagger_ui_dir()
    openapi_url = app.openapi_url or "/openapi.json"

    @app.get("/docs", include_in_schema=False)
    def docs_page() -> HTMLResponse:
        return HTMLResponse(PAGE.format(assets=ASSETS_URL, openapi=openapi_url, version=app.version))

    @app.get(f"{ASSETS_URL}/kilter-docs.js", include_in_schema=False)
    def docs_start() -> Response:
        return Response(START_SCRIPT, media_type="text/javascript; charset=utf-8")

    @app.get(ASSETS_URL + "/{name}", include_in_schema=False)
    def docs_asset(name: str) -> Response:
        if name not in SERVED:
            return Response(status_code=404)
        return FileResponse(folder / name, media_type=SERVED[name], headers={"Cache-Control": "public, max-age=86400"})

    base = app.openapi

    def openapi() -> dict[str, Any]:
        if app.openapi_schema is None:
            describe(base(), app.routes)
        return app.openapi_schema  # type: ignore[return-value]

    app.openapi = openapi  # type: ignore[method-assign]


def _calls(dependant: Dependant) -> Iterable[Any]:
    for dep in dependant.dependencies:
        yield dep.call
        yield from _calls(dep)


def api_routes(routes: Iterable[Any]) -> Iterator[Any]:
    """Every API route with its full path, also inside included routers.

    FastAPI from 0.16x keeps included routers unflattened and walks them with
    `routing.iter_route_contexts`; older releases list flat `APIRoute`s."""
    walk = getattr(fastapi_routing, "iter_route_contexts", None)
    contexts = walk(list(routes)) if walk is not None else routes
    for ctx in contexts:
        if isinstance(getattr(ctx, "original_route", ctx), APIRoute):
            yield ctx


def needed_role(route: Any) -> str | None:
    """'any' for a route that needs a key of any role, the role's name, or None (no key)."""
    from service.api.deps import get_caller

    role: str | None = None
    for call in _calls(route.dependant):
        name = getattr(call, "__name__", "")
        if name.startswith("require_"):
            return name.removeprefix("require_")
        if call is get_caller:
            role = "any"
    return role


def describe(schema: dict[str, Any], routes: Iterable[Any]) -> dict[str, Any]:
    """Add the bearer scheme, roles and the error body to `schema` in place; returns it."""
    components = schema.setdefault("components", {})
    components.setdefault("securitySchemes", {})[BEARER] = {
        "type": "http",
        "scheme": "bearer",
        "description": "An API key: `Authorization: Bearer <key>`. Create one with `kilter keys create --role ROLE --name NAME`.",
    }
    schemas = components.setdefault("schemas", {})
    schemas[ERROR_SCHEMA] = {
        "title": ERROR_SCHEMA,
        "type": "object",
        "required": ["error"],
        "properties": {
            "error": {
                "type": "object",
                "required": ["code", "message"],
                "properties": {
                    "code": {"type": "string", "description": "machine-readable, e.g. bad_input, unauthorized, conflict"},
                    "message": {"type": "string", "description": "what was wrong and what would be accepted"},
                    "field": {"type": "string", "description": "the offending field's path, e.g. body.readings[3].ts"},
                    "details": {"type": "object", "description": "more facts where they help (e.g. the stored values)"},
                },
            }
        },
        "example": {"error": {"code": "bad_input", "message": "body.readings[0].values: unknown channel 'speed_rpm'", "field": "body.readings[0].values.speed_rpm"}},
    }
    ref = {"$ref": f"#/components/schemas/{ERROR_SCHEMA}"}
    paths = schema.get("paths", {})
    for route in api_routes(routes):
        if not route.include_in_schema:
            continue
        role = needed_role(route)
        for method in route.methods:
            op = paths.get(route.path_format, {}).get(method.lower())
            if op is None:
                continue
            responses = op.setdefault("responses", {})
            codes = [422] if "422" in responses or op.get("parameters") or op.get("requestBody") else []
            if role is not None:
                op["security"] = [{BEARER: []}]
                codes += [401, 403]
                note = {"any": "any valid key", "machine": "a **machine** key (or an admin key)", "admin": "an **admin** key"}.get(
                    role, f"{'an' if role[0] in 'aeiou' else 'a'} **{role}** key (or a higher role)"
                )
                op["description"] = (op.get("description", "").rstrip() + f"\n\nNeeds {note}.").lstrip()
            if op.get("requestBody"):
                codes.append(413)
            if method in ("POST", "PUT", "DELETE", "PATCH") and role is not None and (method, route.path_format) not in STORES_NOTHING:
                codes.append(409)
            for code in sorted(set(codes)):
                responses[str(code)] = {"description": ERROR_TEXT[code], "content": {"application/json": {"schema": ref}}}
    # The framework's validation-error shapes are no longer referred to by any answer.
    text = repr(paths)
    for name in ("HTTPValidationError", "ValidationError"):
        if f"#/components/schemas/{name}'" not in text:
            schemas.pop(name, None)
    return schema
