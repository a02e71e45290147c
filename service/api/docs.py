"""The OpenAPI document and a self-contained HTML reference page (no CDN, no scripts)."""

from __future__ import annotations

import html

from flask import Blueprint, Response, current_app

from .jsonio import dumps

blp = Blueprint("docs", __name__)


def openapi_document(app=None) -> dict:
    """The OpenAPI 3.1 document of the running application."""
    app = app or current_app
    return app.extensions["skydrift_api"].spec.to_dict()


@blp.route("/openapi.json")
def openapi_json():
    return Response(dumps(openapi_document()), mimetype="application/json")


@blp.route("/")
def index():
    """Where to start: the reference page, the OpenAPI document, the probes and every
    operation (from the document, so the list cannot drift from it). Not an operation of
    the document itself, as /docs and /openapi.json are not."""
    spec = openapi_document()
    operations = [
        f"{method.upper()} {path}"
        for path, ops in spec.get("paths", {}).items()
        for method, op in ops.items()
        if isinstance(op, dict) and "responses" in op
    ]
    body = {
        "service": spec.get("info", {}).get("title", ""),
        "version": spec.get("info", {}).get("version", ""),
        "reference": "/docs",
        "openapi": "/openapi.json",
        "health": "/health",
        "ready": "/ready",
        "operations": operations,
    }
    return Response(dumps(body), mimetype="application/json")


def _type_text(schema: dict) -> str:
    """The type of a JSON schema as the page shows it: "string or number", a schema name."""
    typ = schema.get("type", "")
    if isinstance(typ, list):
        typ = " or ".join(typ)
    for key in ("oneOf", "anyOf"):  # anyOf: a nested schema or null ("Atmosphere or null")
        if key in schema:
            typ = " or ".join(p.get("title") or _type_text(p) for p in schema[key])
    if "$ref" in schema:
        typ = schema["$ref"].rsplit("/", 1)[-1]
    return str(typ)


def _resolve(spec: dict, obj):
    """``obj`` itself, or the component its ``$ref`` names (the shared error responses are
    referenced, not repeated, in the document)."""
    ref = obj.get("$ref", "") if isinstance(obj, dict) else ""
    if not ref.startswith("#/"):
        return obj
    node = spec
    for key in ref[2:].split("/"):
        node = node.get(key, {}) if isinstance(node, dict) else {}
    return node


def _schema_rows(spec: dict, schema: dict, depth: int = 0) -> list[str]:
    if "$ref" in schema:
        name = schema["$ref"].rsplit("/", 1)[-1]
        schema = spec.get("components", {}).get("schemas", {}).get(name, {})
    rows = []
    required = set(schema.get("required", []))
    for name, prop in schema.get("properties", {}).items():
        typ = _type_text(prop)
        desc = prop.get("description", "")
        words = [str(w) for w in prop.get("enum", ()) if w is not None]
        if words:  # the words themselves (a description may only say what they mean)
            desc += f" One of: {', '.join(words)}."
        rows.append(
            f"<tr><td style='padding-left:{depth * 1.5 + 0.3}em'><code>{html.escape(name)}"
            f"</code>{' *' if name in required else ''}</td><td>{html.escape(str(typ))}</td>"
            f"<td>{html.escape(desc)}</td></tr>"
        )
    return rows


def _parameter_rows(params: list[dict]) -> list[str]:
    """One table row per path or query parameter: name (* if required), where, type, meaning."""
    rows = []
    for prm in params:
        schema = prm.get("schema", {})
        typ = _type_text(schema)
        extra = []
        if "enum" in schema:
            extra.append("one of " + ", ".join(str(v) for v in schema["enum"]))
        if schema.get("default") is not None:
            extra.append(f"default {schema['default']}")
        desc = prm.get("description", "") + (f" ({'; '.join(extra)})" if extra else "")
        rows.append(
            f"<tr><td><code>{html.escape(prm.get('name', ''))}</code>"
            f"{' *' if prm.get('required') else ''}</td><td>{html.escape(prm.get('in', ''))}"
            f"</td><td>{html.escape(str(typ))}</td><td>{html.escape(desc)}</td></tr>"
        )
    return rows


@blp.route("/docs")
def reference_page():
    """Human-readable API reference rendered from the OpenAPI document."""
    spec = openapi_document()
    info = spec.get("info", {})
    parts = [
        "<!doctype html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>{html.escape(info.get('title', 'API'))} API reference</title>",
        "<style>body{font-family:system-ui,sans-serif;max-width:70em;margin:2em auto;"
        "padding:0 1em;line-height:1.45;color:#1d2433}h2{border-top:1px solid #ccd;"
        "padding-top:.8em}code{background:#f1f3f8;padding:0 .25em}table{border-collapse:"
        "collapse;width:100%;font-size:.92em}td,th{border-bottom:1px solid #e3e6ee;"
        "text-align:left;padding:.25em .4em;vertical-align:top}.m{font-weight:700;"
        "color:#0b5d4b}pre{background:#f6f7fa;padding:.6em;overflow:auto}</style></head><body>",
        f"<h1>{html.escape(info.get('title', ''))} {html.escape(info.get('version', ''))}</h1>",
        "".join(f"<p>{html.escape(p)}</p>" for p in info.get("description", "").split("\n\n") if p),
        "<p>Machine-readable: <a href='/openapi.json'>/openapi.json</a> (OpenAPI 3.1).</p>",
    ]
    for path, ops in spec.get("paths", {}).items():
        for method, op in ops.items():
            if method not in ("get", "post", "put", "delete", "patch"):
                continue
            parts.append(
                f"<h2><span class='m'>{method.upper()}</span> <code>{html.escape(path)}"
                f"</code></h2><p><b>{html.escape(op.get('summary', ''))}</b></p>"
                f"<p>{html.escape(op.get('description', ''))}</p>"
            )
            params = ops.get("parameters", []) + op.get("parameters", [])
            if params:
                parts.append("<h3>Parameters</h3><table><tr><th>name</th><th>in</th>")
                parts.append("<th>type</th><th>meaning</th></tr>")
                parts.extend(_parameter_rows(params))
                parts.append("</table>")
            body = op.get("requestBody", {}).get("content", {}).get("application/json", {})
            if body:
                parts.append("<h3>Request body</h3><table><tr><th>field</th><th>type</th>")
                parts.append("<th>meaning</th></tr>")
                parts.extend(_schema_rows(spec, body.get("schema", {})))
                parts.append("</table>")
                if "example" in body:
                    parts.append(
                        "<h3>Example (invented demo data)</h3><pre>"
                        + html.escape(dumps(body["example"]).decode()[:4000])
                        + "</pre>"
                    )
            responses = op.get("responses", {})
            parts.append("<h3>Responses</h3><ul>")
            for code, resp in responses.items():
                resp = _resolve(spec, resp)
                parts.append(
                    f"<li><code>{code}</code> {html.escape(resp.get('description', ''))}</li>"
                )
            parts.append("</ul>")
    schemas = spec.get("components", {}).get("schemas", {})
    if schemas:
        parts.append("<h2>Schemas</h2>")
        for name, schema in schemas.items():
            parts.append(f"<h3 id='{html.escape(name)}'>{html.escape(name)}</h3><table>")
            parts.extend(_schema_rows(spec, schema))
            parts.append("</table>")
    parts.append("</body></html>")
    return Response("".join(parts), mimetype="text/html")


def register(app, api):
    app.register_blueprint(blp)
