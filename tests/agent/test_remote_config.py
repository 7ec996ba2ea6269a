"""Remote config: ETag / 304 against a real loopback server, the on-disk cache, and rejection of bad configs."""

from __future__ import annotations

import json
import os

import aiohttp
import pytest
from aiohttp import web

from listenpost.agent.client.remote_config import (
    CACHE_FILE,
    ConfigCache,
    ConfigFetcher,
    FetchResult,
    parse_remote_config,
)
from listenpost.core.errors import ConfigError

TOKEN = "tok-u2-a-0123456789abcdef"
UUID = "4d2a0c1e-7f3b-4c55-9e61-2b8f0a7d3c10"


def good_config(offset: float = 2.5, minor: int = 1) -> dict:
    return {
        "board": "u2-a",
        "tags": [f"ibeacon:{UUID.upper()}:7:{minor}", "eddystone:8b0ca750e7a74e14bd99:00000000001e"],
        "rules": [{"name": "lpx", "company_id": 0xFFFF, "prefix": "4c50", "length": 4}],
        "offset_db": offset,
        "flush_seconds": 5,
        "heartbeat_seconds": 10,
    }


class ConfigServer:
    """Serves ``self.body`` with ``self.etag``; answers 304 when If-None-Match matches."""

    def __init__(self) -> None:
        self.body: object = good_config()
        self.etag = '"v1"'
        self.requests: list[str | None] = []

    def app(self) -> web.Application:
        app = web.Application()
        app.router.add_get("/v1/config", self.handle)
        return app

    async def handle(self, request: web.Request) -> web.Response:
        if request.headers.get("Authorization") != f"Bearer {TOKEN}":
            return web.json_response({"error": {"code": "unauthorized"}}, status=401)
        inm = request.headers.get("If-None-Match")
        self.requests.append(inm)
        if inm == self.etag:
            return web.Response(status=304, headers={"ETag": self.etag})
        return web.Response(
            text=json.dumps(self.body), content_type="application/json", headers={"ETag": self.etag}
        )


@pytest.fixture
async def server(aiohttp_server):
    cs = ConfigServer()
    srv = await aiohttp_server(cs.app())
    srv.cs = cs  # type: ignore[attr-defined]
    return srv


@pytest.fixture
async def session():
    async with aiohttp.ClientSession() as s:
        yield s


def fetcher(server, session, state_dir, token=TOKEN) -> ConfigFetcher:
    return ConfigFetcher(
        base_url=str(server.make_url("")),
        token=token,
        board="u2-a",
        cache=ConfigCache(state_dir),
        session=session,
        timeout_s=5,
    )


async def test_etag_then_304_and_update(server, session, tmp_path):
    f = fetcher(server, session, tmp_path)
    assert f.current is None
    assert await f.fetch() is FetchResult.UPDATED
    cfg = f.current
    assert cfg.etag == '"v1"' and cfg.offset_db == 2.5
    assert f"ibeacon:{UUID}:7:1" in cfg.tags  # normalised to the canonical form
    assert cfg.rules[0].name == "lpx" and cfg.rules[0].prefix == b"LP"
    assert await f.fetch() is FetchResult.NOT_MODIFIED
    assert server.cs.requests == [None, '"v1"']
    server.cs.body, server.cs.etag = good_config(offset=-1.5), '"v2"'
    assert await f.fetch() is FetchResult.UPDATED
    assert f.current.offset_db == -1.5 and f.etag == '"v2"'


async def test_cache_survives_a_restart_with_the_collector_gone(server, session, tmp_path):
    f = fetcher(server, session, tmp_path)
    assert await f.fetch() is FetchResult.UPDATED
    url = str(server.make_url(""))
    await server.close()
    # A new process: the cache alone gives tags and offset; the collector is unreachable.
    again = ConfigFetcher(
        base_url=url, token=TOKEN, board="u2-a", cache=ConfigCache(tmp_path), session=session, timeout_s=2
    )
    assert again.current == f.current
    assert await again.fetch() is FetchResult.FAILED
    assert again.current == f.current
    mode = os.stat(tmp_path / CACHE_FILE).st_mode & 0o777
    assert mode == 0o644
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(".tmp")]


@pytest.mark.parametrize(
    ("mutate", "field"),
    [
        (lambda c: c["tags"].append("ibeacon:not-a-uuid:1:2"), "tags[2]"),
        (lambda c: c.update(offset_db=99), "offset_db"),
        (lambda c: c["rules"].append({"name": "mac", "company_id": 1}), "rules[1].name"),
        (lambda c: c.update(flush_seconds=0), "flush_seconds"),
        (lambda c: c.update(tags="ibeacon"), "tags"),
        (lambda c: c.update(board="g0-a"), "board"),
    ],
)
async def test_bad_config_is_rejected_whole_and_the_last_good_one_stays(
    server, session, tmp_path, mutate, field
):
    from structlog.testing import capture_logs

    f = fetcher(server, session, tmp_path)
    assert await f.fetch() is FetchResult.UPDATED
    before = (tmp_path / CACHE_FILE).read_bytes()
    bad = good_config(offset=7.0)
    mutate(bad)
    server.cs.body, server.cs.etag = bad, '"v-bad"'
    with capture_logs() as logs:
        assert await f.fetch() is FetchResult.REJECTED
    assert f.current.offset_db == 2.5 and f.etag == '"v1"'
    assert (tmp_path / CACHE_FILE).read_bytes() == before
    rejected = [e for e in logs if e["event"] == "config_rejected"]
    assert rejected and field in rejected[0]["error"]
    assert (
        ConfigFetcher(
            base_url="http://127.0.0.1:9",
            token=TOKEN,
            board="u2-a",
            cache=ConfigCache(tmp_path),
            session=session,
        ).current.offset_db
        == 2.5
    )


async def test_not_json_and_unauthorized(server, session, tmp_path):
    server.cs.body = "not an object"
    f = fetcher(server, session, tmp_path)
    assert await f.fetch() is FetchResult.REJECTED
    assert (
        await fetcher(server, session, tmp_path, token="wrong-token-000000").fetch()
        is FetchResult.UNAUTHORIZED
    )


def test_a_corrupt_cache_file_is_ignored_not_fatal(tmp_path):
    (tmp_path / CACHE_FILE).write_text("{half a file")
    assert ConfigCache(tmp_path).load() is None
    (tmp_path / CACHE_FILE).write_text(json.dumps({"etag": '"x"', "config": {"board": "u2-a"}}))
    assert ConfigCache(tmp_path).load() is None  # tags missing: invalid, so not used


def test_unknown_fields_from_a_newer_collector_are_tolerated():
    assert parse_remote_config({**good_config(), "added_later": {"x": 1}}).offset_db == 2.5


def test_parse_errors_name_the_field():
    with pytest.raises(ConfigError, match=r"collector config: heartbeat_seconds: must be > 0"):
        parse_remote_config({**good_config(), "heartbeat_seconds": -1})
    with pytest.raises(ConfigError, match=r"tags\[0\]: must be a tag identity string"):
        parse_remote_config({**good_config(), "tags": [7]})
