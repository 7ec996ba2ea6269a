"""`agent record`: a live source copied into a recording; clear failure without Bluetooth."""

from __future__ import annotations

import asyncio
import os
import socket

import pytest

from listenpost.agent.record import record, record_command
from listenpost.agent.sources.bleak_scan import BleakSource
from listenpost.agent.sources.replay import read_recording
from listenpost.cli import main
from listenpost.core.clock import settle
from listenpost.core.errors import ConfigError, SourceReason, SourceUnavailable
from tests.agent.test_bleak_source import FakeScanner


@pytest.fixture
def fake(clock):
    return type("Fake", (FakeScanner,), {"clock": clock, "instances": [], "script": [], "start_times": []})


async def test_record_copies_adverts_until_the_time_is_up(tmp_path, clock, fake):
    """Adverts heard within `seconds` of clock time land in the recording, with the board's header."""
    out = tmp_path / "rec.jsonl.gz"
    src = BleakSource("hci0", clock, 60, backend=fake)
    task = asyncio.create_task(record(out, src, clock, board="g3-b", seconds=10))
    await settle()
    for i in range(4):
        fake.instances[0].emit(
            f"C4:7A:10:00:2B:{i:02X}", -60 - i, mfg={0xFFFF: b"LP\x00\x00\x00" + bytes([i])}
        )
        await clock.advance(2)
    await clock.advance(2)  # t = 10 s: done
    result = await asyncio.wait_for(task, 5)
    assert (result.adverts, result.addresses, result.seconds) == (4, 4, 10.0)
    header, it = read_recording(out)
    assert (header.board, header.boot, header.wall_at_start) == ("g3-b", clock.boot_id, 1_800_000_000.0)
    got = list(it)
    assert [(a.rssi_dbm, a.t_mono_ns) for a in got] == [(-60 - i, (1000 + 2 * i) * 10**9) for i in range(4)]
    assert fake.instances[0].stopped


async def test_nothing_heard_writes_no_file(tmp_path, clock, fake):
    """A quiet run leaves no empty recording behind."""
    out = tmp_path / "rec.jsonl"
    task = asyncio.create_task(
        record(out, BleakSource("hci0", clock, 60, backend=fake), clock, board="g0-a", seconds=5)
    )
    await settle()
    await clock.advance(5)
    assert (await asyncio.wait_for(task, 5)).adverts == 0
    assert not out.exists()


async def test_unavailable_source_raises_and_writes_nothing(tmp_path, clock, fake):
    """A radio that cannot start surfaces its SourceUnavailable; no file is created."""
    fake.script = [FileNotFoundError(2, "No such file or directory")]
    out = tmp_path / "rec.jsonl"
    src = BleakSource(None, clock, 60, backend=fake, max_failures=1)
    with pytest.raises(SourceUnavailable) as e:
        await record(out, src, clock, board="g0-a", seconds=5)
    assert e.value.reason is SourceReason.NO_BLUETOOTH
    assert not out.exists()


def test_command_without_af_bluetooth_exits_1(tmp_path, capsys, monkeypatch):
    """`agent record --source hci` on a machine without Bluetooth sockets: exit 1, clear message, no file."""
    monkeypatch.delattr(socket, "AF_BLUETOOTH", raising=False)
    out = tmp_path / "r.jsonl"
    assert main(["agent", "record", "--out", str(out), "--source", "hci", "--seconds", "1"]) == 1
    err = capsys.readouterr().err
    assert "cannot record from hci" in err and "no AF_BLUETOOTH" in err and "no_bluetooth" in err
    assert not out.exists()


@pytest.mark.skipif(
    os.path.exists("/run/dbus/system_bus_socket") or os.path.exists("/var/run/dbus/system_bus_socket"),
    reason="a system D-Bus is present, so bleak's start() gets further than on a machine without one",
)
def test_bleak_command_without_system_bus_exits_1(tmp_path, capsys):
    """With no system D-Bus (as in this container), bleak's start() fails and record says why (real bleak)."""
    out = tmp_path / "r.jsonl"
    assert record_command(out, config=None, source="bleak", adapter=None, seconds=1) == 1
    err = capsys.readouterr().err
    assert "cannot record from bleak" in err and "no system D-Bus" in err
    assert not out.exists()


def test_command_refuses_bad_requests(tmp_path):
    """Existing output, non-live sources and non-positive durations are usage errors naming the flag."""
    existing = tmp_path / "old.jsonl"
    existing.write_text("keep me\n")
    with pytest.raises(ConfigError, match="--out: .* exists"):
        record_command(existing, config=None, source="bleak", adapter=None, seconds=1)
    assert existing.read_text() == "keep me\n"
    cfg = tmp_path / "agent.yaml"
    cfg.write_text(f"board: g0-a\nsource:\n  kind: replay\n  files: [{existing}]\n")
    with pytest.raises(ConfigError, match="--source: record needs a live source"):
        record_command(tmp_path / "n.jsonl", config=cfg, source=None, adapter=None, seconds=1)
    with pytest.raises(ConfigError, match="--seconds: must be > 0"):
        record_command(tmp_path / "n.jsonl", config=None, source="hci", adapter=None, seconds=0)
