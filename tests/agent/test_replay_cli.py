"""``listenpost agent replay --dry-run`` as a real subprocess on small hand-written recordings."""

from __future__ import annotations

import asyncio
import json
import subprocess
import sys
from pathlib import Path

import pytest

LISTENPOST = Path(sys.executable).parent / "listenpost"
VENUE = "4d2a0c1e-7f3b-4c55-9e61-2b8f0a7d3c10"
VENUE_HEX = VENUE.replace("-", "")
NS = "8b0ca750e7a74e14bd99"

# Written by hand per DEVELOPERS.md "Recorded-log format": header, then one advert per line.
RECORDING = (
    "\n".join(
        [
            '{"format": "listenpost-recording", "version": 1, "board": "g0-a", "boot": "b-1", "wall_at_start": 1800000000.0}',
            # visitor tag 7:1 (registered)
            f'{{"t": 100.5, "a": "C0:00:00:00:00:01", "at": 1, "r": -67, "m": {{"004c": "0215{VENUE_HEX}00070001c5"}}}}',
            # visitor tag 7:2 (not registered)
            f'{{"t": 100.75, "a": "C0:00:00:00:00:02", "at": 1, "r": -70, "m": {{"004c": "0215{VENUE_HEX}00070002c5"}}}}',
            # a phone
            '{"t": 101.0, "a": "5E:11:22:33:44:55", "at": 1, "r": -80, "m": {"0006": "0109200211"}}',
            # Eddystone tag instance 1e: UID then TLM (3000 mV, -5.5 degC, 1234 advs, 3600 s)
            f'{{"t": 101.25, "a": "C0:00:00:00:00:03", "at": 1, "r": -71, "s": {{"feaa": "00ec{NS}00000000001e0000"}}, "u": ["feaa"]}}',
            '{"t": 101.5, "a": "C0:00:00:00:00:03", "at": 1, "r": -72, "s": {"feaa": "20000bb8fa80000004d200008ca0"}}',
            # custom firmware tag 7 (needs the lpx rule), then an iBeacon frame cut short
            '{"t": 102.0, "a": "C0:00:00:00:00:04", "at": 1, "r": -60, "m": {"ffff": "4c5000000007"}}',
            f'{{"t": 102.25, "a": "C0:00:00:00:00:05", "at": 1, "r": -61, "m": {{"004c": "0215{VENUE_HEX}0007"}}}}',
            # registered by address, no payload
            '{"t": 103.0, "a": "C4:7A:10:00:2B:91", "at": 0, "r": -55}',
        ]
    )
    + "\n"
)

TAGS = f"""# Brackenford test tags
ibeacon:{VENUE.upper()}:7:1
eddystone:{NS}:00000000001e   # gallery tag
lpx:00000007
mac:c4:7a:10:00:2b:91
"""


def run(*args: str | Path, cwd: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [str(LISTENPOST), "agent", "replay", *map(str, args)],
        cwd=cwd,
        capture_output=True,
        text=True,
        timeout=60,
    )


@pytest.fixture
def files(tmp_path: Path) -> tuple[Path, Path]:
    rec = tmp_path / "g0-a.jsonl"
    rec.write_text(RECORDING)
    tags = tmp_path / "tags.txt"
    tags.write_text(TAGS)
    return rec, tags


def test_dry_run_prints_each_reading(files, tmp_path):
    """Without rules the lpx tag names nothing; every other registered advert is one exact JSON line."""
    rec, tags = files
    p = run(rec, "--dry-run", "--tags", tags, "--fast", cwd=tmp_path)
    assert 0 == p.returncode, p.stderr
    assert [
        {"tag": f"ibeacon:{VENUE}:7:1", "rssi": -67, "t": 100.5},
        {"tag": f"eddystone:{NS}:00000000001e", "rssi": -71, "t": 101.25},
        {
            "tag": f"eddystone:{NS}:00000000001e",
            "rssi": -72,
            "t": 101.5,
            "telemetry": {"battery_mv": 3000, "temperature_c": -5.5, "adv_count": 1234, "uptime_s": 3600.0},
        },
        {"tag": "mac:C4:7A:10:00:2B:91", "rssi": -55, "t": 103.0},
    ] == [json.loads(line) for line in p.stdout.splitlines()]
    assert "adverts read        8" in p.stderr
    assert "decode errors       1" in p.stderr
    assert "readings            4 from 3 of 4 registered tags" in p.stderr
    # Unregistered devices appear nowhere in the output.
    for secret in ("C0:00:00:00:00:02", "5E:11:22:33:44:55", "0109200211", ":7:2"):
        assert secret not in p.stdout + p.stderr


def test_config_rules_and_offset_override(files, tmp_path):
    """Decode rules come from the config; --offset-db overrides calibration.offset_db."""
    rec, tags = files
    cfg = tmp_path / "agent.yaml"
    cfg.write_text(
        "board: g0-a\n"
        f"tags:\n  file: {tags.name}\n"
        "decode:\n  rules:\n    - {name: lpx, company_id: 0xFFFF, prefix: '4c50', offset: 2, length: 4}\n"
        "calibration:\n  offset_db: 10\n"
    )
    p = run(rec, "--dry-run", "--config", cfg, "--offset-db", "2.5", "--fast", cwd=tmp_path)
    assert 0 == p.returncode, p.stderr
    lines = [json.loads(line) for line in p.stdout.splitlines()]
    assert {"tag": "lpx:00000007", "rssi": -57.5, "t": 102.0} in lines
    assert [-64.5, -68.5, -69.5, -57.5, -52.5] == [x["rssi"] for x in lines]

    p = run(
        rec, "--dry-run", "--config", cfg, "--fast", cwd=tmp_path
    )  # the config's own offset and tags file
    assert [-57, -61, -62, -50, -45] == [json.loads(x)["rssi"] for x in p.stdout.splitlines()]


def test_real_speed_replay_is_paced(files, tmp_path):
    """--speed reaches the source: 2.5 s of recording at 100x takes at least 25 ms of real time (kept tiny)."""
    rec, tags = files
    p = run(rec, "--dry-run", "--tags", tags, "--speed", "100", cwd=tmp_path)
    assert 0 == p.returncode, p.stderr
    assert 4 == len(p.stdout.splitlines())
    elapsed = float(p.stderr.split(" in ")[1].split(" s")[0])
    assert 0.02 <= elapsed < 5


def test_no_tags_exits_2_naming_both_options(files, tmp_path):
    """With neither --tags nor a config tags file the command refuses, naming both ways to give tags."""
    rec, _ = files
    p = run(rec, "--dry-run", "--fast", cwd=tmp_path)
    assert 2 == p.returncode
    assert "--tags" in p.stderr and "--config" in p.stderr
    assert "" == p.stdout


def test_bad_tag_line_exits_2_with_file_and_line(files, tmp_path):
    """A malformed tag file line is reported as file:line before anything is replayed."""
    rec, tags = files
    tags.write_text(TAGS + "ibeacon:not-a-uuid:7:3\n")
    p = run(rec, "--dry-run", "--tags", tags, "--fast", cwd=tmp_path)
    assert 2 == p.returncode
    assert f"{tags}:6: tag id 'ibeacon:not-a-uuid:7:3'" in p.stderr
    assert "" == p.stdout


def test_bad_recording_line_exits_2_with_file_and_line(files, tmp_path):
    """A broken recording line stops the replay with exit 2 and file:line; earlier readings were printed."""
    rec, tags = files
    lines = RECORDING.splitlines()
    lines.insert(3, '{"t": 100.9, "a": "not an address", "at": 1, "r": -70}')
    rec.write_text("\n".join(lines) + "\n")
    p = run(rec, "--dry-run", "--tags", tags, "--fast", cwd=tmp_path)
    assert 2 == p.returncode
    assert f"{rec}:4:" in p.stderr
    assert 1 == len(p.stdout.splitlines())


def test_upload_needs_config(files, tmp_path):
    """Without --dry-run the board identity comes from --config; its absence is a usage error."""
    rec, tags = files
    p = run(rec, "--tags", tags, "--fast", cwd=tmp_path)
    assert 2 == p.returncode
    assert "--config" in p.stderr


def test_btsnoop_capture_is_detected_by_content(tmp_path):
    """A btsnoop capture (datalink 1002, layout per docs/references.md §3) whose HCI advertising reports scapy built
    from the §4 iBeacon vector replays like a recording; the file name says nothing about its kind."""
    import struct

    from scapy.layers.bluetooth import (
        HCI_Event_Hdr,
        HCI_Event_LE_Meta,
        HCI_Hdr,
        HCI_LE_Meta_Advertising_Report,
        HCI_LE_Meta_Advertising_Reports,
    )

    ad = bytes.fromhex("0201061aff4c000215e2c56db5dffb48d2b060d0f5a71096e000010102c5")

    def event(rssi: int) -> bytes:
        rep = HCI_LE_Meta_Advertising_Report(
            type=3, addr_type=1, addr="c0:11:22:33:44:55", data=ad, rssi=rssi
        )
        return bytes(
            HCI_Hdr() / HCI_Event_Hdr() / HCI_Event_LE_Meta() / HCI_LE_Meta_Advertising_Reports(reports=[rep])
        )

    epoch_us = 0x00DCDDB30F2F8000  # btsnoop time zero, docs/references.md §3
    t0 = 1_700_000_000_000_000
    cap = b"btsnoop\0" + struct.pack(">II", 1, 1002)
    for dt_us, rssi in ((0, -60), (250_000, -63)):
        pkt = event(rssi)
        cap += struct.pack(">IIIIq", len(pkt), len(pkt), 3, 0, epoch_us + t0 + dt_us) + pkt
    f = tmp_path / "capture.bin"
    f.write_bytes(cap)
    tags = tmp_path / "tags.txt"
    tags.write_text("ibeacon:e2c56db5-dffb-48d2-b060-d0f5a71096e0:1:258\n")
    p = run(f, "--dry-run", "--tags", tags, "--fast", cwd=tmp_path)
    assert 0 == p.returncode, p.stderr
    lines = [json.loads(x) for x in p.stdout.splitlines()]
    assert [
        ("ibeacon:e2c56db5-dffb-48d2-b060-d0f5a71096e0:1:258", -60),
        ("ibeacon:e2c56db5-dffb-48d2-b060-d0f5a71096e0:1:258", -63),
    ] == [(x["tag"], x["rssi"]) for x in lines]
    assert 0.25 == pytest.approx(lines[1]["t"] - lines[0]["t"], abs=1e-6)


# ---------------------------------------------------------------- the board settings a dry run uses


def test_dry_run_of_an_enrolled_board_uses_the_collectors_cached_config(files, tmp_path):
    """An agent.yaml written by 'agent enroll' has no tags file: the dry run takes tags, rules and offset
    from the collector's cached config, as 'agent run' does, instead of refusing."""
    from listenpost.agent.client.remote_config import ConfigCache

    rec, _ = files
    state = tmp_path / "board"
    state.mkdir()
    (state / "agent.yaml").write_text(
        f"board: g0-a\nstate_dir: {state}\ncollector:\n  url: http://10.20.0.2:8470\n"
    )
    ConfigCache(state).save(
        {
            "board": "g0-a",
            "tags": [f"ibeacon:{VENUE}:7:1", "lpx:00000007"],
            "rules": [{"name": "lpx", "company_id": 0xFFFF, "prefix": "4c50", "offset": 2, "length": 4}],
            "offset_db": -3.0,
            "flush_seconds": 5,
            "heartbeat_seconds": 10,
        },
        None,
    )
    p = run(rec, "--dry-run", "--config", state / "agent.yaml", "--fast", cwd=tmp_path)
    assert 0 == p.returncode, p.stderr
    assert [
        {"tag": f"ibeacon:{VENUE}:7:1", "rssi": -70, "t": 100.5},
        {"tag": "lpx:00000007", "rssi": -63, "t": 102.0},
    ] == [json.loads(x) for x in p.stdout.splitlines()]
    assert "no decode rule" not in p.stderr
    # --offset-db still wins over the cached offset.
    p = run(rec, "--dry-run", "--config", state / "agent.yaml", "--offset-db", "0", "--fast", cwd=tmp_path)
    assert [-67, -60] == [json.loads(x)["rssi"] for x in p.stdout.splitlines()]


def test_dry_run_names_registered_tags_no_rule_can_decode(files, tmp_path):
    """Registered custom-firmware tags without their decode rule can never be heard: the summary says so."""
    rec, tags = files
    p = run(rec, "--dry-run", "--tags", tags, "--fast", cwd=tmp_path)
    assert 0 == p.returncode
    assert "no decode rule for 'lpx' (1 tags)" in p.stderr and "decode.rules" in p.stderr


# ---------------------------------------------------------------- uploading: where the collector puts a replay


async def _clock_start(rec: Path, speed: float, clock) -> tuple[float, str]:
    from listenpost.agent.sources import replay_board_clock

    board = await replay_board_clock([rec], speed, clock)
    return board.monotonic(), board.boot_id


@pytest.mark.parametrize(
    ("speed", "start"),
    [
        # Adverts at board 100.5 .. 103.0 s. At speed 2 advert i is due (t_i - 100.5) / 2 after the start, so
        # the clock must start at max(t_i - (t_i - 100.5) / 2) = 103.0 - 1.25; as fast as possible, at 103.0.
        (2.0, 101.75),
        (1.0, 100.5),
        (0.0, 103.0),
    ],
)
async def test_replay_board_clock_starts_where_no_advert_is_ahead_of_it(files, speed, start):
    from listenpost.core.clock import VirtualClock

    rec, _ = files
    clock = VirtualClock(start=5.0)  # a host booted 5 s ago: less uptime than the recording's times
    got, boot = await _clock_start(rec, speed, clock)
    assert start == pytest.approx(got, abs=1e-9)
    assert boot not in ("b-1", clock.boot_id)
    assert (await _clock_start(rec, speed, clock))[1] != boot  # every replay is a boot of its own


async def test_paced_replay_never_emits_an_advert_ahead_of_the_board_clock(files):
    """Through the real ReplaySource at speed 2 on virtual time: each advert's board time <= the clock's."""
    from listenpost.agent.sources import open_replay, replay_board_clock
    from listenpost.core.clock import VirtualClock

    rec, _ = files
    base = VirtualClock(start=5.0)
    board = await replay_board_clock([rec, rec], 2.0, base)  # the second file steps back: counts as 0
    seen: list[tuple[float, float]] = []

    async def consume() -> None:
        async for adv in open_replay([rec, rec], board, 2.0).adverts():
            seen.append((adv.t_mono_ns / 1e9, board.monotonic()))

    task = asyncio.create_task(consume())
    while not task.done():
        await asyncio.wait({task}, timeout=0.001)
        await base.advance(0.05)
    assert len(seen) == 16
    assert all(t <= now + 1e-9 for t, now in seen), seen


async def test_uploaded_replay_ends_at_the_collector_when_its_replay_ends(aiohttp_server, tmp_path, files):
    """The real collector (SQLite file) places an uploaded recording by the replay's own board clock:
    recorded spacing kept, the last advert at the time the replay finished, whatever the host's uptime."""
    import sqlite3

    import aiohttp

    from listenpost.agent.client.enroll import EnrollStatus, enroll
    from listenpost.agent.runner import upload_replay
    from listenpost.collector.app import create_app
    from listenpost.collector.config import CollectorSettings
    from listenpost.collector.http.auth import code_hash
    from listenpost.collector.state import STORE
    from listenpost.collector.store import Board, Enrollment
    from listenpost.core.clock import VirtualClock
    from tests.agent.test_service import run_on_virtual_time

    rec, _ = files
    clock = VirtualClock(start=5.0)
    (tmp_path / "collector").mkdir()
    app = create_app(CollectorSettings(state_dir=str(tmp_path / "collector")), clock=clock, run_monitor=False)
    server = await aiohttp_server(app)
    store = app[STORE]
    await store.add_board(
        Board("g0-a", "G0 Foyer", "ground", clock.time()),
        Enrollment("g0-a", code_hash("BRK-G0A-1001"), clock.time() + 3600),
    )
    await store.add_tags(
        [f"ibeacon:{VENUE}:7:1", f"eddystone:{NS}:00000000001e", "mac:C4:7A:10:00:2B:91"], clock.time()
    )
    result = await enroll(
        str(server.make_url("")).rstrip("/"), "BRK-G0A-1001", tmp_path / "board", clock=clock
    )
    assert result.status is EnrollStatus.ENROLLED, result.message
    from listenpost.agent.config import load_agent_config

    cfg = load_agent_config(result.config_path)

    started = clock.time()
    async with aiohttp.ClientSession() as session:
        task = asyncio.create_task(upload_replay(cfg, [rec], 2.0, clock, session=session))
        assert await run_on_virtual_time(clock, task, step=0.05) == 0

    with sqlite3.connect(f"file:{tmp_path / 'collector' / 'collector.sqlite'}?mode=ro", uri=True) as con:
        rows = con.execute("SELECT t_board_ms, t_collector FROM readings ORDER BY t_board_ms").fetchall()
        # Round trips of the clock exchanges, in virtual time: none, unless the clock stepped while a
        # loopback exchange was in flight (a busy machine); the fit's offset is off by at most half of one.
        rtt = con.execute("SELECT max((t4 - t1) - (t3 - t2)) FROM clock_samples").fetchone()[0]
    assert [r[0] for r in rows] == [100_500, 101_250, 101_500, 103_000]
    # The fit's offset: board 101.75 s <-> `started`, within half the longest exchange.
    for t_board_ms, t_collector in rows:
        assert t_collector == pytest.approx(started + (t_board_ms / 1000 - 101.75), abs=0.01 + rtt / 2)
    assert rows[-1][1] <= clock.time()  # nothing lands in the collector's future
