"""
`listenpost collector serve` as systemd runs it: a real process, a real sd_notify socket.

READY is a promise that the port answers; a port that cannot be bound is a one-line error and exit 2,
never READY followed by a traceback.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import os
import signal
import socket
import subprocess
import sys
import urllib.request
from pathlib import Path

import pytest

from listenpost.collector.store.migrations import POSTGRES, latest, migrate_postgres
from tests.collector.test_scaleout_processes import fresh_database  # noqa: F401

WAIT_S = 60  # bounded waits for a process on a loaded machine, not speed assertions


@pytest.fixture
def notify_socket(tmp_path):
    rx = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    path = tmp_path / "notify.sock"
    rx.bind(str(path))
    rx.settimeout(WAIT_S)
    yield rx, str(path)
    rx.close()


def serve(state: Path, port: int, notify: str, db: str | None = None) -> subprocess.Popen[str]:
    argv = [sys.executable, "-m", "listenpost", "collector", "serve", "--state-dir", str(state)]
    argv += ["--host", "127.0.0.1", "--port", str(port), "--log-format", "json"]
    argv += ["--db", db] if db else []
    env = {**os.environ, "NOTIFY_SOCKET": notify}
    return subprocess.Popen(argv, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def test_ready_is_sent_only_once_the_port_answers_and_sigterm_stops_cleanly(tmp_path, notify_socket):
    rx, addr = notify_socket
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    proc = serve(tmp_path / "state", port, addr)
    try:
        # While the store opens (its migrations run then), systemd is asked for more start time.
        first = rx.recv(4096).decode()
        assert (
            first
            == "EXTEND_TIMEOUT_USEC=60000000\nSTATUS=starting: opening the store (a schema migration may take minutes)"
        ), first
        ready = rx.recv(4096).decode()
        while ready.startswith("EXTEND_TIMEOUT_USEC="):  # a slow start asks again every 20 s
            ready = rx.recv(4096).decode()
        assert ready.startswith("READY=1"), ready
        # READY came after the bind: the very next request is answered
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/v1/status", timeout=WAIT_S) as resp:
            assert resp.status == 200
    finally:
        proc.send_signal(signal.SIGTERM)
        out, err = proc.communicate(timeout=WAIT_S)
    assert proc.returncode == 0, err
    assert rx.recv(4096) == b"STOPPING=1"
    events = [line for line in err.splitlines() if '"event"' in line]  # logs go to stderr
    listening = next(i for i, line in enumerate(events) if '"collector_listening"' in line)
    assert any('"collector_stopping"' in line for line in events[listening:])
    assert "Traceback" not in err and not out


def test_a_port_in_use_is_one_clear_line_and_exit_2_without_ready(tmp_path, notify_socket):
    rx, addr = notify_socket
    rx.settimeout(0.5)  # only to prove that nothing arrives after the process has exited
    with socket.socket() as busy:
        busy.bind(("127.0.0.1", 0))
        busy.listen()
        port = busy.getsockname()[1]
        proc = serve(tmp_path / "state", port, addr)
        out, err = proc.communicate(timeout=WAIT_S)
    assert proc.returncode == 2
    assert f"cannot listen on 127.0.0.1:{port}: Address already in use" in err
    assert "Traceback" not in err and "Traceback" not in out
    assert '"collector_listening"' not in err
    sent = []
    with contextlib.suppress(TimeoutError):
        while True:
            sent.append(rx.recv(4096))
    assert sent and all(m.startswith(b"EXTEND_TIMEOUT_USEC=") for m in sent), sent  # never READY


async def test_while_starting_asks_again_before_the_extension_runs_out(notify_socket):
    """The start keeps asking, a third of the extension apart, until it is cancelled (READY follows)."""
    from listenpost.collector.cli import _while_starting
    from listenpost.core.notify import Notifier

    rx, addr = notify_socket
    rx.setblocking(False)
    loop = asyncio.get_running_loop()
    task = asyncio.create_task(_while_starting(Notifier({"NOTIFY_SOCKET": addr}), extend_s=0.3))
    try:
        got = [await asyncio.wait_for(loop.sock_recv(rx, 4096), WAIT_S) for _ in range(3)]
    finally:
        task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await task
    assert all(g.startswith(b"EXTEND_TIMEOUT_USEC=300000\nSTATUS=starting") for g in got), got
    assert task.cancelled()


async def test_a_start_held_up_by_a_migration_asks_for_time_and_is_ready_after_it(
    tmp_path,
    notify_socket,
    fresh_database: str,  # noqa: F811 - the fixture imported above
):
    """Another collector migrating the same database (its lock held here) holds this one's start up:
    systemd hears "more time" at once, READY only once this one's migrations (7 and up, each logged with
    its seconds) are done and the port answers."""
    import asyncpg

    from listenpost.collector.store.migrations import _MIGRATION_LOCK_KEY

    rx, addr = notify_socket
    rx.setblocking(False)
    loop = asyncio.get_running_loop()
    admin = await asyncpg.connect(fresh_database, timeout=10)
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    proc = None
    try:
        await migrate_postgres(admin, upto=6)  # a database from before the day partitions
        lock = admin.transaction()
        await lock.start()
        await admin.execute("SELECT pg_advisory_xact_lock($1)", _MIGRATION_LOCK_KEY)
        proc = serve(tmp_path / "state", port, addr, db=fresh_database)
        first = await asyncio.wait_for(loop.sock_recv(rx, 4096), WAIT_S)
        assert first.startswith(b"EXTEND_TIMEOUT_USEC=60000000\nSTATUS=starting"), first
        # The collector is now waiting for the lock (its server session shows it), not yet migrating.
        waiting = "SELECT count(*) FROM pg_locks WHERE locktype = 'advisory' AND NOT granted"
        for _ in range(int(WAIT_S / 0.05)):
            if await admin.fetchval(waiting):
                break
            await asyncio.sleep(0.05)
        assert await admin.fetchval(waiting) == 1
        assert proc.poll() is None
        await lock.rollback()
        got = first
        while not got.startswith(b"READY=1"):
            got = await asyncio.wait_for(loop.sock_recv(rx, 4096), WAIT_S)
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/v1/status", timeout=WAIT_S) as resp:  # noqa: ASYNC210
            assert resp.status == 200
    finally:
        await admin.close()
        if proc is not None:
            proc.send_signal(signal.SIGTERM)
            out, err = proc.communicate(timeout=WAIT_S)  # noqa: ASYNC101
    logged = [json.loads(line) for line in err.splitlines() if line.startswith("{")]
    events = [e["event"] for e in logged]
    migrated = [(e["event"], e["version"]) for e in logged if e["event"].startswith("schema_")]
    assert migrated == [
        (what, v) for v in range(7, latest(POSTGRES) + 1) for what in ("schema_migrating", "schema_migrated")
    ], events
    assert events.index("collector_listening") > max(
        i for i, e in enumerate(events) if e == "schema_migrated"
    )
