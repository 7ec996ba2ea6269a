"""
First boot as the enroll unit runs it (``agent enroll --until-enrolled``): the collector is down for
the first minutes and comes up later on the same address; the board enrolls by itself once it is
back. A refused code ends at once, with a message naming ``board reissue``, and no retry.
"""

from __future__ import annotations

import asyncio
import io
import random
import socket
from pathlib import Path

import aiohttp

from listenpost.agent.client.enroll import EXIT_CODES, EnrollStatus, enroll
from listenpost.agent.config import load_agent_config
from listenpost.cli import main
from listenpost.collector.app import create_app
from listenpost.core.clock import VirtualClock
from listenpost.core.logs import configure
from tests.collector.test_api import admin_headers, settings_for

FP = {"machine_id": "0123456789abcdef0123456789abcdef", "hostname": "u1-a", "adapters": {}, "model": None}
CAP_S = 60.0


class RecordingClock(VirtualClock):
    """A virtual clock that notes every wait asked of it."""

    def __init__(self) -> None:
        super().__init__()
        self.waits: list[float] = []

    async def sleep(self, seconds: float) -> None:
        self.waits.append(seconds)
        await super().sleep(seconds)


def _free_port() -> int:
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    return port


async def _issue_code(aiohttp_server, state: Path, clock: VirtualClock, **yaml: object) -> str:
    """Start a collector, add board u1-a, stop it again: the code is in its SQLite file."""
    configure("json", stream=io.StringIO())
    server = await aiohttp_server(create_app(settings_for(state, **yaml), clock=clock, run_monitor=False))
    async with aiohttp.ClientSession(timeout=aiohttp.ClientTimeout(total=10)) as s:
        async with s.post(
            server.make_url("/v1/admin/boards"),
            json={"name": "u1-a", "room": "U1 Space Gallery"},
            headers=admin_headers(state),
        ) as r:
            assert r.status == 201, await r.text()
            code = (await r.json())["code"]
    await server.close()
    return code


async def _step(task: asyncio.Task, clock: RecordingClock) -> None:
    """Let the attempt's loopback I/O finish (real time, bounded), then jump to the end of its wait."""
    for _ in range(1000):
        if task.done() or clock.pending_sleepers:
            break
        await asyncio.sleep(0.01)
    else:
        raise AssertionError("enroll neither finished nor waited within 10 s of I/O")
    if clock.pending_sleepers:
        await clock.advance(clock.waits[-1])


async def test_enroll_waits_out_a_collector_that_comes_up_minutes_later(aiohttp_server, tmp_path):
    cclock = VirtualClock()
    code = await _issue_code(aiohttp_server, tmp_path / "collector", cclock)
    port = _free_port()
    board = RecordingClock()
    task = asyncio.create_task(
        enroll(
            f"http://127.0.0.1:{port}",
            code,
            tmp_path / "agent",
            clock=board,
            attempts=None,
            timeout_s=2,
            backoff_max_s=CAP_S,
            rng=random.Random(7),
            fingerprint_data=FP,
        )
    )
    start = board.monotonic()
    while board.monotonic() - start < 300:  # five minutes of a dead collector
        await _step(task, board)
        assert not task.done(), task.result()
    down_waits = len(board.waits)
    assert down_waits >= 5  # it kept trying...
    assert all(0 <= w <= CAP_S for w in board.waits)  # ...never waiting past the cap
    assert not (tmp_path / "agent" / "agent.yaml").exists()

    # The collector comes back on the same address, with the same database.
    configure("json", stream=io.StringIO())
    app = create_app(settings_for(tmp_path / "collector"), clock=cclock, run_monitor=False)
    await aiohttp_server(app, port=port)
    back = board.monotonic()
    for _ in range(50):
        if task.done():
            break
        await _step(task, board)
    result = task.result()
    assert result.status is EnrollStatus.ENROLLED and result.board == "u1-a"
    assert board.monotonic() - back <= CAP_S  # within one capped wait of its return
    assert load_agent_config(tmp_path / "agent" / "agent.yaml").board == "u1-a"
    assert (tmp_path / "agent" / "credential").stat().st_mode & 0o077 == 0


async def test_an_expired_code_ends_with_a_final_error_and_no_retry(aiohttp_server, tmp_path, capsys):
    cclock = VirtualClock()
    code = await _issue_code(
        aiohttp_server, tmp_path / "collector", cclock, enrollment={"code_lifetime_hours": 1}
    )
    await cclock.advance(2 * 3600)
    configure("json", stream=io.StringIO())
    app = create_app(settings_for(tmp_path / "collector"), clock=cclock, run_monitor=False)
    server = await aiohttp_server(app)
    board = RecordingClock()
    result = await enroll(
        str(server.make_url("")), code, tmp_path / "agent", clock=board, attempts=None, fingerprint_data=FP
    )
    assert result.status is EnrollStatus.CODE_EXPIRED and board.waits == []  # no retry loop
    assert EXIT_CODES[result.status] == 2

    # The command the unit runs: the code from a credential file, exit 2 (the unit's final status).
    code_file = tmp_path / "enroll-code"
    code_file.write_text(code + "\n")
    argv = ["agent", "enroll", "--collector", str(server.make_url("")), "--code-file", str(code_file)]
    argv += ["--until-enrolled", "--state-dir", str(tmp_path / "agent")]
    capsys.readouterr()
    assert await asyncio.to_thread(main, argv) == 2
    err = capsys.readouterr().err
    assert "expired" in err and "listenpost collector board reissue" in err and "Traceback" not in err
    assert not (tmp_path / "agent" / "credential").exists()


async def test_an_unbounded_run_still_gives_up_after_its_deadline(tmp_path):
    board = RecordingClock()
    task = asyncio.create_task(
        enroll(
            f"http://127.0.0.1:{_free_port()}",
            "7KQ2-M9XD-4TPA-WZ3R",
            tmp_path,
            clock=board,
            attempts=None,
            timeout_s=2,
            give_up_after_s=600,
            rng=random.Random(3),
            fingerprint_data=FP,
        )
    )
    for _ in range(200):
        if task.done():
            break
        await _step(task, board)
    result = task.result()
    assert result.status is EnrollStatus.GAVE_UP and EXIT_CODES[result.status] == 3
    assert "board reissue" in result.message
    assert sum(board.waits) <= 600
