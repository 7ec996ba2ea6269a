"""Heartbeats on virtual time against a loopback collector; board figures from a fake /sys and /proc tree."""

from __future__ import annotations

import asyncio
import json
from pathlib import Path

import aiohttp
import pytest
from aiohttp import web

from listenpost import __version__
from listenpost.agent.boardinfo import (
    bluetooth_adapters,
    board_info,
    cpu_temperature_c,
    device_model,
    fingerprint,
    uptime_s,
)
from listenpost.agent.client.heartbeat import BeatResult, Heartbeat
from listenpost.agent.client.remote_config import ConfigCache, ConfigFetcher
from listenpost.agent.client.uplink import ExchangeLog
from listenpost.core.clock import VirtualClock

TOKEN = "tok-g0-a-0123456789abcdef"
CONFIG = {
    "board": "g0-a",
    "tags": ["mac:C4:7A:10:00:2B:91"],
    "rules": [],
    "offset_db": 1.5,
    "flush_seconds": 5,
    "heartbeat_seconds": 10,
}


class HeartbeatServer:
    def __init__(self, clock: VirtualClock) -> None:
        self.clock = clock
        self.beats: list[dict] = []
        self.config_etag = '"c2"'
        self.config_gets = 0
        self.fail_next = 0

    def app(self) -> web.Application:
        app = web.Application()
        app.router.add_post("/v1/heartbeat", self.beat)
        app.router.add_get("/v1/config", self.config)
        return app

    async def beat(self, request: web.Request) -> web.Response:
        t2 = self.clock.time()
        assert request.headers["Authorization"] == f"Bearer {TOKEN}"
        self.beats.append(await request.json())
        if self.fail_next:
            self.fail_next -= 1
            return web.json_response({"error": {"code": "unavailable"}}, status=503)
        return web.json_response({"t2": t2, "t3": t2 + 0.001, "config_etag": self.config_etag})

    async def config(self, request: web.Request) -> web.Response:
        self.config_gets += 1
        if request.headers.get("If-None-Match") == self.config_etag:
            return web.Response(status=304)
        return web.json_response(CONFIG, headers={"ETag": self.config_etag})


async def test_periodic_beats_carry_stats_and_exchanges_and_fetch_a_changed_config(aiohttp_server, tmp_path):
    clock = VirtualClock()
    hs = HeartbeatServer(clock)
    server = await aiohttp_server(hs.app())
    url = str(server.make_url(""))
    seen: list = []
    async with aiohttp.ClientSession() as session:
        fetcher = ConfigFetcher(
            base_url=url, token=TOKEN, board="g0-a", cache=ConfigCache(tmp_path), session=session
        )
        hb = Heartbeat(
            base_url=url,
            token=TOKEN,
            board="g0-a",
            clock=clock,
            session=session,
            stats_fn=lambda: {"adverts_seen": 120, "spool": {"batches": 3}},
            exchanges=ExchangeLog(),
            period_s=10.0,
            config=fetcher,
            on_config=seen.append,
            state_dir=tmp_path,
            board_info_fn=lambda: {"cpu_temperature_c": 48.5, "disk_free_bytes": 10},
        )
        hs.fail_next = 0
        task = asyncio.create_task(hb.run())
        for _ in range(4):
            await asyncio.wait_for(hb.wait_parked(), 10)
            await clock.advance(hb.parked_until - clock.monotonic())
        await asyncio.wait_for(hb.wait_parked(), 10)
        task.cancel()
        await asyncio.gather(task, return_exceptions=True)
    assert len(hs.beats) == 5
    t1s = [b["t1"] for b in hs.beats]
    assert [round(b - a, 6) for a, b in zip(t1s, t1s[1:], strict=False)] == [10.0] * 4
    first, second = hs.beats[0], hs.beats[1]
    assert first["board"] == "g0-a" and first["boot"] == clock.boot_id and first["clock"] is None
    assert first["wall"] == pytest.approx(1_800_000_000.0 + (t1s[0] - 1000.0))
    assert first["stats"]["adverts_seen"] == 120 and first["stats"]["spool"] == {"batches": 3}
    assert first["stats"]["cpu_temperature_c"] == 48.5 and first["stats"]["version"] == __version__
    assert second["clock"]["t1"] == t1s[0] and second["clock"]["t2"] == pytest.approx(first["wall"])
    # The collector's ETag differed from ours (none cached): one fetch, one update, then 304-free quiet.
    assert hs.config_gets == 1 and len(seen) == 1 and seen[0].offset_db == 1.5
    assert second["stats"]["config_etag"] == '"c2"'
    assert hb.ok == 5 and hb.failed == 0


async def test_a_failed_beat_is_counted_and_the_next_one_goes_out(aiohttp_server, tmp_path):
    clock = VirtualClock()
    hs = HeartbeatServer(clock)
    hs.fail_next = 1
    server = await aiohttp_server(hs.app())
    async with aiohttp.ClientSession() as session:
        hb = Heartbeat(
            base_url=str(server.make_url("")),
            token=TOKEN,
            board="g0-a",
            clock=clock,
            session=session,
            stats_fn=dict,
            exchanges=ExchangeLog(),
            state_dir=tmp_path,
        )
        assert await hb.beat() is BeatResult.FAILED
        assert await hb.beat() is BeatResult.OK
        assert (hb.failed, hb.ok) == (1, 1) and hb.last_error is None
        # Real board figures are in the body (None where this machine does not expose them).
        for key in ("cpu_temperature_c", "disk_free_bytes", "uptime_s", "agent_uptime_s"):
            assert key in hs.beats[-1]["stats"]
        assert hs.beats[-1]["stats"]["disk_free_bytes"] > 0


# ------------------------------------------------------------------------------ boardinfo


def _tree(root: Path, files: dict[str, str]) -> Path:
    for rel, text in files.items():
        p = root / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text(text)
    return root


def test_cpu_temperature_prefers_the_cpu_zone_and_reads_millidegrees(tmp_path):
    """Linux thermal sysfs reports millidegrees Celsius (kernel thermal sysfs ABI; common practice)."""
    root = _tree(
        tmp_path,
        {
            "sys/class/thermal/thermal_zone0/type": "acpitz\n",
            "sys/class/thermal/thermal_zone0/temp": "61000\n",
            "sys/class/thermal/thermal_zone1/type": "cpu-thermal\n",
            "sys/class/thermal/thermal_zone1/temp": "48312\n",
            "sys/class/thermal/thermal_zone2/type": "bogus\n",
            "sys/class/thermal/thermal_zone2/temp": "-273000\n",
        },
    )
    assert cpu_temperature_c(root) == pytest.approx(48.312)
    assert cpu_temperature_c(tmp_path / "nothing-here") is None


def test_uptime_model_adapters_and_missing_figures(tmp_path):
    root = _tree(
        tmp_path,
        {
            "proc/uptime": "3600.52 7000.10\n",
            "proc/device-tree/model": "Demo Board Rev 1.2\0",
            "sys/class/bluetooth/hci0/address": "c4:7a:10:00:2b:91\n",
            "sys/class/bluetooth/hci1/type": "Primary\n",
            "etc/machine-id": "abc123\n",
        },
    )
    (tmp_path / "sys/class/bluetooth/hci0:64").mkdir()  # a connection entry, not an adapter
    assert uptime_s(root) == 3600.52
    assert device_model(root) == "Demo Board Rev 1.2"
    assert bluetooth_adapters(root) == {"hci0": "C4:7A:10:00:2B:91", "hci1": None}
    fp = fingerprint(root)
    assert fp["machine_id"] == "abc123" and fp["model"] == "Demo Board Rev 1.2"
    info = board_info(tmp_path, root=tmp_path / "empty")
    assert info.cpu_temperature_c is None and info.uptime_s is None and info.disk_free_bytes > 0
    json.dumps(info.as_dict())
