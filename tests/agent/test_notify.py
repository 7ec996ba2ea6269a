"""sd_notify against real bound AF_UNIX datagram sockets, cross-checked with the PyPI sdnotify package."""

from __future__ import annotations

import os
import socket

import pytest
import sdnotify

from listenpost.core.notify import Notifier


@pytest.fixture
def abstract_socket():
    """A receiver in the abstract namespace; yields (socket, NOTIFY_SOCKET value)."""
    name = f"lp-notify-test-{os.getpid()}-{id(object())}"
    rx = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    rx.bind("\0" + name)
    rx.settimeout(2)
    yield rx, "@" + name
    rx.close()


@pytest.fixture
def path_socket(tmp_path):
    path = tmp_path / "notify.sock"
    rx = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    rx.bind(str(path))
    rx.settimeout(2)
    yield rx, str(path)
    rx.close()


def test_ready_and_status_match_the_sdnotify_package(abstract_socket, monkeypatch):
    """Same datagram bytes as sdnotify 0.3.2 (docs/references.md §10) for READY=1 + STATUS."""
    rx, addr = abstract_socket
    n = Notifier({"NOTIFY_SOCKET": addr})
    assert n.enabled
    assert n.ready("scanning hci0")
    ours = rx.recv(4096)
    monkeypatch.setenv("NOTIFY_SOCKET", addr)
    reference = sdnotify.SystemdNotifier()
    try:
        reference.notify("READY=1\nSTATUS=scanning hci0")
        theirs = rx.recv(4096)
    finally:
        reference.socket.close()  # the package never closes its socket itself
    assert ours == theirs == b"READY=1\nSTATUS=scanning hci0"


def test_path_socket_and_status_is_one_line(path_socket):
    rx, addr = path_socket
    n = Notifier({"NOTIFY_SOCKET": addr})
    assert n.status("spool 3 batches\nuplink idle")
    assert rx.recv(4096) == b"STATUS=spool 3 batches uplink idle"
    assert n.stopping()
    assert rx.recv(4096) == b"STOPPING=1"


def test_watchdog_interval_is_half_of_watchdog_usec(abstract_socket):
    """sd_watchdog_enabled(3) advice: ping at half the interval [from memory, docs/references.md §10]."""
    rx, addr = abstract_socket
    n = Notifier({"NOTIFY_SOCKET": addr, "WATCHDOG_USEC": "30000000", "WATCHDOG_PID": str(os.getpid())})
    assert n.watchdog_interval == 15.0
    assert n.watchdog()
    assert rx.recv(4096) == b"WATCHDOG=1"


def test_watchdog_meant_for_another_process_is_ignored(abstract_socket):
    _, addr = abstract_socket
    n = Notifier({"NOTIFY_SOCKET": addr, "WATCHDOG_USEC": "30000000", "WATCHDOG_PID": str(os.getpid() + 1)})
    assert n.watchdog_interval is None and not n.watchdog()


@pytest.mark.parametrize("env", [{}, {"NOTIFY_SOCKET": ""}, {"NOTIFY_SOCKET": "vsock:2:999"}])
def test_without_a_socket_everything_is_a_no_op(env):
    n = Notifier(env)
    assert not n.enabled
    assert not n.ready("x") and not n.status("x") and not n.watchdog()
    assert n.failures == 0


def test_send_errors_are_swallowed_and_counted(tmp_path):
    n = Notifier({"NOTIFY_SOCKET": str(tmp_path / "nobody-listens.sock")})
    assert n.enabled
    assert not n.ready()
    assert n.failures == 1


def test_extend_timeout_asks_for_microseconds_as_sd_notify_3_names_them(path_socket):
    """sd_notify(3): ``EXTEND_TIMEOUT_USEC=`` takes microseconds (systemd 236 and later)."""
    rx, addr = path_socket
    n = Notifier({"NOTIFY_SOCKET": addr})
    assert n.extend_timeout(60, "starting: opening the store")
    assert rx.recv(4096) == b"EXTEND_TIMEOUT_USEC=60000000\nSTATUS=starting: opening the store"
    assert n.extend_timeout(0.25)
    assert rx.recv(4096) == b"EXTEND_TIMEOUT_USEC=250000"
    assert not Notifier({}).extend_timeout(60)  # outside systemd: nothing to ask
