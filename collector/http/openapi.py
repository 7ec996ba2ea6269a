"""
OpenAPI 3.0 description of every route the collector serves, at ``GET /v1/openapi.json``.

Each constraint the server enforces is stated here from the same constants the checks use (board
name, labels, tag identities, bounds). tests/collector/test_openapi.py checks that each registered
(method, path) is described and nothing more, and runs a bounded schemathesis pass against a real
collector: no 5xx, and every answer in the documented shape and status codes.
"""

from __future__ import annotations

from typing import Any

from aiohttp import web

from listenpost.collector.http.admin import (
    MAX_EVENT_ID,
    MAX_EVENTS,
    MAX_TAGS_PER_REQUEST,
    MAX_UNIX_S,
)
from listenpost.collector.provision import FLOOR_MAX, LABEL_PATTERN, ROOM_MAX
from listenpost.core import wire
from listenpost.core.identity import TAG_ID_PATTERN
from listenpost.core.settings import BOARD_NAME

_ERR = {"$ref": "#/components/responses/Error"}


def _json(schema: dict[str, Any], description: str = "OK") -> dict[str, Any]:
    return {"description": description, "content": {"application/json": {"schema": schema}}}


def _ref(name: str) -> dict[str, str]:
    return {"$ref": f"#/components/schemas/{name}"}


def _closed(schema: Any) -> Any:
    """
    ``schema`` with ``additionalProperties: false`` on every object that lists its properties: the
    collector ignores other keys, but a body may not carry a NUL in any key (listenpost.core.jsonload),
    which OpenAPI 3.0 cannot say of keys it does not name.
    """
    if isinstance(schema, list):
        return [_closed(s) for s in schema]
    if not isinstance(schema, dict):
        return schema
    out = {k: _closed(v) for k, v in schema.items()}
    if out.get("type") == "object" and "properties" in out:
        out["additionalProperties"] = False
    return out


def _body(schema: dict[str, Any]) -> dict[str, Any]:
    return {"required": True, "content": {"application/json": {"schema": _closed(schema)}}}


def _obj(required: list[str] | None = None, **props: Any) -> dict[str, Any]:
    out: dict[str, Any] = {"type": "object", "properties": props}
    if required:
        out["required"] = required
    return out


NUM = {"type": "number"}
INT = {"type": "integer"}
STR = {"type": "string"}
BOARD = {"type": "string", "pattern": BOARD_NAME.pattern, "maxLength": 63}
TAG = {
    "type": "string",
    "pattern": TAG_ID_PATTERN,
    "description": "canonical tag identity; the admin API also takes the lenient forms it normalises",
}
ROOM = {"type": "string", "minLength": 1, "maxLength": ROOM_MAX, "pattern": LABEL_PATTERN}
FLOOR = {"type": "string", "minLength": 1, "maxLength": FLOOR_MAX, "pattern": LABEL_PATTERN, "nullable": True}
UNIX_S = {"type": "number", "minimum": 0, "maximum": MAX_UNIX_S}
FLAG = {"type": "string", "enum": ["0", "1"]}
# As listenpost.core.wire checks them (its patterns, stated here rather than copied).
BOOT = {"type": "string", "minLength": 1, "maxLength": 64, "pattern": f"^{wire.BOOT_ID.pattern}$"}
EPOCH = {"type": "string", "pattern": f"^{wire.EPOCH.pattern}$"}
DIGEST = {"type": "string", "pattern": f"^{wire.DIGEST.pattern}$"}
BOARD_S = {
    "type": "number",
    "minimum": 0,
    "maximum": wire.MAX_BOARD_S,
    "description": "board monotonic seconds",
}
# listenpost.core.jsonload refuses a NUL anywhere in a body (and lone surrogates, which no JSON
# generator of text produces).
NO_NUL = "^[^\\u0000]*$"
ANY_OBJECT = {"type": "object", "description": "no string in it, key or value, may hold a NUL character"}
NAME_PARAM = {"name": "name", "in": "path", "required": True, "schema": BOARD, "description": "board name"}
# Every route with a JSON body: bad JSON (400), too large (413), an encoding other than gzip (415).
BODY_ERRORS = (400, 413, 415)
BOARD_AUTH = [{"board": []}]
ADMIN_AUTH = [{"admin": []}]
PUBLIC: list[Any] = []
TAG_LIST = {"type": "array", "maxItems": MAX_TAGS_PER_REQUEST, "items": TAG}


def _errors(*codes: int) -> dict[str, Any]:
    """Error answers; 503 (the database is unavailable) can come from every route that reads it."""
    return {str(c): _ERR for c in sorted({*codes, 503})}


def spec() -> dict[str, Any]:
    """The OpenAPI document."""
    export_params = [
        {"name": n, "in": "query", "required": n in ("from", "to"), "schema": s}
        for n, s in (
            ("from", UNIX_S),
            ("to", UNIX_S),
            ("bin", {"type": "number", "exclusiveMinimum": True, "minimum": 0, "default": 1}),
            ("format", {"type": "string", "enum": ["csv", "npz", "parquet"], "default": "csv"}),
            (
                "calibration",
                {"type": "string", "enum": ["applied", "history", "latest"], "default": "applied"},
            ),
            ("board", {"type": "array", "items": BOARD}),
            ("tag", {"type": "array", "items": TAG}),
        )
    ]
    export_file = {
        "description": "the table",
        "content": {
            "text/csv": {"schema": STR},
            "application/octet-stream": {"schema": STR},
            "application/vnd.apache.parquet": {"schema": STR},
        },
    }
    nullable_num = {"type": "number", "nullable": True}
    export_job = _obj(
        ["job", "state", "format", "rows_scanned", "readings", "progress", "error", "calibration", "summary"],
        job=STR,
        state={"type": "string", "enum": ["running", "done", "failed"]},
        format={"type": "string", "enum": ["csv", "npz", "parquet"]},
        rows_scanned=INT,
        readings=INT,
        progress=nullable_num,
        error={"type": "object", "nullable": True},
        calibration={"type": "string", "enum": ["applied", "history", "latest"]},
        summary={
            "type": "object",
            "nullable": True,
            "description": "when done: cells (heard), readings, boards and tags heard, t_from, t_to, bins, "
            "calibration",
        },
    )
    clock = _obj(["t1", "t2", "t3", "t4"], t1=NUM, t2=NUM, t3=NUM, t4=NUM)
    paths: dict[str, Any] = {
        "/v1/enroll": {
            "post": {
                "summary": "Exchange a one-time enrollment code and hardware fingerprint for a board token",
                "security": PUBLIC,
                "tags": ["board"],
                "requestBody": _body(
                    _obj(
                        ["code"],
                        code={"type": "string", "minLength": 4, "maxLength": 64, "pattern": NO_NUL},
                        fingerprint={
                            **ANY_OBJECT,
                            "description": "at most 8 KiB as canonical JSON; " + ANY_OBJECT["description"],
                        },
                    )
                ),
                "responses": {
                    "200": _json(
                        _obj(["board", "token", "config"], board=BOARD, token=STR, config=_ref("BoardConfig"))
                    ),
                    **_errors(*BODY_ERRORS, 404, 409, 410),
                },
            }
        },
        "/v1/config": {
            "get": {
                "summary": "The board's config: tags, decode rules, RSSI offset, periods",
                "security": BOARD_AUTH,
                "tags": ["board"],
                "parameters": [{"name": "If-None-Match", "in": "header", "required": False, "schema": STR}],
                "responses": {
                    "200": {**_json(_ref("BoardConfig")), "headers": {"ETag": {"schema": STR}}},
                    "304": {"description": "Not modified"},
                    **_errors(401, 403, 503),
                },
            }
        },
        "/v1/batches": {
            "post": {
                "summary": "Store one sealed batch (or gap record); answered after the durable commit",
                "security": BOARD_AUTH,
                "tags": ["board"],
                "description": "Body per agent/wire.py; may be gzip'd (Content-Encoding: gzip). 429 + Retry-After "
                "when limits.max_inflight_batches batches are being stored already.",
                "requestBody": _body(
                    _obj(
                        ["v", "board", "boot", "epoch", "seq", "digest", "t1", "content"],
                        v={"type": "integer", "enum": [1]},
                        board=BOARD,
                        boot=BOOT,
                        epoch=EPOCH,
                        seq={"type": "integer", "minimum": 0, "maximum": 2**62 - 1},
                        digest=DIGEST,
                        t1=BOARD_S,
                        clock={**clock, "nullable": True},
                        content={"type": "object"},
                    )
                ),
                "responses": {
                    "200": _json(
                        _obj(
                            ["status", "t2", "t3", "unregistered_readings"],
                            status={"type": "string", "enum": ["stored", "duplicate"]},
                            t2=NUM,
                            t3=NUM,
                            unregistered_readings={**INT, "minimum": 0},
                        )
                    ),
                    **_errors(*BODY_ERRORS, 401, 403, 409, 429),
                },
            }
        },
        "/v1/heartbeat": {
            "post": {
                "summary": "Board stats and a clock sample",
                "security": BOARD_AUTH,
                "tags": ["board"],
                "requestBody": _body(
                    _obj(
                        ["boot"],
                        board=BOARD,
                        boot=BOOT,
                        t1=BOARD_S,
                        wall=NUM,
                        clock={**clock, "nullable": True},
                        stats=ANY_OBJECT,
                    )
                ),
                "responses": {
                    "200": _json(_obj(["t2", "t3", "config_etag"], t2=NUM, t3=NUM, config_etag=STR)),
                    **_errors(*BODY_ERRORS, 401, 403),
                },
            }
        },
        "/v1/status": {
            "get": {
                "summary": "Fleet and per-board health (what the health page shows)",
                "security": PUBLIC,
                "tags": ["health"],
                "responses": {"200": _json(_ref("Status")), **_errors()},
            }
        },
        "/v1/openapi.json": {
            "get": {
                "summary": "This document",
                "security": PUBLIC,
                "tags": ["health"],
                "responses": {"200": _json({"type": "object"})},
            }
        },
        "/": {
            "get": {
                "summary": "Health page (HTML)",
                "security": PUBLIC,
                "tags": ["health"],
                "parameters": [
                    {
                        "name": "refresh",
                        "in": "query",
                        "schema": NUM,
                        "description": "seconds between updates, 0 for none, else clamped to 0.2..300",
                    }
                ],
                "responses": {
                    "200": {"description": "HTML", "content": {"text/html": {"schema": STR}}},
                    **_errors(400),
                },
            }
        },
        "/board/{name}": {
            "get": {
                "summary": "One board's page (HTML): what to do, its figures, charts of the last hours",
                "security": PUBLIC,
                "tags": ["health"],
                "parameters": [
                    {"name": "name", "in": "path", "required": True, "schema": STR},
                    {
                        "name": "hours",
                        "in": "query",
                        "schema": {**NUM, "minimum": 0.05, "maximum": 24},
                        "description": "window, hours",
                    },
                    {
                        "name": "refresh",
                        "in": "query",
                        "schema": NUM,
                        "description": "seconds between updates",
                    },
                ],
                "responses": {
                    "200": {"description": "HTML", "content": {"text/html": {"schema": STR}}},
                    "404": {"description": "no such board", "content": {"text/html": {"schema": STR}}},
                    **_errors(400),
                },
            }
        },
        "/plan": {
            "get": {
                "summary": "The venue plan view (HTML): boards where they hang, rooms by live coverage",
                "security": PUBLIC,
                "tags": ["health"],
                "parameters": [
                    {
                        "name": "refresh",
                        "in": "query",
                        "schema": NUM,
                        "description": "seconds between updates",
                    }
                ],
                "responses": {
                    "200": {"description": "HTML", "content": {"text/html": {"schema": STR}}},
                    **_errors(400),
                },
            }
        },
        "/v1/admin/plan": {
            "put": {
                "summary": "Import the venue plan (docs/technician.md); all valid or nothing kept",
                "security": ADMIN_AUTH,
                "tags": ["admin"],
                "requestBody": {
                    "required": True,
                    "content": {"application/json": {"schema": {"type": "object"}}},
                },
                "responses": {
                    "200": _json(_obj(floors=INT, rooms=INT, boards=INT, reference_tags=INT)),
                    **_errors(*BODY_ERRORS, 401),
                },
            }
        },
        "/wheels/": {
            "get": {
                "summary": "Index of the wheelhouse (pip --find-links reads it); 'collector wheelhouse build' fills it",
                "security": PUBLIC,
                "tags": ["health"],
                "responses": {
                    "200": {"description": "HTML links", "content": {"text/html": {"schema": STR}}},
                    **_errors(404),
                },
            }
        },
        "/wheels/{name}": {
            "get": {
                "summary": "One wheel of the wheelhouse",
                "security": PUBLIC,
                "tags": ["health"],
                "parameters": [{"name": "name", "in": "path", "required": True, "schema": STR}],
                "responses": {
                    "200": {
                        "description": "the wheel",
                        "content": {
                            "application/octet-stream": {"schema": {"type": "string", "format": "binary"}}
                        },
                    },
                    **_errors(404),
                },
            }
        },
        "/metrics": {
            "get": {
                "summary": "Prometheus text exposition",
                "security": PUBLIC,
                "tags": ["health"],
                "responses": {
                    "200": {"description": "text format 0.0.4", "content": {"text/plain": {"schema": STR}}}
                },
            }
        },
        "/v1/admin/boards": {
            "post": {
                "summary": "Register a board; returns its one-time enrollment code",
                "security": ADMIN_AUTH,
                "tags": ["admin"],
                "requestBody": _body(_obj(["name", "room"], name=BOARD, room=ROOM, floor=FLOOR)),
                "responses": {"201": _json(_ref("BoardWithCode")), **_errors(*BODY_ERRORS, 401, 409)},
            },
            "get": {
                "summary": "All boards",
                "security": ADMIN_AUTH,
                "tags": ["admin"],
                "parameters": [
                    {"name": "retired", "in": "query", "schema": FLAG, "description": "0: leave retired out"}
                ],
                "responses": {
                    "200": _json(_obj(["boards"], boards={"type": "array", "items": _ref("Board")})),
                    **_errors(400, 401),
                },
            },
        },
        "/v1/admin/boards/{name}": {
            "get": {
                "summary": "One board with counts, state, latest heartbeat and calibration history",
                "security": ADMIN_AUTH,
                "tags": ["admin"],
                "parameters": [NAME_PARAM],
                "responses": {"200": _json(_ref("Board")), **_errors(401, 404)},
            }
        },
        "/v1/admin/boards/{name}/retire": {
            "post": {
                "summary": "Retire a board",
                "security": ADMIN_AUTH,
                "tags": ["admin"],
                "parameters": [NAME_PARAM],
                "responses": {"200": _json(_obj(name=BOARD, retired_at=NUM)), **_errors(401, 404)},
            }
        },
        "/v1/admin/boards/{name}/reissue": {
            "post": {
                "summary": "New enrollment code (re-flashed card); older unused codes stop working",
                "security": ADMIN_AUTH,
                "tags": ["admin"],
                "parameters": [NAME_PARAM],
                "responses": {"200": _json(_ref("BoardWithCode")), **_errors(401, 404, 409)},
            }
        },
        "/v1/admin/calibrate/fleet": {
            "post": {
                "summary": "Fit every board's RSSI offset and the path-loss exponent from the plan's reference tags",
                "security": ADMIN_AUTH,
                "tags": ["admin"],
                "requestBody": _body(
                    _obj(
                        [],
                        minutes={"type": "number", "minimum": 1.0, "maximum": 240.0, "default": 30.0},
                        apply={"type": "boolean", "default": False},
                        wall_db={"type": ["number", "null"], "minimum": 0.0, "maximum": 60.0},
                        floor_db={"type": ["number", "null"], "minimum": 0.0, "maximum": 60.0},
                        min_level_dbm={
                            "type": "number",
                            "minimum": -127.0,
                            "maximum": 0.0,
                            "default": -105.0,
                        },
                    )
                ),
                "responses": {
                    "200": _json(
                        _obj(
                            exponent=NUM,
                            exponent_stderr=NUM,
                            wall_db=NUM,
                            floor_db=NUM,
                            sigma_db=NUM,
                            boards={"type": "array", "items": {"type": "object"}},
                            unheard={"type": "array", "items": STR},
                            pairs={"type": "array", "items": {"type": "object"}},
                            applied={"type": "array", "items": STR},
                        )
                    ),
                    **_errors(*BODY_ERRORS, 401, 409),
                },
            }
        },
        "/v1/admin/boards/{name}/calibrate": {
            "post": {
                "summary": "Set the board's RSSI offset from a reference tag at a measured distance",
                "security": ADMIN_AUTH,
                "tags": ["admin"],
                "parameters": [NAME_PARAM],
                "requestBody": _body(
                    _obj(
                        ["tag", "distance_m"],
                        tag=TAG,
                        distance_m={"type": "number", "minimum": 0.1, "maximum": 100.0},
                        minutes={"type": "number", "minimum": 0.5, "maximum": 240.0, "default": 5.0},
                        power_1m_dbm={"type": "number", "minimum": -120.0, "maximum": 20.0, "default": -59.0},
                        exponent={"type": "number", "minimum": 1.0, "maximum": 6.0, "default": 2.0},
                    )
                ),
                "responses": {
                    "200": _json(
                        _obj(
                            board=STR,
                            offset_db=NUM,
                            spread_db=NUM,
                            samples=INT,
                            reference_tag=STR,
                            distance_m=NUM,
                            previous_offset_db=NUM,
                            warnings={"type": "array", "items": STR},
                        )
                    ),
                    **_errors(*BODY_ERRORS, 401, 404, 409),
                },
            }
        },
        "/v1/admin/tags": {
            "post": {
                "summary": "Register tags (all valid or nothing stored)",
                "security": ADMIN_AUTH,
                "tags": ["admin"],
                "requestBody": _body(_obj(["ids"], ids=TAG_LIST)),
                "responses": {
                    "200": _json(
                        _obj(
                            added=INT,
                            given=INT,
                            total=INT,
                            without_rule={"type": "object", "additionalProperties": INT},
                        )
                    ),
                    **_errors(*BODY_ERRORS, 401),
                },
            },
            "get": {
                "summary": "Registered tags",
                "security": ADMIN_AUTH,
                "tags": ["admin"],
                "parameters": [
                    {"name": "retired", "in": "query", "schema": FLAG, "description": "1: retired tags too"}
                ],
                "responses": {
                    "200": _json(_obj(tags={"type": "array", "items": TAG})),
                    **_errors(400, 401),
                },
            },
        },
        "/v1/admin/tags/retire": {
            "post": {
                "summary": "Retire tags",
                "security": ADMIN_AUTH,
                "tags": ["admin"],
                "requestBody": _body(_obj(["ids"], ids=TAG_LIST)),
                "responses": {"200": _json(_obj(retired=INT, given=INT)), **_errors(*BODY_ERRORS, 401)},
            }
        },
        "/v1/admin/events": {
            "get": {
                "summary": "Events after an id, oldest first",
                "security": ADMIN_AUTH,
                "tags": ["admin"],
                "parameters": [
                    {
                        "name": "since",
                        "in": "query",
                        "schema": {"type": "integer", "minimum": 0, "maximum": MAX_EVENT_ID, "default": 0},
                    },
                    {
                        "name": "limit",
                        "in": "query",
                        "schema": {"type": "integer", "minimum": 1, "maximum": MAX_EVENTS, "default": 1000},
                    },
                    {"name": "board", "in": "query", "schema": BOARD},
                ],
                "responses": {
                    "200": _json(_obj(events={"type": "array", "items": _ref("Event")})),
                    **_errors(400, 401, 404),
                },
            }
        },
        "/v1/admin/export": {
            "get": {
                "summary": "Binned calibrated RSSI (tag × time bin × board) as CSV or .npz",
                "security": ADMIN_AUTH,
                "tags": ["admin"],
                "description": "to must be after from and at most 31 days later; at most 10 million bins. "
                "Answers when the export is done; POST /v1/admin/exports runs it as a job to poll instead.",
                "parameters": export_params,
                "responses": {"200": export_file, **_errors(400, 401)},
            }
        },
        "/v1/admin/exports": {
            "post": {
                "summary": "Start an export job (the query of GET /v1/admin/export)",
                "security": ADMIN_AUTH,
                "tags": ["admin"],
                "description": "to must be after from and at most 31 days later; at most 10 million bins. "
                "503 while the most exports allowed at once are running.",
                "parameters": export_params,
                "responses": {"202": _json(export_job, "started"), **_errors(400, 401)},
            }
        },
        "/v1/admin/exports/{job}": {
            "get": {
                "summary": "An export job's state; with wait, a long poll until it ends",
                "security": ADMIN_AUTH,
                "tags": ["admin"],
                "parameters": [
                    {"name": "job", "in": "path", "required": True, "schema": STR},
                    {
                        "name": "wait",
                        "in": "query",
                        "schema": {"type": "number", "minimum": 0, "maximum": 30},
                    },
                ],
                "responses": {"200": _json(export_job), **_errors(400, 401, 404)},
            }
        },
        "/v1/admin/exports/{job}/file": {
            "get": {
                "summary": "A finished export job's file",
                "security": ADMIN_AUTH,
                "tags": ["admin"],
                "parameters": [{"name": "job", "in": "path", "required": True, "schema": STR}],
                "responses": {"200": export_file, **_errors(400, 401, 404, 409, 500)},
            }
        },
        "/v1/admin/walktest": {
            "post": {
                "summary": "Per-room report of a walk with a reference tag",
                "security": ADMIN_AUTH,
                "tags": ["admin"],
                "requestBody": _body(
                    _obj(
                        ["tag", "marks"],
                        tag=TAG,
                        marks={
                            "type": "array",
                            "minItems": 1,
                            "maxItems": 1000,
                            "description": "to must be after from in each mark",
                            "items": _obj(
                                ["room", "from", "to"], room=ROOM, **{"from": UNIX_S, "to": UNIX_S}
                            ),
                        },
                    )
                ),
                "responses": {
                    "200": _json(
                        _obj(tag=TAG, readings=INT, rooms={"type": "array", "items": {"type": "object"}})
                    ),
                    **_errors(*BODY_ERRORS, 401),
                },
            }
        },
    }
    return {
        "openapi": "3.0.3",
        "info": {
            "title": "listenpost collector",
            "version": "1",
            "description": "Board API (wire protocol v1), admin API and health endpoints.",
        },
        "paths": paths,
        "components": {
            "securitySchemes": {
                "board": {"type": "http", "scheme": "bearer", "description": "board token"},
                "admin": {"type": "http", "scheme": "bearer", "description": "admin token"},
            },
            "responses": {
                "Error": _json(
                    _obj(["error"], error=_obj(["code", "message"], code=STR, field=STR, message=STR)),
                    "Error",
                )
            },
            "schemas": {
                "BoardConfig": _obj(
                    ["board", "tags", "rules", "offset_db", "flush_seconds", "heartbeat_seconds"],
                    board=BOARD,
                    tags={"type": "array", "items": TAG},
                    rules={
                        "type": "array",
                        "items": _obj(
                            ["name"],
                            name=STR,
                            company_id=INT,
                            service_uuid16=INT,
                            prefix=STR,
                            offset=INT,
                            length=INT,
                        ),
                    },
                    offset_db=NUM,
                    flush_seconds=NUM,
                    heartbeat_seconds=NUM,
                ),
                "Board": _obj(
                    ["name", "room"],
                    name=BOARD,
                    room=STR,
                    floor={**STR, "nullable": True},
                    created_at=NUM,
                    enrolled_at={**NUM, "nullable": True},
                    offset_db=NUM,
                    retired_at={**NUM, "nullable": True},
                    fingerprint={"type": "object", "nullable": True},
                ),
                "BoardWithCode": {
                    "allOf": [
                        _ref("Board"),
                        _obj(
                            ["code", "code_expires_at"],
                            code=STR,
                            code_expires_at=NUM,
                            collector_url={**STR, "nullable": True},
                        ),
                    ]
                },
                "Event": _obj(
                    ["id", "at", "kind"],
                    id=INT,
                    at=NUM,
                    board={**STR, "nullable": True},
                    kind=STR,
                    detail={"type": "object"},
                ),
                "Status": _obj(
                    ["at", "fleet", "boards", "events"],
                    at=NUM,
                    fleet={"type": "object"},
                    boards={
                        "type": "array",
                        "items": _obj(
                            ["name", "room", "state", "readings_total", "clock_skew_ppm", "clock_offset_ms"],
                            name=STR,
                            room=STR,
                            floor={**STR, "nullable": True},
                            state=STR,
                            readings_total=INT,
                            clock_skew_ppm={**NUM, "nullable": True},
                            clock_offset_ms={**NUM, "nullable": True},
                            last_contact_age_s={**NUM, "nullable": True},
                            wall_error_ms={**NUM, "nullable": True},
                        ),
                    },
                    events={"type": "array", "items": _ref("Event")},
                ),
            },
        },
        "security": ADMIN_AUTH,
    }


async def openapi_json(request: web.Request) -> web.Response:
    return web.json_response(spec())


def add_routes(app: web.Application) -> None:
    app.router.add_get("/v1/openapi.json", openapi_json, allow_head=False)
