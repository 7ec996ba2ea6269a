"""
`listenpost collector serve` as systemd runs it: a real process, a real sd_notify socket.

READY is a promise that the port answers; a port that cannot be bound is a one-line error and exit 2,
never READY followed by a traceback.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import urllib.request
from pathlib import Path

import pytest

WAIT_S = 60  # bounded waits for a process on a loaded machine, not speed assertions


@pytest.fixture
def notify_socket(tmp_path):
    rx = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    path = tmp_path / "notify.sock"
    rx.bind(str(path))
    rx.settimeout(WAIT_S)
    yield rx, str(path)
    rx.close()


def serve(state: Path, port: int, notify: str) -> subprocess.Popen[str]:
    argv = [sys.executable, "-m", "listenpost", "collector", "serve", "--state-dir", str(state)]
    argv += ["--host", "127.0.0.1", "--port", str(port), "--log-format", "json"]
    env = {**os.environ, "NOTIFY_SOCKET": notify}
    return subprocess.Popen(argv, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def test_ready_is_sent_only_once_the_port_answers_and_sigterm_stops_cleanly(tmp_path, notify_socket):
    rx, addr = notify_socket
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    proc = serve(tmp_path / "state", port, addr)
    try:
        first = rx.recv(4096).decode()
        assert first.startswith("READY=1"), first
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
    with pytest.raises(TimeoutError):
        rx.recv(4096)
