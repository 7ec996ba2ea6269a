"""Every route the app registers is described in /v1/openapi.json, and nothing else is."""

from __future__ import annotations

from aiohttp import web

from listenpost.collector.http.openapi import spec
from tests.collector.test_api import make_client


def registered_routes(app: web.Application) -> set[tuple[str, str]]:
    out = set()
    for route in app.router.routes():
        info = route.resource.get_info() if route.resource is not None else {}
        path = info.get("path") or info.get("formatter")
        if route.method in ("HEAD", "*"):
            continue
        out.add((route.method.lower(), path))
    return out


async def test_openapi_describes_exactly_the_registered_routes(aiohttp_client, tmp_path, clock):
    client = await make_client(aiohttp_client, tmp_path, clock)
    r = await client.get("/v1/openapi.json")
    assert r.status == 200
    doc = await r.json()
    assert doc["openapi"].startswith("3.")
    described = {(method, path) for path, ops in doc["paths"].items() for method in ops}
    assert described == registered_routes(client.app)
    assert len(described) >= 20


def test_every_reference_resolves_and_every_operation_answers():
    doc = spec()

    def refs(node):
        if isinstance(node, dict):
            if "$ref" in node:
                yield node["$ref"]
            for v in node.values():
                yield from refs(v)
        elif isinstance(node, list):
            for v in node:
                yield from refs(v)

    for ref in refs(doc):
        target = doc
        for part in ref.removeprefix("#/").split("/"):
            target = target[part]  # KeyError here means a dangling reference
    for path, ops in doc["paths"].items():
        for method, op in ops.items():
            assert op["responses"], (method, path)
            assert "summary" in op, (method, path)
            params = {p["name"] for p in op.get("parameters", []) if p["in"] == "path"}
            assert params == {seg[1:-1] for seg in path.split("/") if seg.startswith("{")}, (method, path)
