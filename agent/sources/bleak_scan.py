"""
Live scanning through bleak (BlueZ over D-Bus on the boards), supervised.

bleak delivers callbacks, not packets, and fails silently (docs/radio.md §2, §5): when bluetoothd or
the bus goes away, callbacks just stop. So this source

* builds one ``BleakScanner`` per attempt with ``bluez={"adapter": …, "filters": {"RSSI": -127,
  "DuplicateData": True}}`` — the only filter that makes BlueZ re-report every advertisement
  and RSSI (DuplicateData=False is BlueZ's default and suppresses repeats);
* watches for a stall (no advert for ``stall_seconds``) and rebuilds the scanner;
* on errors, classifies them into `SourceUnavailable` reasons, waits a capped, jittered backoff
  and tries again;
* moves adverts from the callback to the consumer through a bounded queue, counting overflow;
* counts what it could not use: RSSI -127 is bleak's stand-in for "no RSSI property", not a
  measurement, so those callbacks are dropped and counted;
* watches the bus itself (`BusWatch`, one dbus-fast connection of its own): bleak does not notice
  bluetoothd leaving and returning (it never sends ``StartDiscovery`` again), an adapter being removed,
  or ``Discovering`` going false behind its back. Each of those, and the bus dropping, rebuilds the
  scanner at once instead of after ``stall_seconds`` of silence, and BlueZ, the adapter or the bus
  coming back cuts the backoff short;
* records each outage as an `Episode` (cause, when, how long until an advert was heard again) for
  the heartbeat, so the collector can tell "the radio stack restarted and recovered" from "deaf".

Every wait, timeout and backoff runs on the injected clock.
"""

from __future__ import annotations

import asyncio
import contextlib
import enum
import random
from collections import deque
from collections.abc import AsyncIterator, Sequence
from dataclasses import dataclass
from typing import Any

import structlog
from bleak import BleakScanner
from bleak.backends.device import BLEDevice
from bleak.backends.scanner import AdvertisementData, BaseBleakScanner
from bleak.exc import (
    BleakBluetoothNotAvailableError,
    BleakBluetoothNotAvailableReason,
    BleakDBusError,
    BleakError,
)

from listenpost.agent.sources import RateMeter, one_by_one
from listenpost.core.backoff import half_jitter
from listenpost.core.clock import Clock, with_timeout
from listenpost.core.errors import SourceReason, SourceUnavailable
from listenpost.core.records import Advert

log = structlog.get_logger(__name__)

NO_RSSI = -127
"""What bleak reports when BlueZ's Device1 has no RSSI property (``props.get("RSSI", -127)``)."""


EPISODES_KEPT = 8
"""Episodes the heartbeat carries (the newest; ``episodes_total`` counts them all)."""


class Cause(enum.Enum):
    """What opened an outage episode, when it was not a failed start (that gives a `SourceReason`)."""

    BLUEZ_GONE = "bluez_gone"
    """org.bluez lost its owner: bluetoothd exited or crashed."""
    BLUEZ_RESTARTED = "bluez_restarted"
    """org.bluez changed owner (or came back) while a scanner believed it was scanning."""
    ADAPTER_REMOVED = "adapter_removed"
    """The adapter's object went away (InterfacesRemoved): unplugged, or its driver reset."""
    DISCOVERY_STOPPED = "discovery_stopped"
    """The adapter's ``Discovering`` went false while this source held a discovery session."""
    BUS_LOST = "bus_lost"
    """The connection to the system bus dropped (dbus-daemon restarted or died)."""
    STALLED = "stalled"
    """No advert for ``stall_seconds`` (a quiet room looks the same)."""


_CAUSE_REASONS = {
    Cause.BLUEZ_GONE: SourceReason.BLUEZ_DOWN,
    Cause.BLUEZ_RESTARTED: SourceReason.BLUEZ_DOWN,
    Cause.ADAPTER_REMOVED: SourceReason.ADAPTER_MISSING,
    Cause.DISCOVERY_STOPPED: SourceReason.STALLED,
    Cause.BUS_LOST: SourceReason.BLUEZ_DOWN,
    Cause.STALLED: SourceReason.STALLED,
}


@dataclass
class Episode:
    """
    One outage, from the first sign of trouble to the first advert heard again (board seconds).

    ``returned`` is the last time the bus watch saw what had gone come back (org.bluez owned again,
    the adapter added, the bus reconnected), so ``heard - returned`` is the recovery the source
    itself added on top of the outage.
    """

    reason: str
    started: float
    rebuilds: int = 0
    returned: float | None = None
    scanning: float | None = None
    heard: float | None = None

    def as_dict(self) -> dict[str, Any]:
        def after(t: float | None, since: float | None) -> float | None:
            return None if t is None or since is None else round(t - since, 3)

        return {
            "reason": self.reason,
            "started_s": round(self.started, 3),
            "open": self.heard is None,
            "duration_s": after(self.heard, self.started),
            "rebuilds": self.rebuilds,
            "scanning_after_s": after(self.scanning, self.started),
            "heard_after_return_s": after(self.heard, self.returned),
        }


class ScanState(enum.Enum):
    """What the scanner is doing now (the heartbeat reports it)."""

    STARTING = "starting"
    """Not started yet."""
    SCANNING = "scanning"
    """The scanner started and is delivering (or waiting for) adverts."""
    RESTARTING = "restarting"
    """A stall was seen; the scanner is being rebuilt."""
    UNAVAILABLE = "unavailable"
    """The last start failed; ``reason`` says why; a retry is scheduled."""


_BLEAK_REASONS = {
    BleakBluetoothNotAvailableReason.NO_BLUETOOTH: SourceReason.NO_BLUETOOTH,
    BleakBluetoothNotAvailableReason.NO_BLE_CENTRAL_ROLE: SourceReason.NO_BLUETOOTH,
    BleakBluetoothNotAvailableReason.POWERED_OFF: SourceReason.POWERED_OFF,
    BleakBluetoothNotAvailableReason.DENIED_BY_USER: SourceReason.DENIED,
    BleakBluetoothNotAvailableReason.DENIED_BY_SYSTEM: SourceReason.DENIED,
}
_DBUS_REASONS = {
    "org.freedesktop.DBus.Error.ServiceUnknown": SourceReason.BLUEZ_DOWN,
    "org.freedesktop.DBus.Error.NameHasNoOwner": SourceReason.BLUEZ_DOWN,
    "org.freedesktop.DBus.Error.NoReply": SourceReason.BLUEZ_DOWN,
    "org.freedesktop.DBus.Error.AccessDenied": SourceReason.DENIED,
    # bluetoothd answers before its adapter object exists (just restarted) or after it went
    "org.freedesktop.DBus.Error.UnknownObject": SourceReason.ADAPTER_MISSING,
    "org.bluez.Error.NotReady": SourceReason.POWERED_OFF,
    "org.bluez.Error.NotAuthorized": SourceReason.DENIED,
}


def classify(e: BaseException, adapter: str | None = None) -> SourceUnavailable:
    """Map what ``BleakScanner.start()`` raised to a `SourceUnavailable` with a reason (docs/radio.md §3)."""
    if isinstance(e, SourceUnavailable):
        return e
    if isinstance(e, BleakBluetoothNotAvailableError):
        return SourceUnavailable(
            _BLEAK_REASONS.get(e.reason, SourceReason.OTHER),
            f"Bluetooth not available ({e.reason.name}): {e.args[0]}",
        )
    if isinstance(e, BleakDBusError):
        return SourceUnavailable(
            _DBUS_REASONS.get(e.dbus_error, SourceReason.OTHER),
            f"D-Bus error {e.dbus_error}: {e.dbus_error_details or ''}".rstrip(": "),
        )
    if isinstance(e, BleakError):
        text = str(e)
        if "not found" in text and "adapter" in text:
            return SourceUnavailable(SourceReason.ADAPTER_MISSING, text)
        return SourceUnavailable(SourceReason.OTHER, f"bleak: {text}")
    if isinstance(e, TimeoutError):  # before OSError: TimeoutError is one
        return SourceUnavailable(SourceReason.BLUEZ_DOWN, str(e) or "BlueZ did not answer in time")
    if isinstance(e, PermissionError):
        return SourceUnavailable(SourceReason.DENIED, f"no permission to reach the system D-Bus: {e}")
    if isinstance(e, FileNotFoundError | ConnectionRefusedError):
        return SourceUnavailable(
            SourceReason.NO_BLUETOOTH,
            f"no system D-Bus to reach BlueZ ({e.strerror or e}); is this a machine with Bluetooth?",
        )
    if isinstance(e, OSError):
        return SourceUnavailable(SourceReason.OTHER, f"D-Bus connection failed: {e}")
    return SourceUnavailable(SourceReason.OTHER, f"{type(e).__name__}: {e}")


class BleakSource:
    """
    Supervised bleak scanning as an async iterator of `Advert`.

    Args:
        adapter: ``"hci0"``…, or ``None`` for bleak's default (pin it on multi-adapter boards).
        clock: the injected clock.
        stall_seconds: rebuild the scanner when no advert arrived for this long.
        backend: a ``BaseBleakScanner`` subclass (tests, other platforms); ``None`` = the platform's.
        queue_size: adverts buffered between callback and consumer; more are dropped and counted.
        backoff_initial, backoff_max: retry delay after a failed start, seconds, doubling to the cap;
            each wait is drawn uniformly from [½, 1] × that delay so boards do not retry in step.
        call_timeout: limit on each ``start()`` / ``stop()`` call, seconds.
        max_failures: consecutive failed starts before `adverts` raises the last `SourceUnavailable`;
            ``None`` retries for ever (the agent: the radio may come back).
        rate_window_seconds: window of `effective_rates`.
        rng: random source for the jitter (tests pass a seeded one).
        watch_bus: run the `BusWatch` beside the scanner; ``None`` = only with bleak's own BlueZ
            backend (a test backend has no bus to watch).
        passive_patterns: scan passively through BlueZ's advertisement monitor with these
            ``(start position, AD type, bytes)`` patterns (docs/radio.md §2: experimental in BlueZ,
            RSSI in coarse steps); ``None`` = active discovery, what the agent uses.
    """

    def __init__(
        self,
        adapter: str | None,
        clock: Clock,
        stall_seconds: float = 60.0,
        backend: type[BaseBleakScanner] | None = None,
        *,
        queue_size: int = 4096,
        backoff_initial: float = 1.0,
        backoff_max: float = 60.0,
        call_timeout: float = 15.0,
        max_failures: int | None = None,
        rate_window_seconds: float = 60.0,
        rng: random.Random | None = None,
        watch_bus: bool | None = None,
        passive_patterns: Sequence[tuple[int, int, bytes]] | None = None,
    ) -> None:
        if stall_seconds <= 0:
            raise ValueError(f"stall_seconds must be > 0, got {stall_seconds!r}")
        if not 0 < backoff_initial <= backoff_max:
            raise ValueError(
                f"need 0 < backoff_initial <= backoff_max, got {backoff_initial!r}, {backoff_max!r}"
            )
        self.adapter = adapter
        self.clock = clock
        self.stall_seconds = float(stall_seconds)
        self.backend = backend
        self.backoff_initial = backoff_initial
        self.backoff_max = backoff_max
        self.call_timeout = call_timeout
        self.max_failures = max_failures
        self._rng = rng or random.Random()
        if passive_patterns is not None and not passive_patterns:
            raise ValueError("passive_patterns: passive scanning needs at least one pattern")
        self.passive_patterns = tuple(passive_patterns) if passive_patterns is not None else None
        self.watch_bus = backend is None if watch_bus is None else watch_bus
        self._watch: BusWatch | None = None
        self._trouble = asyncio.Event()
        """Set by the bus watch: the running scanner cannot be hearing anything; rebuild now."""
        self._trouble_cause = Cause.STALLED
        self._wake = asyncio.Event()
        """Set by the bus watch when what had gone came back: cut the backoff short."""
        self._attempt = 0
        """Scanners built so far; each one's callback carries its number."""
        self.generation = 0
        """Scanners started so far (the bus watch ties a ``Discovering`` change to one)."""
        self._episode: Episode | None = None
        self._episodes: deque[Episode] = deque(maxlen=EPISODES_KEPT)
        self.episodes_total = 0
        self._queue: asyncio.Queue[Advert] = asyncio.Queue(maxsize=queue_size)
        self._meter = RateMeter(rate_window_seconds)
        self._last_advert = 0.0
        self._running = False
        self.state = ScanState.STARTING
        self.reason: SourceReason | None = None
        """Why the source is (or last was) not scanning."""
        self.last_error: str | None = None
        self.last_restart_reason: SourceReason | None = None
        """Why the scanner was last rebuilt (STALLED, or the reason of a failed start)."""
        self.restarts = 0
        """Scanner rebuilds after a stall or a failure."""
        self.failures = 0
        """Failed start attempts, in total."""
        self.callbacks = 0
        """Detection callbacks received."""
        self.adverts_seen = 0
        """Adverts queued for the consumer."""
        self.dropped_no_rssi = 0
        """Callbacks with RSSI -127 (no RSSI property), dropped."""
        self.dropped_overflow = 0
        """Adverts dropped because the consumer fell behind by ``queue_size``."""

    # -- callback side (runs inline in the D-Bus message handler: keep it cheap)

    def _on_detect(self, device: BLEDevice, adv: AdvertisementData, attempt: int = 0) -> None:
        self.callbacks += 1
        if adv.rssi == NO_RSSI:
            self.dropped_no_rssi += 1
            return
        now = self.clock.monotonic()
        props: Any = None
        if isinstance(adv.platform_data, tuple) and len(adv.platform_data) > 1:
            props = adv.platform_data[1]
        addr_type = 0 if isinstance(props, dict) and props.get("AddressType") == "public" else 1
        advert = Advert(
            t_mono_ns=self.clock.monotonic_ns(),
            address=device.address.upper(),
            address_type=addr_type,
            rssi_dbm=int(adv.rssi),
            tx_power_dbm=adv.tx_power,
            manufacturer_data=dict(adv.manufacturer_data),
            service_data=dict(adv.service_data),
            service_uuids=tuple(u.lower() for u in adv.service_uuids),
            local_name=adv.local_name,
        )
        # Only real adverts keep the stall watchdog quiet: a callback without RSSI is a cached
        # property change (Connected, ServicesResolved…), not proof that the radio hears.
        self._last_advert = now
        # Recovered when the scanner being started (its callback can run before start() returns)
        # hears with no trouble reported since; an older scanner's orphaned devices prove nothing.
        if self._episode is not None and attempt == self._attempt and not self._trouble.is_set():
            self._close_episode(now)
        self._meter.note(advert.address, now)
        try:
            self._queue.put_nowait(advert)
        except asyncio.QueueFull:
            self.dropped_overflow += 1
            return
        self.adverts_seen += 1

    # -- supervisor

    def _new_scanner(self) -> BleakScanner:
        self._attempt += 1
        attempt = self._attempt

        def on_detect(device: BLEDevice, adv: AdvertisementData) -> None:
            self._on_detect(device, adv, attempt)

        bluez: dict[str, Any] = {"filters": {"RSSI": -127, "DuplicateData": True}}
        if self.adapter:
            bluez["adapter"] = self.adapter
        if self.passive_patterns is None:
            return BleakScanner(on_detect, bluez=bluez, backend=self.backend)  # type: ignore[arg-type]
        from bleak.args.bluez import OrPattern
        from bleak.assigned_numbers import AdvertisementDataType

        bluez["or_patterns"] = [
            OrPattern(pos, AdvertisementDataType(ad_type), data)
            for pos, ad_type, data in self.passive_patterns
        ]
        return BleakScanner(
            on_detect,
            scanning_mode="passive",
            bluez=bluez,  # type: ignore[arg-type]
            backend=self.backend,
        )

    async def _stop(self, scanner: BleakScanner) -> None:
        try:
            await with_timeout(self.clock, scanner.stop(), self.call_timeout, "scanner stop()")
        except Exception as e:  # the bus or bluetoothd may be gone; the next scanner starts clean
            log.info("scanner_stop_failed", adapter=self.adapter, error=str(e))

    async def _wait_for(self, event: asyncio.Event, seconds: float) -> bool:
        """Wait up to ``seconds`` of clock time for ``event``; True when it is set."""
        try:
            await with_timeout(self.clock, event.wait(), seconds, "wait")
        except TimeoutError:
            return False
        return True

    async def _supervise(self) -> None:
        clock = self.clock
        in_row = 0
        while True:
            scanner = self._new_scanner()
            # news older than this attempt is answered by it; news during it is acted on after
            self._trouble.clear()
            self._wake.clear()
            if self._episode is not None:
                self._episode.rebuilds += 1
            try:
                await with_timeout(clock, scanner.start(), self.call_timeout, "scanner start()")
            except asyncio.CancelledError:
                await self._stop(scanner)
                raise
            except Exception as e:
                err = classify(e, self.adapter)
                in_row += 1
                self.failures += 1
                self.state, self.reason, self.last_error = ScanState.UNAVAILABLE, err.reason, str(err)
                self.last_restart_reason = err.reason
                if self._episode is None:
                    self._open_episode(err.reason.value)
                await self._stop(scanner)
                if self.max_failures is not None and in_row >= self.max_failures:
                    log.error(
                        "scanner_unavailable", adapter=self.adapter, reason=err.reason.value, error=str(err)
                    )
                    raise err from e
                delay = half_jitter(in_row - 1, self.backoff_initial, self.backoff_max, self._rng)
                log.warning(
                    "scanner_start_failed",
                    adapter=self.adapter,
                    reason=err.reason.value,
                    error=str(err),
                    retry_in_s=round(delay, 3),
                )
                # BlueZ, the adapter or the bus coming back (seen by the bus watch) ends the wait early
                await self._wait_for(self._wake, delay)
                self.restarts += 1
                continue
            in_row = 0
            self.generation += 1
            self.state, self.reason, self.last_error = ScanState.SCANNING, None, None
            self._last_advert = clock.monotonic()
            if self._episode is not None:
                self._episode.scanning = self._last_advert
            log.info("scanner_started", adapter=self.adapter)
            cause = Cause.STALLED
            try:
                while (left := self._last_advert + self.stall_seconds - clock.monotonic()) > 0:
                    if await self._wait_for(self._trouble, left):
                        cause = self._trouble_cause
                        break
            finally:
                if self.state is ScanState.SCANNING:
                    self.state = ScanState.RESTARTING
                await self._stop(scanner)
            self.restarts += 1
            self.reason = self.last_restart_reason = _CAUSE_REASONS[cause]
            if self._episode is None:
                self._open_episode(cause.value)
            log.warning(
                "scanner_stalled" if cause is Cause.STALLED else "scanner_rebuilding",
                adapter=self.adapter,
                cause=cause.value,
                stall_seconds=self.stall_seconds,
            )

    # -- episodes (what the bus watch and the supervisor report)

    def _open_episode(self, reason: str) -> None:
        self._episode = Episode(reason, self.clock.monotonic())
        self._episodes.append(self._episode)
        self.episodes_total += 1

    def _close_episode(self, now: float) -> None:
        ep, self._episode = self._episode, None
        assert ep is not None
        ep.heard = now
        log.info("radio_recovered", adapter=self.adapter, **ep.as_dict())

    def trouble(self, cause: Cause) -> None:
        """The bus watch saw something that leaves the running scanner deaf: rebuild it now."""
        log.warning("radio_trouble", adapter=self.adapter, cause=cause.value, state=self.state.value)
        if self._episode is None:
            self._open_episode(cause.value)
        if self.state is ScanState.SCANNING:
            self.state = ScanState.RESTARTING  # adverts from now on do not prove recovery
        self._trouble_cause = cause
        self._trouble.set()

    def returned(self, what: str) -> None:
        """The bus watch saw BlueZ, the adapter or the bus come back: retry without waiting out the backoff."""
        log.info("radio_returned", adapter=self.adapter, what=what)
        if self._episode is not None:
            self._episode.returned = self.clock.monotonic()
        self._wake.set()

    def owns_adapter_path(self, path: str) -> bool:
        """Whether an adapter object path is the one this source scans on (any ``hciN`` when unpinned)."""
        if self.adapter:
            return path == f"/org/bluez/{self.adapter}"
        return path.startswith("/org/bluez/hci") and path[len("/org/bluez/hci") :].isdigit()

    def adverts(self) -> AsyncIterator[Advert]:
        """The same adverts as `batches`, one at a time."""
        return one_by_one(self.batches())

    async def batches(self) -> AsyncIterator[list[Advert]]:
        """
        Yield adverts until cancelled, as lists of what queued up since the last turn.

        BlueZ hands over one advert per D-Bus signal and bleak calls back once per advert, so each
        costs a loop turn by nature; only adverts already queued when the consumer comes back
        (a burst of signals in one read) travel together.

        Raises:
            SourceUnavailable: only when ``max_failures`` consecutive starts failed.
        """
        if self._running:
            raise RuntimeError("BleakSource.batches() is already being iterated")
        self._running = True
        sup = asyncio.create_task(self._supervise(), name=f"bleak-supervisor-{self.adapter or 'default'}")
        watch: asyncio.Task[None] | None = None
        if self.watch_bus:
            self._watch = BusWatch(self)
            watch = asyncio.create_task(
                self._watch.run(), name=f"bleak-bus-watch-{self.adapter or 'default'}"
            )
        q = self._queue
        try:
            while True:
                if not q.empty():
                    yield [q.get_nowait() for _ in range(q.qsize())]
                    continue
                get = asyncio.ensure_future(q.get())
                try:
                    await asyncio.wait({get, sup}, return_when=asyncio.FIRST_COMPLETED)
                finally:
                    if not get.done():
                        get.cancel()
                if get.done() and not get.cancelled():
                    yield [get.result(), *(q.get_nowait() for _ in range(q.qsize()))]
                elif sup.done():
                    sup.result()  # raises SourceUnavailable when it gave up
                    return
        finally:
            self._running = False
            sup.cancel()
            if watch is not None:
                watch.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await sup
            if watch is not None:
                with contextlib.suppress(asyncio.CancelledError):
                    await watch

    # -- what the heartbeat reads

    def effective_rates(self) -> dict[str, float]:
        """Adverts per second per address over the last complete rate window (see `RateMeter`)."""
        return self._meter.rates(self.clock.monotonic())

    def stats(self) -> dict[str, Any]:
        """Counters and state for the heartbeat (no addresses: those are filtered by the caller)."""
        return {
            "state": self.state.value,
            "reason": self.reason.value if self.reason else None,
            "restarts": self.restarts,
            "last_restart_reason": self.last_restart_reason.value if self.last_restart_reason else None,
            "failures": self.failures,
            "callbacks": self.callbacks,
            "adverts": self.adverts_seen,
            "dropped_no_rssi": self.dropped_no_rssi,
            "dropped_overflow": self.dropped_overflow,
            "queue_depth": self._queue.qsize(),
            "bus_watch": (
                "off" if self._watch is None else "connected" if self._watch.connected else "disconnected"
            ),
            "episodes_total": self.episodes_total,
            "episodes": [e.as_dict() for e in self._episodes],
        }


WATCH_RECONNECT_MAX_S = 5.0
"""Cap of the bus watch's reconnect backoff: a local socket connect is cheap, and the bus coming back
is what ends the scanner's (longer) backoff."""

_BLUEZ = "org.bluez"
_ADAPTER_IFACE = "org.bluez.Adapter1"
_MATCH_RULES = (
    "type='signal',sender='org.freedesktop.DBus',interface='org.freedesktop.DBus',"
    "member='NameOwnerChanged',arg0='org.bluez'",
    "type='signal',sender='org.bluez',interface='org.freedesktop.DBus.ObjectManager',member='InterfacesAdded'",
    "type='signal',sender='org.bluez',interface='org.freedesktop.DBus.ObjectManager',member='InterfacesRemoved'",
    "type='signal',sender='org.bluez',interface='org.freedesktop.DBus.Properties',"
    "member='PropertiesChanged',arg0='org.bluez.Adapter1'",
)


class BusWatch:
    """
    A system-bus connection of the source's own that tells it what bleak does not.

    bleak keeps one connection and a cache of BlueZ's objects; when bluetoothd restarts the running
    scanner's discovery session is gone and nothing says so (docs/radio.md §5). This watch follows

    * ``NameOwnerChanged`` for org.bluez: no owner → `Cause.BLUEZ_GONE`; a new owner → BlueZ returned
      (and `Cause.BLUEZ_RESTARTED` if a scanner still believed it was scanning);
    * ``InterfacesRemoved``/``InterfacesAdded`` of the adapter: removed → `Cause.ADAPTER_REMOVED`,
      added → returned;
    * the adapter's ``Discovering`` going false: re-read with ``Get`` (a late signal from the
      source's own stop must not count) → `Cause.DISCOVERY_STOPPED`;
    * its own connection dropping → `Cause.BUS_LOST`; it reconnects with a capped, jittered backoff
      (at most `WATCH_RECONNECT_MAX_S`), and a connect that finds org.bluez owned while the source
      is not scanning counts as returned.

    Every call is bounded by the source's ``call_timeout`` on its clock. dbus-fast comes with bleak
    on Linux; without it there is nothing to watch and the stall watchdog stays the only net.
    """

    def __init__(self, source: BleakSource) -> None:
        self.src = source
        self.connected = False
        self.connects = 0
        self._bus: Any = None
        self._checks: set[asyncio.Task[None]] = set()

    async def _call(self, bus: Any, what: str, **message: Any) -> Any:
        from dbus_fast import Message, MessageType

        reply = await with_timeout(self.src.clock, bus.call(Message(**message)), self.src.call_timeout, what)
        if reply is None or reply.message_type is MessageType.ERROR:
            raise OSError(f"{what}: {getattr(reply, 'error_name', 'no reply')}")
        return reply.body

    async def run(self) -> None:
        try:
            await self._run()
        finally:
            for task in list(self._checks):  # bounded by call_timeout, but not left behind the source
                task.cancel()

    async def _run(self) -> None:
        try:
            from dbus_fast import BusType
            from dbus_fast.aio import MessageBus
        except ImportError as e:
            log.info("bus_watch_unavailable", error=str(e))
            return
        src = self.src
        attempt = 0
        while True:
            bus: Any = None
            try:
                bus = MessageBus(bus_type=BusType.SYSTEM)  # connects its socket here: inside the try
                await with_timeout(src.clock, bus.connect(), src.call_timeout, "D-Bus connect")
                bus.add_message_handler(self._on_message)
                for rule in _MATCH_RULES:
                    await self._call(
                        bus,
                        "AddMatch",
                        destination="org.freedesktop.DBus",
                        path="/org/freedesktop/DBus",
                        interface="org.freedesktop.DBus",
                        member="AddMatch",
                        signature="s",
                        body=[rule],
                    )
                (owned,) = await self._call(
                    bus,
                    "NameHasOwner",
                    destination="org.freedesktop.DBus",
                    path="/org/freedesktop/DBus",
                    interface="org.freedesktop.DBus",
                    member="NameHasOwner",
                    signature="s",
                    body=[_BLUEZ],
                )
            except asyncio.CancelledError:
                if bus is not None:
                    bus.disconnect()
                raise
            except Exception as e:
                if bus is not None:
                    bus.disconnect()
                cap = min(src.backoff_max, WATCH_RECONNECT_MAX_S)
                delay = half_jitter(attempt, min(src.backoff_initial, cap), cap, src._rng)
                attempt += 1
                log.info(
                    "bus_watch_connect_failed", error=f"{type(e).__name__}: {e}", retry_in_s=round(delay, 3)
                )
                await src.clock.sleep(delay)
                continue
            attempt = 0
            self._bus, self.connected = bus, True
            self.connects += 1
            log.info("bus_watch_connected", bluez_owned=bool(owned))
            if owned and src.state is not ScanState.SCANNING:
                src.returned("bus")  # the bus (and BlueZ on it) is here: a waiting start may go now
            try:
                await bus.wait_for_disconnect()
            except Exception as e:  # the reason the bus died; what matters is that it did
                log.info("bus_watch_disconnected", error=f"{type(e).__name__}: {e}")
            finally:
                self._bus, self.connected = None, False
                bus.disconnect()
            src.trouble(Cause.BUS_LOST)

    def _on_message(self, msg: Any) -> None:
        from dbus_fast import MessageType

        if msg.message_type is not MessageType.SIGNAL:
            return
        src = self.src
        body = msg.body
        if msg.member == "NameOwnerChanged" and body[0] == _BLUEZ:
            if not body[2]:
                src.trouble(Cause.BLUEZ_GONE)
                return
            if body[1] or src.state is ScanState.SCANNING:
                src.trouble(Cause.BLUEZ_RESTARTED)
            src.returned("bluez")
        elif msg.member == "InterfacesRemoved":
            if _ADAPTER_IFACE in body[1] and src.owns_adapter_path(body[0]):
                src.trouble(Cause.ADAPTER_REMOVED)
        elif msg.member == "InterfacesAdded":
            if _ADAPTER_IFACE in body[1] and src.owns_adapter_path(body[0]):
                src.returned("adapter")
        elif msg.member == "PropertiesChanged" and body[0] == _ADAPTER_IFACE:
            if src.passive_patterns is not None:
                return  # a passive scan holds no discovery session: Discovering is someone else's
            discovering = body[1].get("Discovering")
            if discovering is not None and discovering.value is False and src.owns_adapter_path(msg.path):
                task = asyncio.create_task(self._check_discovering(msg.path, src.generation))
                self._checks.add(task)
                task.add_done_callback(self._checks.discard)

    async def _check_discovering(self, path: str, generation: int) -> None:
        """``Discovering`` was signalled false: rebuild if it still is and the same scanner still runs."""
        src, bus = self.src, self._bus
        if bus is None or src.state is not ScanState.SCANNING or src.generation != generation:
            return
        try:
            (value,) = await self._call(
                bus,
                "Get Discovering",
                destination=_BLUEZ,
                path=path,
                interface="org.freedesktop.DBus.Properties",
                member="Get",
                signature="ss",
                body=[_ADAPTER_IFACE, "Discovering"],
            )
        except Exception as e:  # adapter or BlueZ gone: their own signals say so
            log.info("discovering_check_failed", error=str(e))
            return
        if value.value is False and src.state is ScanState.SCANNING and src.generation == generation:
            src.trouble(Cause.DISCOVERY_STOPPED)
