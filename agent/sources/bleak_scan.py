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
  measurement, so those callbacks are dropped and counted.

Every wait, timeout and backoff runs on the injected clock.
"""

from __future__ import annotations

import asyncio
import contextlib
import enum
import random
from collections.abc import AsyncIterator
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

from listenpost.agent.sources import RateMeter
from listenpost.core.backoff import half_jitter
from listenpost.core.clock import Clock, with_timeout
from listenpost.core.errors import SourceReason, SourceUnavailable
from listenpost.core.records import Advert

log = structlog.get_logger(__name__)

NO_RSSI = -127
"""What bleak reports when BlueZ's Device1 has no RSSI property (``props.get("RSSI", -127)``)."""


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

    def _on_detect(self, device: BLEDevice, adv: AdvertisementData) -> None:
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
        self._meter.note(advert.address, now)
        try:
            self._queue.put_nowait(advert)
        except asyncio.QueueFull:
            self.dropped_overflow += 1
            return
        self.adverts_seen += 1

    # -- supervisor

    def _new_scanner(self) -> BleakScanner:
        bluez: dict[str, Any] = {"filters": {"RSSI": -127, "DuplicateData": True}}
        if self.adapter:
            bluez["adapter"] = self.adapter
        return BleakScanner(self._on_detect, bluez=bluez, backend=self.backend)  # type: ignore[arg-type]

    async def _stop(self, scanner: BleakScanner) -> None:
        try:
            await with_timeout(self.clock, scanner.stop(), self.call_timeout, "scanner stop()")
        except Exception as e:  # the bus or bluetoothd may be gone; the next scanner starts clean
            log.info("scanner_stop_failed", adapter=self.adapter, error=str(e))

    async def _supervise(self) -> None:
        clock = self.clock
        in_row = 0
        while True:
            scanner = self._new_scanner()
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
                await clock.sleep(delay)
                self.restarts += 1
                continue
            in_row = 0
            self.state, self.reason, self.last_error = ScanState.SCANNING, None, None
            self._last_advert = clock.monotonic()
            log.info("scanner_started", adapter=self.adapter)
            try:
                while (left := self._last_advert + self.stall_seconds - clock.monotonic()) > 0:
                    await clock.sleep(left)
            finally:
                if self.state is ScanState.SCANNING:
                    self.state = ScanState.RESTARTING
                await self._stop(scanner)
            self.restarts += 1
            self.reason = self.last_restart_reason = SourceReason.STALLED
            log.warning("scanner_stalled", adapter=self.adapter, stall_seconds=self.stall_seconds)

    async def adverts(self) -> AsyncIterator[Advert]:
        """
        Yield adverts until cancelled.

        Raises:
            SourceUnavailable: only when ``max_failures`` consecutive starts failed.
        """
        if self._running:
            raise RuntimeError("BleakSource.adverts() is already being iterated")
        self._running = True
        sup = asyncio.create_task(self._supervise(), name=f"bleak-supervisor-{self.adapter or 'default'}")
        q = self._queue
        try:
            while True:
                if not q.empty():
                    yield q.get_nowait()
                    continue
                get = asyncio.ensure_future(q.get())
                try:
                    await asyncio.wait({get, sup}, return_when=asyncio.FIRST_COMPLETED)
                finally:
                    if not get.done():
                        get.cancel()
                if get.done() and not get.cancelled():
                    yield get.result()
                elif sup.done():
                    sup.result()  # raises SourceUnavailable when it gave up
                    return
        finally:
            self._running = False
            sup.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await sup

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
        }
