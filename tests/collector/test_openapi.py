"""Every route the app registers is described in /v1/openapi.json, and nothing else is."""

from __future__ import annotations

import asyncio
import re
from typing import Any

import aiohttp
from aiohttp import web

from listenpost.collector.http.openapi import spec
from tests.collector.test_api import admin_headers, make_client


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


def test_the_tag_id_pattern_is_exactly_the_canonical_form():
    """Every string the documented pattern admits is a tag identity already in canonical form."""
    from hypothesis import HealthCheck, given, settings
    from hypothesis import strategies as st

    from listenpost.core.identity import TAG_ID_PATTERN, parse_tag_id

    @settings(max_examples=500, derandomize=True, database=None, suppress_health_check=list(HealthCheck))
    @given(st.from_regex(TAG_ID_PATTERN, fullmatch=True))
    def canonical(text: str) -> None:
        assert parse_tag_id(text) == text

    canonical()
    for near_miss in (
        "mac:c4:7a:10:00:2b:91",
        "ibeacon:" + "0" * 32 + ":1:2",
        "lpx:abc",
        "mac:c47a",
        "lpx:00\n",
    ):
        assert re.fullmatch(TAG_ID_PATTERN, near_miss) is None, near_miss


# Checks of the served document against the running server (schemathesis 4.x Python API): nothing
# answers 5xx; every answer has a documented status code, content type and body shape; and a request the
# document calls valid is not refused with a 400, except on the routes with a rule OpenAPI 3.0 can only
# state in words (``to`` after ``from``, a digest over the content, no NUL in a free-form object's keys).
MAX_EXAMPLES = 30
RULES_IN_WORDS = {
    "/v1/enroll",
    "/v1/batches",
    "/v1/heartbeat",
    "/v1/admin/export",
    "/v1/admin/exports",
    "/v1/admin/walktest",
    "/v1/admin/plan",
}


def _run_operation(op: Any, base: str, auth: dict[str, str], checks: list[Any]) -> int:
    """Up to MAX_EXAMPLES generated requests to one operation, each answer checked; returns how many."""
    from hypothesis import HealthCheck, Phase, given, settings

    made = [0]

    @settings(
        max_examples=MAX_EXAMPLES,
        derandomize=True,  # the same requests every run
        database=None,
        deadline=None,
        phases=[Phase.explicit, Phase.generate],
        suppress_health_check=list(HealthCheck),
    )
    @given(case=op.as_strategy())
    def run(case: Any) -> None:
        made[0] += 1
        case.call_and_validate(base_url=base, headers=auth, checks=checks, timeout=10)

    run()
    return made[0]


def _fuzz(base: str, auth: dict[str, str], only: set[str] | None) -> list[str]:
    import schemathesis
    from schemathesis.checks import not_a_server_error
    from schemathesis.specs.openapi.checks import (
        content_type_conformance,
        positive_data_acceptance,
        response_schema_conformance,
        status_code_conformance,
    )

    conformance = [
        not_a_server_error,
        status_code_conformance,
        content_type_conformance,
        response_schema_conformance,
    ]
    schema = schemathesis.openapi.from_url(base + "/v1/openapi.json", timeout=10)
    failures: list[str] = []
    calls: dict[str, int] = {}
    ops: list[str] = []
    for result in schema.get_all_operations():
        op = result.ok()
        if only is not None and op.path not in only:
            continue
        ops.append(op.label)
        checks = conformance + ([] if op.path in RULES_IN_WORDS else [positive_data_acceptance])

        try:
            calls[op.label] = _run_operation(op, base, auth, checks)
        except Exception as e:  # one entry per failing operation; the run goes on with the next
            failures.append(f"{op.label}: {e}"[:2000])
    # Every operation was exercised (one schemathesis cannot generate for would pass silently).
    missing = [op for op in ops if calls.get(op, 0) == 0]
    return failures + [f"{op}: no request was made" for op in missing]


async def test_schemathesis_finds_no_5xx_and_no_undocumented_answer(
    aiohttp_server, tmp_path, clock, store_factory
):
    from listenpost.collector.app import create_app
    from tests.collector.test_api import TAGS, settings_for

    app = create_app(settings_for(tmp_path), clock=clock, store=await store_factory.open(), run_monitor=False)
    server = await aiohttp_server(app)
    base = str(server.make_url("")).rstrip("/")
    admin = admin_headers(tmp_path)
    async with aiohttp.ClientSession() as s:
        r = await s.post(base + "/v1/admin/tags", json={"ids": TAGS}, headers=admin)
        assert r.status == 200
        r = await s.post(base + "/v1/admin/boards", json={"name": "g0-a", "room": "G0 Foyer"}, headers=admin)
        code = (await r.json())["code"]
        r = await s.post(base + "/v1/enroll", json={"code": code, "fingerprint": {}})
        board = {"Authorization": "Bearer " + (await r.json())["token"]}
    board_paths = {"/v1/config", "/v1/batches", "/v1/heartbeat"}
    # schemathesis calls synchronously: it runs in a worker thread while this loop serves it.
    failures = await asyncio.to_thread(_fuzz, base, board, board_paths)
    failures += await asyncio.to_thread(_fuzz, base, admin, None)
    assert not failures, "\n\n".join(failures)
