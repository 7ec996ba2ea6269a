"""Enrollment against a loopback collector: every answer class, the credential's mode, a loadable agent.yaml."""

from __future__ import annotations

import asyncio
import json
import os
import socket
import stat

import aiohttp
import pytest
from aiohttp import web

from listenpost.agent.client.enroll import EXIT_CODES, EnrollStatus, enroll, enroll_command
from listenpost.agent.client.remote_config import ConfigCache
from listenpost.agent.config import load_agent_config
from listenpost.cli import main as listenpost_main
from listenpost.core.clock import VirtualClock
from listenpost.core.errors import ConfigError

TOKEN = "9f3c2b1a0d8e7f6a5b4c3d2e1f0a9b8c"
CONFIG = {
    "board": "g3-b",
    "tags": ["ibeacon:4d2a0c1e-7f3b-4c55-9e61-2b8f0a7d3c10:9:3"],
    "rules": [{"name": "lpx", "company_id": 65535, "prefix": "4c50", "length": 4}],
    "offset_db": -3.5,
    "flush_seconds": 4,
    "heartbeat_seconds": 15,
}


class EnrollServer:
    def __init__(self) -> None:
        self.answers: dict[str, int] = {"GOOD-1234": 200, "USED-1234": 409, "OLD-12345": 410}
        self.flaky = 0
        """Answer 503 to this many requests first."""
        self.bodies: list[dict] = []
        self.answer_body: dict = {"board": "g3-b", "token": TOKEN, "config": CONFIG}

    def app(self) -> web.Application:
        app = web.Application()
        app.router.add_post("/v1/enroll", self.handle)
        return app

    async def handle(self, request: web.Request) -> web.Response:
        body = await request.json()
        self.bodies.append(body)
        if self.flaky:
            self.flaky -= 1
            return web.json_response({"error": {"code": "unavailable"}}, status=503)
        status = self.answers.get(body["code"], 404)
        if status != 200:
            return web.json_response({"error": {"code": str(status), "field": "code"}}, status=status)
        return web.json_response(self.answer_body)


@pytest.fixture
async def srv(aiohttp_server):
    es = EnrollServer()
    server = await aiohttp_server(es.app())
    server.es = es  # type: ignore[attr-defined]
    return server


FP = {
    "machine_id": "0123456789abcdef0123456789abcdef",
    "hostname": "g3-b",
    "adapters": {"hci0": None},
    "model": None,
}


async def test_enrolled_board_gets_a_0600_credential_and_a_valid_agent_yaml(srv, tmp_path):
    state = tmp_path / "state"
    old = os.umask(0)  # the mode must come from os.open itself, not from a friendly umask
    try:
        result = await enroll(
            str(srv.make_url("")), "GOOD-1234", state, clock=VirtualClock(), fingerprint_data=FP
        )
    finally:
        os.umask(old)
    assert result.status is EnrollStatus.ENROLLED and EXIT_CODES[result.status] == 0
    assert srv.es.bodies == [{"code": "GOOD-1234", "fingerprint": FP}]
    cred = state / "credential"
    assert stat.S_IMODE(os.stat(cred).st_mode) == 0o600
    assert cred.read_text().strip() == TOKEN
    cfg = load_agent_config(state / "agent.yaml")
    assert cfg.board == "g3-b" and cfg.state_dir == str(state.resolve())
    assert cfg.collector.url == str(srv.make_url("")).rstrip("/")
    assert cfg.source.kind == "bleak" and cfg.offset_db == -3.5 and cfg.spool.flush_seconds == 4.0
    assert cfg.heartbeat_seconds == 15.0
    assert cfg.state_path(cfg.collector.credential_file) == cred
    # The config from the answer seeds the cache: the first run scans with the collector unreachable.
    cached = ConfigCache(state).load()
    assert cached is not None and cached.offset_db == -3.5 and cached.etag is None
    # And `agent check-config` accepts the written file.
    assert listenpost_main(["agent", "check-config", str(state / "agent.yaml")]) == 0


@pytest.mark.parametrize(
    ("code", "status", "words"),
    [
        ("NOPE-1234", EnrollStatus.UNKNOWN_CODE, "does not know"),
        ("USED-1234", EnrollStatus.CODE_USED, "already used"),
        ("OLD-12345", EnrollStatus.CODE_EXPIRED, "expired"),
    ],
)
async def test_refused_codes_write_nothing(srv, tmp_path, code, status, words):
    result = await enroll(str(srv.make_url("")), code, tmp_path, clock=VirtualClock(), fingerprint_data=FP)
    assert result.status is status and words in result.message
    assert EXIT_CODES[status] == 2
    assert not (tmp_path / "credential").exists() and not (tmp_path / "agent.yaml").exists()
    assert len(srv.es.bodies) == 1  # a refused code is not retried


async def test_a_busy_collector_is_retried_with_bounded_attempts(srv, tmp_path):
    srv.es.flaky = 2
    clock = VirtualClock()
    task = asyncio.create_task(
        enroll(
            str(srv.make_url("")),
            "GOOD-1234",
            tmp_path,
            clock=clock,
            attempts=3,
            backoff_s=2.0,
            fingerprint_data=FP,
        )
    )
    while not task.done():
        await asyncio.wait({task}, timeout=0.05)  # loopback I/O of the attempt
        await clock.advance(4.0)
    assert task.result().status is EnrollStatus.ENROLLED
    assert len(srv.es.bodies) == 3


def _closed_port() -> int:
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    return port


async def test_unreachable_collector_gives_up_after_the_attempts(tmp_path):
    clock = VirtualClock()
    task = asyncio.create_task(
        enroll(
            f"http://127.0.0.1:{_closed_port()}",
            "GOOD-1234",
            tmp_path,
            clock=clock,
            attempts=3,
            timeout_s=2,
            fingerprint_data=FP,
        )
    )
    slept = 0.0
    while not task.done():
        await asyncio.wait({task}, timeout=0.05)
        await clock.advance(2.0)
        slept += 2.0
    result = task.result()
    assert result.status is EnrollStatus.UNREACHABLE and EXIT_CODES[result.status] == 1
    assert "after 3 attempts" in result.message
    assert "run the same command again" in result.message and "still unused" in result.message
    assert slept < 60


async def test_a_malformed_answer_is_a_clear_error_and_writes_nothing(srv, tmp_path):
    srv.es.answer_body = {"board": "Not A Name", "token": TOKEN, "config": CONFIG}
    with pytest.raises(ConfigError, match="board"):
        await enroll(str(srv.make_url("")), "GOOD-1234", tmp_path, clock=VirtualClock(), fingerprint_data=FP)
    srv.es.answer_body = {"board": "g3-b", "token": "short", "config": CONFIG}
    with pytest.raises(ConfigError, match="token"):
        await enroll(str(srv.make_url("")), "GOOD-1234", tmp_path, clock=VirtualClock(), fingerprint_data=FP)
    assert not (tmp_path / "credential").exists() and not (tmp_path / "agent.yaml").exists()


async def test_the_fingerprint_reaches_the_collector_with_the_boards_real_fields(srv, tmp_path):
    await enroll(str(srv.make_url("")), "GOOD-1234", tmp_path, clock=VirtualClock())
    fp = srv.es.bodies[0]["fingerprint"]
    assert set(fp) == {"machine_id", "hostname", "adapters", "model"}
    assert fp["hostname"] == socket.gethostname()
    json.dumps(fp)


def test_enroll_command_exit_codes(tmp_path, capsys):
    """The CLI wrapper: exit 1 and a message naming the collector when it cannot be reached."""
    url = f"http://127.0.0.1:{_closed_port()}"
    assert enroll_command(url, "GOOD-1234", tmp_path, attempts=1, timeout_s=2) == 1
    assert url in capsys.readouterr().err
    with pytest.raises(ConfigError, match="--collector"):
        enroll_command("ftp://x", "GOOD-1234", tmp_path, attempts=1)


async def test_a_shared_session_is_left_open(srv, tmp_path):
    async with aiohttp.ClientSession() as session:
        await enroll(
            str(srv.make_url("")),
            "GOOD-1234",
            tmp_path,
            clock=VirtualClock(),
            session=session,
            fingerprint_data=FP,
        )
        assert not session.closed


async def test_a_used_code_names_the_reissue_command(srv, tmp_path):
    result = await enroll(
        str(srv.make_url("")), "USED-1234", tmp_path / "s", clock=VirtualClock(), fingerprint_data=FP
    )
    assert result.status is EnrollStatus.CODE_USED
    assert "listenpost collector board reissue" in result.message
    expired = await enroll(
        str(srv.make_url("")), "OLD-12345", tmp_path / "s", clock=VirtualClock(), fingerprint_data=FP
    )
    assert "listenpost collector board reissue" in expired.message
