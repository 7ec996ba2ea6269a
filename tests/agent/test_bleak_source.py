"""The supervised bleak source, driven by a fake scanner backend (the radio edge) on a virtual clock."""

from __future__ import annotations

import asyncio
import contextlib
import random

import pytest
from bleak.backends.device import BLEDevice
from bleak.backends.scanner import AdvertisementData, BaseBleakScanner
from bleak.exc import (
    BleakBluetoothNotAvailableError,
    BleakBluetoothNotAvailableReason,
    BleakDBusError,
    BleakError,
)

from listenpost.agent.sources.bleak_scan import EPISODES_KEPT, BleakSource, Cause, ScanState, classify
from listenpost.core.clock import VirtualClock, settle
from listenpost.core.errors import SourceReason, SourceUnavailable


class FakeScanner(BaseBleakScanner):
    """A bleak backend the test drives: start() follows a script, emit() plays an advertisement."""

    clock: VirtualClock
    instances: list[FakeScanner]
    script: list[BaseException | str | None]  # per start(): raise it, "hang", or succeed
    start_times: list[float]

    def __init__(self, detection_callback, service_uuids, scanning_mode="active", *, bluez, cb, **kwargs):
        super().__init__(detection_callback, service_uuids)
        self.bluez = bluez
        self.started = self.stopped = False
        type(self).instances.append(self)

    async def start(self) -> None:
        cls = type(self)
        cls.start_times.append(cls.clock.monotonic())
        step = cls.script.pop(0) if cls.script else None
        if step == "hang":
            await asyncio.Event().wait()
        if isinstance(step, BaseException):
            raise step
        self.started = True

    async def stop(self) -> None:
        self.stopped = True

    def emit(
        self, address: str, rssi: int, *, public: bool = False, mfg: dict[int, bytes] | None = None
    ) -> None:
        props = {"Address": address, "AddressType": "public" if public else "random", "RSSI": rssi}
        self.call_detection_callbacks(
            BLEDevice(address, None, {"path": "/org/bluez/hci0/dev_x", "props": props}),
            AdvertisementData(None, mfg or {}, {}, [], None, rssi, ("/org/bluez/hci0/dev_x", props)),
        )


@pytest.fixture
def fake(clock):
    """A fresh FakeScanner subclass per test, so class-level state does not leak."""
    return type("Fake", (FakeScanner,), {"clock": clock, "instances": [], "script": [], "start_times": []})


async def _collect(src: BleakSource, into: list) -> None:
    async for a in src.adverts():
        into.append(a)


@contextlib.asynccontextmanager
async def running(src: BleakSource):
    got: list = []
    task = asyncio.create_task(_collect(src, got))
    await settle()
    try:
        yield got, task
    finally:
        task.cancel()
        with contextlib.suppress(asyncio.CancelledError, SourceUnavailable):
            await task


async def test_adverts_flow_with_the_recommended_filter(clock, fake):
    """Callbacks become Adverts stamped on the clock; BlueZ gets DuplicateData=True and RSSI -127 (docs/radio.md §2)."""
    src = BleakSource("hci0", clock, 30, backend=fake)
    async with running(src) as (got, _):
        (sc,) = fake.instances
        assert sc.bluez == {"adapter": "hci0", "filters": {"RSSI": -127, "DuplicateData": True}}
        assert src.state is ScanState.SCANNING
        sc.emit("c4:7a:10:00:2b:91", -67, mfg={0x004C: b"\x02\x15"})
        await clock.advance(0.5)
        sc.emit("C4:7A:10:00:2B:92", -70, public=True)
        sc.emit("C4:7A:10:00:2B:93", -127)  # "no RSSI property", not a measurement
        await settle()
        assert [(a.address, a.address_type, a.rssi_dbm, a.t_mono_ns) for a in got] == [
            ("C4:7A:10:00:2B:91", 1, -67, 1000 * 10**9),
            ("C4:7A:10:00:2B:92", 0, -70, 1000_500_000_000),
        ]
        assert got[0].manufacturer_data == {0x004C: b"\x02\x15"}
        assert (src.callbacks, src.adverts_seen, src.dropped_no_rssi) == (3, 2, 1)
    assert sc.stopped  # cancelling the consumer stops the scanner


async def test_default_adapter_is_not_pinned(clock, fake):
    """No adapter configured: bleak picks (no 'adapter' key sent)."""
    async with running(BleakSource(None, clock, 30, backend=fake)):
        assert "adapter" not in fake.instances[0].bluez


async def test_stall_rebuilds_the_scanner(clock, fake):
    """No advert for stall_seconds: the scanner is stopped and a new one started; adverts keep it alive."""
    src = BleakSource("hci0", clock, 10, backend=fake)
    async with running(src) as (got, _):
        await clock.advance(5)
        fake.instances[0].emit("C4:7A:10:00:2B:91", -60)
        fake.instances[0].emit("C4:7A:10:00:2B:91", -127)  # does not count as life
        await clock.advance(9.9)
        assert len(fake.instances) == 1 and src.restarts == 0
        await clock.advance(0.1)  # 10 s after the last real advert
        assert len(fake.instances) == 2
        assert fake.instances[0].stopped and fake.instances[1].started
        assert src.restarts == 1 and src.state is ScanState.SCANNING and src.reason is None
        assert src.last_restart_reason is SourceReason.STALLED
        fake.instances[1].emit("C4:7A:10:00:2B:91", -61)
        await settle()
        assert [a.rssi_dbm for a in got] == [-60, -61]
        await clock.advance(10)
        assert len(fake.instances) == 3 and src.restarts == 2


@pytest.mark.parametrize(
    ("error", "reason"),
    [
        (FileNotFoundError(2, "No such file or directory"), SourceReason.NO_BLUETOOTH),
        (PermissionError(13, "Permission denied"), SourceReason.DENIED),
        (
            BleakDBusError(
                "org.freedesktop.DBus.Error.ServiceUnknown", ["The name org.bluez was not provided"]
            ),
            SourceReason.BLUEZ_DOWN,
        ),
        (BleakDBusError("org.freedesktop.DBus.Error.AccessDenied", []), SourceReason.DENIED),
        (  # bluetoothd back before its adapter object (bleak's cache still lists the old one)
            BleakDBusError(
                "org.freedesktop.DBus.Error.UnknownObject",
                [
                    'Method "SetDiscoveryFilter" with signature "a{sv}" on interface "org.bluez.Adapter1" doesn\'t exist'
                ],
            ),
            SourceReason.ADAPTER_MISSING,
        ),
        (BleakDBusError("org.bluez.Error.NotReady", ["Resource Not Ready"]), SourceReason.POWERED_OFF),
        (
            BleakBluetoothNotAvailableError(
                "No Bluetooth adapters found.", BleakBluetoothNotAvailableReason.NO_BLUETOOTH
            ),
            SourceReason.NO_BLUETOOTH,
        ),
        (
            BleakBluetoothNotAvailableError(
                "No powered Bluetooth adapters found.", BleakBluetoothNotAvailableReason.POWERED_OFF
            ),
            SourceReason.POWERED_OFF,
        ),
        (
            BleakBluetoothNotAvailableError("denied", BleakBluetoothNotAvailableReason.DENIED_BY_SYSTEM),
            SourceReason.DENIED,
        ),
        (BleakError("adapter 'hci1' not found"), SourceReason.ADAPTER_MISSING),
        (BleakError("passive scanning mode requires bluez or_patterns"), SourceReason.OTHER),
    ],
)
def test_classify(error, reason):
    """What start() raises (docs/radio.md §3 table) maps to a SourceReason, keeping the original text."""
    e = classify(error)
    assert e.reason is reason
    assert str(error.args[0] if not isinstance(error, OSError) else error.strerror) in str(e)


@pytest.mark.parametrize(
    ("error", "reason"),
    [
        (FileNotFoundError(2, "No such file or directory"), SourceReason.NO_BLUETOOTH),
        (BleakDBusError("org.freedesktop.DBus.Error.ServiceUnknown", []), SourceReason.BLUEZ_DOWN),
        (
            BleakBluetoothNotAvailableError(
                "No powered Bluetooth adapters found.", BleakBluetoothNotAvailableReason.POWERED_OFF
            ),
            SourceReason.POWERED_OFF,
        ),
    ],
)
async def test_start_failure_backs_off_then_recovers(clock, fake, error, reason):
    """A failing start sets the reason, retries on a capped jittered backoff, and recovers when start works."""
    fake.script = [error] * 7
    src = BleakSource(
        "hci0", clock, 1000, backend=fake, backoff_initial=1, backoff_max=8, rng=random.Random(7)
    )
    async with running(src):
        assert src.state is ScanState.UNAVAILABLE and src.reason is reason
        await clock.advance(200)
        assert len(fake.start_times) == 8 and src.state is ScanState.SCANNING and src.reason is None
        assert src.last_restart_reason is reason
    gaps = [b - a for a, b in zip(fake.start_times, fake.start_times[1:], strict=False)][:7]
    for k, gap in enumerate(gaps, start=1):
        cap = min(8, 2 ** (k - 1))
        assert 0.5 * cap - 1e-9 <= gap <= cap + 1e-9, (k, gap)
    assert max(gaps) <= 8 and src.failures == 7
    assert all(s.stopped for s in fake.instances[:7])  # each failed scanner is cleaned up


async def test_gives_up_after_max_failures(clock, fake):
    """With max_failures, the iterator raises the classified SourceUnavailable."""
    fake.script = [FileNotFoundError(2, "No such file or directory")]
    src = BleakSource(None, clock, 30, backend=fake, max_failures=1)
    with pytest.raises(SourceUnavailable, match="no system D-Bus") as e:
        async for _ in src.adverts():
            pass
    assert e.value.reason is SourceReason.NO_BLUETOOTH


async def test_hanging_start_times_out_on_the_clock(clock, fake):
    """A start() that never returns is abandoned after call_timeout of clock time and retried."""
    fake.script = ["hang"]
    src = BleakSource(
        "hci0",
        clock,
        30,
        backend=fake,
        call_timeout=5,
        backoff_initial=1,
        backoff_max=1,
        rng=random.Random(1),
    )
    async with running(src):
        await clock.advance(4.9)
        assert src.state is ScanState.STARTING
        await clock.advance(0.1)
        assert src.state is ScanState.UNAVAILABLE and src.reason is SourceReason.BLUEZ_DOWN
        assert "did not finish within 5 s" in (src.last_error or "")
        await clock.advance(1)
        assert src.state is ScanState.SCANNING and len(fake.start_times) == 2


async def test_queue_overflow_is_counted(clock, fake):
    """A consumer that falls behind by queue_size loses the excess, counted."""
    src = BleakSource("hci0", clock, 30, backend=fake, queue_size=3)
    async with running(src) as (got, _):
        for i in range(5):
            fake.instances[0].emit(f"C4:7A:10:00:2B:{i:02X}", -60)
        assert src.dropped_overflow == 2
        await settle()
        assert [a.address[-2:] for a in got] == ["00", "01", "02"]
        assert src.stats()["dropped_overflow"] == 2


async def test_effective_rate_per_address(clock, fake):
    """Adverts per second per address over the last complete window."""
    src = BleakSource("hci0", clock, 30, backend=fake, rate_window_seconds=10)
    async with running(src):
        sc = fake.instances[0]
        for _ in range(40):  # 2 Hz for A, 0.5 Hz for B, 20 s
            sc.emit("AA:AA:AA:AA:AA:AA", -60)
            if _ % 4 == 0:
                sc.emit("BB:BB:BB:BB:BB:BB", -70)
            await clock.advance(0.5)
        assert src.effective_rates() == {"AA:AA:AA:AA:AA:AA": 2.0, "BB:BB:BB:BB:BB:BB": 0.5}
        await clock.advance(20)  # silence: nothing in the last complete window
        assert src.effective_rates() == {}


async def test_one_consumer_at_a_time(clock, fake):
    """A second concurrent iteration is refused (one queue, one scanner)."""
    src = BleakSource("hci0", clock, 30, backend=fake)
    async with running(src):
        with pytest.raises(RuntimeError, match="already"):
            await src.adverts().__anext__()


async def test_trouble_rebuilds_at_once_and_a_return_cuts_the_backoff_short(clock, fake):
    """What the bus watch reports drives the supervisor; the episode records each step on the clock."""
    src = BleakSource(
        "hci0", clock, 1000, backend=fake, backoff_initial=4, backoff_max=60, rng=random.Random(5)
    )
    async with running(src) as (got, _):
        fake.instances[0].emit("C4:7A:10:00:2B:91", -60)
        await clock.advance(10)
        gone = BleakDBusError("org.freedesktop.DBus.Error.ServiceUnknown", ["no org.bluez"])
        fake.script = [gone]
        src.trouble(Cause.BLUEZ_GONE)  # at t=1010: no waiting out stall_seconds
        await settle()
        assert fake.instances[0].stopped and len(fake.start_times) == 2
        assert src.state is ScanState.UNAVAILABLE and src.reason is SourceReason.BLUEZ_DOWN
        await clock.advance(1)  # the backoff is 2..4 s; BlueZ returns after 1
        src.returned("bluez")
        await settle()
        assert fake.start_times[-1] == 1011 and src.state is ScanState.SCANNING
        (ep,) = src.stats()["episodes"]
        assert ep["open"] and ep["reason"] == "bluez_gone"
        await clock.advance(0.5)
        fake.instances[-1].emit("C4:7A:10:00:2B:91", -61)
        assert src.stats()["episodes"] == [
            {
                "reason": "bluez_gone",
                "started_s": 1010.0,
                "open": False,
                "duration_s": 1.5,
                "rebuilds": 2,
                "scanning_after_s": 1.0,
                "heard_after_return_s": 0.5,
            }
        ]
        assert src.stats()["episodes_total"] == 1 and src.stats()["bus_watch"] == "off"


async def test_adverts_while_rebuilding_do_not_close_the_episode(clock, fake):
    """A callback from a device orphaned by a removed adapter is no proof the scanner hears again."""
    fake.script = [None, BleakError("adapter 'hci0' not found")]
    src = BleakSource(
        "hci0", clock, 1000, backend=fake, backoff_initial=1, backoff_max=1, rng=random.Random(1)
    )
    async with running(src) as (got, _):
        src.trouble(Cause.ADAPTER_REMOVED)
        await settle()
        fake.instances[0].emit("C4:7A:10:00:2B:91", -60)  # the old scanner's orphan fires
        await settle()
        assert len(got) == 1 and src.stats()["episodes"][0]["open"]  # delivered, but not a recovery
        assert src.reason is SourceReason.ADAPTER_MISSING
        await clock.advance(1)
        assert src.state is ScanState.SCANNING and src.stats()["episodes"][0]["open"]
        fake.instances[-1].emit("C4:7A:10:00:2B:91", -60)
        assert not src.stats()["episodes"][0]["open"]


async def test_episodes_kept_are_bounded(clock, fake):
    """The heartbeat carries the newest episodes only; the total counts them all."""
    src = BleakSource("hci0", clock, 10, backend=fake)
    async with running(src):
        for _ in range(EPISODES_KEPT + 3):
            await clock.advance(10)  # a stall: an episode
            fake.instances[-1].emit("C4:7A:10:00:2B:91", -60)  # heard again: closed
        stats = src.stats()
        assert stats["episodes_total"] == EPISODES_KEPT + 3 and len(stats["episodes"]) == EPISODES_KEPT
        assert {e["reason"] for e in stats["episodes"]} == {"stalled"}
        assert not any(e["open"] for e in stats["episodes"])


async def test_an_advert_heard_while_start_returns_ends_the_episode(clock, fake):
    """bleak registers the callback before StartDiscovery returns: the first advert then is the recovery."""

    class Eager(fake):
        async def start(self) -> None:
            await super().start()
            if len(type(self).instances) > 1:
                self.emit("C4:7A:10:00:2B:91", -60)  # delivered before start() has returned

    src = BleakSource("hci0", clock, 1000, backend=Eager)
    async with running(src):
        src.trouble(Cause.DISCOVERY_STOPPED)
        await settle()
        assert len(Eager.instances) == 2 and src.state is ScanState.SCANNING
        (ep,) = src.stats()["episodes"]
        assert ep["reason"] == "discovery_stopped" and not ep["open"] and ep["duration_s"] == 0
