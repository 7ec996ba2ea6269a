"""
The real bleak source against a mocked bluetoothd on a private D-Bus (tests/agent/dbus_bluez.py).

What is real: bleak, dbus-fast, dbus-daemon, and the agent's source with its bus watch. What is
mocked: bluetoothd (python3-dbusmock's bluez5 template), so no radio is involved. The source runs on
the system clock because the bus is real; waits are bounded by `BOUND_S`, a generous limit for
things that take well under a second on an idle machine (nothing asserts a speed). Recovery times
are printed (``pytest -s``) for the record.
"""

from __future__ import annotations

import asyncio
import contextlib
import gc
import random
import time
from collections.abc import AsyncIterator, Callable, Iterator
from typing import Any

import pytest

from listenpost.agent.sources.bleak_scan import BleakSource, ScanState
from listenpost.core.clock import SystemClock
from listenpost.core.records import Advert
from tests.agent.dbus_bluez import MockBluez, require_mock_tools

BOUND_S = 30.0
"""Generous bound on every wait for the source: recovery, delivery."""

ADDR = "C4:7A:10:00:2B:91"
EDDYSTONE = "0000feaa-0000-1000-8000-00805f9b34fb"


@pytest.fixture(autouse=True)
def _collect_bus_leftovers() -> Iterator[None]:
    """
    Collect this test's garbage before the next test starts (autouse: torn down after the event loop).

    A bus that went away mid-write leaves dbus-fast futures holding an error nobody retrieves, in
    reference cycles. Collected at some random later moment, their finalizer logs a traceback, and
    Python 3.11 formats it with `ast.parse`. If that moment falls inside another test's `ast.parse`
    (pytest rewriting a module it imports), the interpreter's one AST depth counter is left off and
    that test fails with "SystemError: AST constructor recursion depth mismatch".
    """
    yield
    gc.collect()


@pytest.fixture
async def bluez(tmp_path, monkeypatch) -> AsyncIterator[MockBluez]:
    """A private system bus with the mocked bluetoothd and adapter hci0; bleak is pointed at it."""
    require_mock_tools()
    mock = MockBluez(tmp_path)
    monkeypatch.setenv("DBUS_SYSTEM_BUS_ADDRESS", mock.address)
    try:
        await mock.start_bus()
        await mock.start_bluez()
        yield mock
    finally:
        await _drop_bleak_manager()
        await mock.close()


async def _drop_bleak_manager() -> None:
    """bleak keeps one bus connection per event loop; close this loop's before the loop goes."""
    from bleak.backends.bluezdbus import manager

    m = manager._global_instances.pop(asyncio.get_running_loop(), None)
    if m is not None and m._bus is not None:
        m._bus.disconnect()
        with contextlib.suppress(Exception):
            await asyncio.wait_for(m._bus.wait_for_disconnect(), 5)
        if m._bus_watcher_task is not None:
            with contextlib.suppress(Exception):
                await asyncio.wait_for(m._bus_watcher_task, 5)


async def wait_until(pred: Callable[[], bool], what: str, bound: float = BOUND_S) -> float:
    """Poll ``pred`` until true; fail naming ``what`` after ``bound`` seconds. Returns the seconds waited."""
    t0 = time.monotonic()
    while not pred():
        if time.monotonic() - t0 > bound:
            pytest.fail(f"{what}: not within {bound:g} s")
        await asyncio.sleep(0.01)
    return time.monotonic() - t0


class Running:
    """The source iterated in a task, adverts collected."""

    def __init__(self, src: BleakSource) -> None:
        self.src = src
        self.got: list[Advert] = []
        self.task: asyncio.Task[None] | None = None

    async def _collect(self) -> None:
        async for a in self.src.adverts():
            self.got.append(a)


@contextlib.asynccontextmanager
async def running(src: BleakSource) -> AsyncIterator[Running]:
    r = Running(src)
    r.task = asyncio.create_task(r._collect())
    try:
        await wait_until(lambda: src.state is ScanState.SCANNING, "scanner started")
        yield r
    finally:
        r.task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await r.task


def source(**kw: Any) -> BleakSource:
    """The agent's source as `open_source` builds it, with short backoffs so a test waits little.

    ``stall_seconds`` is far beyond `BOUND_S`: any recovery seen here is the source's own doing,
    not the stall watchdog's.
    """
    kw = {
        "stall_seconds": 600.0,
        "backoff_initial": 0.05,
        "backoff_max": 0.5,
        "call_timeout": 5.0,
        "rng": random.Random(3),
        **kw,
    }
    return BleakSource("hci0", SystemClock(), **kw)


# ---------------------------------------------------------------- the conversation with BlueZ


async def test_discovery_filter_start_and_stop(bluez):
    """The agent asks BlueZ for LE, every duplicate, no RSSI floor, then starts; stop clears the filter."""
    async with running(source()):
        # BlueZ Adapter1.SetDiscoveryFilter (doc/org.bluez.Adapter.rst): Transport "le";
        # DuplicateData true re-reports every advert; RSSI -127 is the lowest the field takes, so no
        # advert is held back by strength (docs/radio.md §2)
        assert await bluez.method_calls("SetDiscoveryFilter") == [
            [{"Transport": "le", "DuplicateData": True, "RSSI": -127}]
        ]
        assert await bluez.all_calls() == ["SetDiscoveryFilter", "StartDiscovery"]
    assert await bluez.all_calls() == [
        "SetDiscoveryFilter",
        "StartDiscovery",
        "StopDiscovery",
        "SetDiscoveryFilter",
    ]
    assert (await bluez.method_calls("SetDiscoveryFilter"))[-1] == [{}]


async def test_adverts_carry_the_exact_bytes_injected(bluez):
    """One PropertiesChanged per advert becomes one Advert with the address, type, RSSI and data as sent."""
    mfg = {0x004C: bytes.fromhex("0215") + bytes(range(16)) + bytes.fromhex("0007002ac5")}
    sdata = {EDDYSTONE: bytes.fromhex("10f8036c697374656e706f7374")}
    async with running(src := source()) as r:
        pub = await bluez.add_device(ADDR.lower(), address_type="public")
        rnd = await bluez.add_device("5A:11:22:33:44:55")
        await bluez.advert(pub, -61, mfg=mfg, tx_power=-4)
        await bluez.advert(rnd, -77, service_data=sdata)
        await wait_until(lambda: len(r.got) == 2, "two adverts delivered")
        a, b = r.got
        assert (a.address, a.address_type, a.rssi_dbm, a.tx_power_dbm) == (ADDR, 0, -61, -4)
        assert a.manufacturer_data == mfg and a.service_data == {}
        assert (b.address, b.address_type, b.rssi_dbm) == ("5A:11:22:33:44:55", 1, -77)
        assert b.service_data == sdata and b.manufacturer_data == {}
        # the two InterfacesAdded carried no RSSI: bleak calls back with -127, the source drops them
        assert (src.callbacks, src.adverts_seen, src.dropped_no_rssi) == (4, 2, 2)
        assert src.stats()["bus_watch"] == "connected" and src.stats()["episodes"] == []


async def test_many_devices_at_a_steady_rate_lose_nothing(bluez):
    """60 devices, 20 adverts each, paced: every advert injected comes out once, in order per device."""
    n_dev, per_dev = 60, 20
    async with running(src := source()) as r:
        paths = [await bluez.add_device(f"D0:00:00:00:{i >> 8:02X}:{i & 0xFF:02X}") for i in range(n_dev)]
        t0 = time.monotonic()
        for k in range(per_dev):
            for i, p in enumerate(paths):
                await bluez.advert(p, -40 - (k + i) % 50, mfg={0xFFFF: bytes([i, k]) + b"lp"})
            await asyncio.sleep(0.005)  # a steady rate, not one burst
        sent_s = time.monotonic() - t0
        await wait_until(lambda: len(r.got) == n_dev * per_dev, "all adverts delivered")
        await asyncio.sleep(0.1)  # nothing extra trails in
        assert len(r.got) == n_dev * per_dev
        for i in range(n_dev):
            mine = [a for a in r.got if a.address == f"D0:00:00:00:{i >> 8:02X}:{i & 0xFF:02X}"]
            assert [a.manufacturer_data[0xFFFF] for a in mine] == [
                bytes([i, k]) + b"lp" for k in range(per_dev)
            ]
            assert [a.rssi_dbm for a in mine] == [-40 - (k + i) % 50 for k in range(per_dev)]
        assert src.adverts_seen == n_dev * per_dev and src.callbacks == n_dev * (per_dev + 1)
        assert src.dropped_overflow == 0 and src.dropped_no_rssi == n_dev
    print(f"\n{n_dev * per_dev} adverts over {sent_s:.2f} s ({n_dev * per_dev / sent_s:.0f}/s): none lost")


async def test_passive_mode_registers_a_monitor_instead_of_discovering(bluez):
    """Passive: RegisterMonitor on AdvertisementMonitorManager1, no discovery; adverts still arrive."""
    await bluez.add_monitor_manager()
    pattern = (0, 0xFF, b"\x4c\x00")  # manufacturer data starting with Apple's company ID
    async with running(src := source(passive_patterns=[pattern])) as r:
        calls = await bluez.all_calls()
        assert calls == ["RegisterMonitor"]
        ((monitor_path,),) = await bluez.method_calls("RegisterMonitor")
        assert monitor_path.startswith("/org/bleak/")
        dev = await bluez.add_device(ADDR)
        await bluez.advert(dev, -70, mfg={0x004C: b"\x02\x15"})
        await wait_until(lambda: len(r.got) == 1, "advert delivered in passive mode")
        assert r.got[0].manufacturer_data == {0x004C: b"\x02\x15"}
        # another client's discovery ending is none of a passive scan's business; the wait can
        # only let a slow machine miss a wrong rebuild, never invent one
        await bluez.set_discovering(False)
        await asyncio.sleep(0.5)
        assert src.restarts == 0 and src.stats()["episodes"] == []
    assert await bluez.all_calls() == ["RegisterMonitor", "UnregisterMonitor"]


# ---------------------------------------------------------------- faults and recovery


async def _hear_again(bluez: MockBluez, r: Running, what: str, dev: str | None = None) -> float:
    """Advertise every 5 ms (from ``dev``, or a re-announced device) until the source yields one; seconds waited."""
    before = len(r.got)
    dev = dev or await bluez.add_device(ADDR)
    t0 = time.monotonic()
    rssi = -50
    while len(r.got) == before:
        if time.monotonic() - t0 > BOUND_S:
            pytest.fail(f"{what}: no advert heard again within {BOUND_S:g} s (state {r.src.state.value})")
        await bluez.advert(dev, rssi, mfg={0xFFFF: b"again"})
        rssi = -50 if rssi < -90 else rssi - 1
        await asyncio.sleep(0.005)
    assert r.got[-1].manufacturer_data == {0xFFFF: b"again"}
    return time.monotonic() - t0


async def _heard_before(bluez: MockBluez, r: Running) -> str:
    dev = await bluez.add_device(ADDR)
    await bluez.advert(dev, -60, mfg={0xFFFF: b"before"})
    await wait_until(lambda: len(r.got) == 1, "advert before the fault")
    return dev


def _closed_episode(src: BleakSource, reason: str) -> dict[str, Any]:
    eps = src.stats()["episodes"]
    assert [e["reason"] for e in eps] == [reason], eps
    (ep,) = eps
    assert ep["open"] is False and ep["duration_s"] > 0 and ep["rebuilds"] >= 1, ep
    assert src.state is ScanState.SCANNING and src.stats()["episodes_total"] == 1
    return ep


async def test_bluetoothd_killed_and_restarted(bluez):
    """bluetoothd crashes mid-scan and comes back: the source starts discovery on the new one by itself."""
    async with running(src := source()) as r:
        await _heard_before(bluez, r)
        bluez.kill_bluez()
        await wait_until(lambda: src.state is not ScanState.SCANNING, "the source noticed bluetoothd leave")
        await bluez.start_bluez()  # owns org.bluez again, adapter hci0 added
        took = await _hear_again(bluez, r, "after bluetoothd restarted")
        # bleak alone never sends StartDiscovery to the new bluetoothd: the rebuild must have
        assert (await bluez.all_calls())[:2] == ["SetDiscoveryFilter", "StartDiscovery"]
        ep = _closed_episode(src, "bluez_gone")
        assert ep["heard_after_return_s"] is not None
    print(f"\nbluetoothd restart: first advert {took:.3f} s after it was back; episode {ep}")


async def test_adapter_removed_and_added_again(bluez):
    """The adapter object goes (with its devices) and comes back: scanning resumes on it."""
    async with running(src := source()) as r:
        await _heard_before(bluez, r)
        await bluez.remove_adapter()
        await wait_until(lambda: src.state is not ScanState.SCANNING, "the source noticed the adapter go")
        await wait_until(lambda: src.state is ScanState.UNAVAILABLE, "no adapter: starts fail")
        assert src.reason.value == "adapter_missing"
        await bluez.add_adapter()
        took = await _hear_again(bluez, r, "after the adapter came back")
        assert (await bluez.all_calls())[:2] == ["SetDiscoveryFilter", "StartDiscovery"]
        ep = _closed_episode(src, "adapter_removed")
    print(f"\nadapter re-added: first advert {took:.3f} s after it was back; episode {ep}")


async def test_discovering_dropped_behind_its_back(bluez):
    """Discovering goes false while the source holds a session: it stops and starts discovery again."""
    async with running(src := source()) as r:
        dev = await _heard_before(bluez, r)
        t0 = time.monotonic()
        await bluez.set_discovering(False)
        await wait_until(lambda: len(src.stats()["episodes"]) == 1, "the source noticed")
        took = await _hear_again(bluez, r, "after Discovering dropped", dev)
        took_total = time.monotonic() - t0
        calls = await bluez.all_calls()
        assert calls[:2] == ["SetDiscoveryFilter", "StartDiscovery"]
        assert calls[2:].count("StartDiscovery") == 1 and "StopDiscovery" in calls[2:], calls
        assert (await bluez.method_calls("SetDiscoveryFilter"))[-1] == [
            {"Transport": "le", "DuplicateData": True, "RSSI": -127}
        ]
        _closed_episode(src, "discovery_stopped")
    print(f"\nDiscovering dropped: heard again {took_total:.3f} s after the drop ({took:.3f} s of injecting)")


async def test_own_stop_is_not_mistaken_for_a_drop(bluez):
    """A scanner rebuilt for a dropped Discovering sees its own StopDiscovery's signal: no second rebuild."""
    async with running(src := source()) as r:
        dev = await _heard_before(bluez, r)
        await bluez.set_discovering(False)
        await _hear_again(bluez, r, "after Discovering dropped", dev)
        await asyncio.sleep(0.5)  # let any late signal and its check run
        assert src.restarts == 1 and (await bluez.all_calls()).count("StartDiscovery") == 2


async def test_dbus_daemon_lost_and_restarted(bluez):
    """The system bus dies (bluetoothd with it) and comes back at the same address: scanning resumes."""
    async with running(src := source()) as r:
        await _heard_before(bluez, r)
        bluez.kill_bus()
        await wait_until(lambda: src.state is not ScanState.SCANNING, "the source noticed the bus go")
        await bluez.start_bus()
        await bluez.start_bluez()
        took = await _hear_again(bluez, r, "after the bus came back")
        assert (await bluez.all_calls())[:2] == ["SetDiscoveryFilter", "StartDiscovery"]
        ep = _closed_episode(src, "bus_lost")
        assert src.stats()["bus_watch"] == "connected"
    print(f"\nD-Bus restart: first advert {took:.3f} s after bus and bluetoothd were back; episode {ep}")


@pytest.mark.parametrize("missing", ["bluetoothd", "bus"])
async def test_started_before_the_stack_it_goes_as_soon_as_the_stack_is_there(bluez, missing):
    """A board booting before bluetoothd (or the bus): the first start fails, the backoff is long
    (30-60 s, past `BOUND_S`), yet the source scans as soon as the stack appears."""
    bluez.kill_bluez() if missing == "bluetoothd" else bluez.kill_bus()
    src = source(backoff_initial=60.0, backoff_max=60.0)
    r = Running(src)
    task = asyncio.create_task(r._collect())
    try:
        await wait_until(lambda: src.state is ScanState.UNAVAILABLE, "the first start failed")
        if missing == "bus":
            await bluez.start_bus()
        await bluez.start_bluez()
        took = await _hear_again(bluez, r, f"after {missing} appeared")
        _closed_episode(src, "bluez_down" if missing == "bluetoothd" else "no_bluetooth")
    finally:
        task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await task
    print(f"\n{missing} late: first advert {took:.3f} s after it was there")


# ---------------------------------------------------------------- the whole agent


async def test_agent_run_reports_the_restart_in_its_heartbeat_and_keeps_uploading(
    bluez, aiohttp_server, tmp_path
):
    """`agent run` on the mocked BlueZ: readings before and after a bluetoothd crash reach the collector,
    and a heartbeat says the radio stack restarted and recovered (reason and duration)."""
    import aiohttp

    from listenpost.agent.service import AgentService, run_agent
    from tests.agent.test_service import UUID, Collector, board_config, tag

    clock = SystemClock()
    collector = Collector(clock)
    server = await aiohttp_server(collector.app())
    cfg = board_config(
        tmp_path,
        str(server.make_url("")).rstrip("/"),
        tags=[7],
        source={"kind": "bleak", "adapter": "hci0", "stall_seconds": 600.0},
        spool={"flush_seconds": 0.2},
        heartbeat={"period_seconds": 0.2},
    )
    ibeacon = b"\x02\x15" + UUID + (7).to_bytes(2, "big") + (7).to_bytes(2, "big") + b"\xc5"
    services: list[AgentService] = []

    def radio() -> dict[str, Any]:
        return services[0].stats()["source"]["radio"] if services and services[0].source else {}

    def readings(since_s: float = 0.0) -> int:
        """Readings of the tag stored by the collector, taken at or after board time ``since_s``."""
        return sum(
            n for (t, t_ms, _), n in collector.readings.items() if t == tag(7) and t_ms >= since_s * 1000
        )

    async def advertise_until(done: Callable[[], bool], what: str) -> None:
        dev = await bluez.add_device(ADDR)
        t0 = time.monotonic()
        while not done():
            if time.monotonic() - t0 > BOUND_S:
                pytest.fail(f"{what}: not within {BOUND_S:g} s")
            await bluez.advert(dev, -60, mfg={0x004C: ibeacon})
            await asyncio.sleep(0.02)

    async with aiohttp.ClientSession() as session:
        task = asyncio.create_task(run_agent(cfg, clock=clock, session=session, on_start=services.append))
        try:
            await wait_until(lambda: radio().get("state") == "scanning", "agent scanning")
            await advertise_until(lambda: readings() > 0, "a reading stored before the crash")
            bluez.kill_bluez()
            await wait_until(lambda: radio().get("state") != "scanning", "agent noticed bluetoothd leave")
            await bluez.start_bluez()
            back = clock.monotonic()
            await advertise_until(lambda: readings(since_s=back) > 0, "a reading stored after the restart")

            def reported() -> list[dict[str, Any]]:
                return [
                    e
                    for h in collector.heartbeats
                    for e in ((h["stats"]["source"]["radio"] or {}).get("episodes") or [])
                    if not e["open"]
                ]

            await wait_until(lambda: bool(reported()), "a heartbeat with the closed episode")
            (ep,) = {e["started_s"]: e for e in reported()}.values()
            assert ep["reason"] == "bluez_gone" and ep["duration_s"] > 0
            assert ep["heard_after_return_s"] is not None and ep["heard_after_return_s"] >= 0
            assert (await bluez.all_calls())[:2] == ["SetDiscoveryFilter", "StartDiscovery"]
        finally:
            if services:
                services[0].request_stop()
            assert await asyncio.wait_for(task, BOUND_S) == 0
    print(f"\nagent run: bluetoothd restart reported in a heartbeat: {ep}")
