"""
Raw HCI socket source (Linux): every LE advertising report the controller delivers.

Sniff-only: the socket is bound to the adapter with a filter for event packets (Command
Complete/Status and LE Meta, docs/radio.md §6) and reads the copies of events that every bound raw
socket receives, as hcidump does. Scanning itself is left to BlueZ (run a bleak source or
``bluetoothctl scan on`` beside it), so this source never fights bluetoothd over scan commands
and needs no write access to the controller. Reading needs CAP_NET_RAW for the LE Meta event
(the kernel masks unprivileged filters with its security filter).

Each ``recv`` returns one H4 packet (indicator 0x04, code, length, params), decoded by the same
`listenpost.agent.sources.hci_events.parse_h4` that reads btsnoop captures.
"""

from __future__ import annotations

import asyncio
import contextlib
import errno
import socket
import struct
from collections.abc import AsyncIterator

import structlog

from listenpost.agent.sources import one_by_one
from listenpost.agent.sources.hci_events import ExtendedReassembler, parse_h4, report_to_advert
from listenpost.core.clock import Clock
from listenpost.core.errors import DecodeError, SourceReason, SourceUnavailable
from listenpost.core.records import Advert

log = structlog.get_logger(__name__)

# Kernel constants (include/net/bluetooth/hci_sock.h); CPython exposes some only when built with BlueZ headers.
SOL_HCI = 0
HCI_FILTER = 2
BTPROTO_HCI = 1
HCI_FILTER_EVENTS = struct.pack("<IIIH", 1 << 0x04, (1 << 0x0E) | (1 << 0x0F), 1 << (0x3E - 32), 0)
"""hci_ufilter {type_mask: event packets; event_mask: Command Complete, Command Status, LE Meta; opcode 0}."""
RECV_SIZE = 1024  # an HCI event is at most 3 + 255 bytes
DRAIN_MAX = 64
"""Packets read per wake-up at most, so a flood still lets other tasks run between batches."""


def dev_id_of(adapter: str | None) -> int:
    """``"hci1"`` → 1; ``None`` → 0."""
    if adapter is None:
        return 0
    if not adapter.startswith("hci") or not adapter[3:].isdigit():
        raise ValueError(f"adapter must look like hci0, got {adapter!r}")
    return int(adapter[3:])


def open_hci_socket(dev_id: int) -> socket.socket:
    """
    Open and bind a raw HCI socket with the event filter.

    Raises:
        SourceUnavailable: no AF_BLUETOOTH in this Python or kernel (NO_BLUETOOTH), no permission
            (DENIED), no such adapter (ADAPTER_MISSING), or it is down (POWERED_OFF).
    """
    af = getattr(socket, "AF_BLUETOOTH", None)
    if af is None:
        raise SourceUnavailable(
            SourceReason.NO_BLUETOOTH,
            "this Python has no AF_BLUETOOTH sockets (built without BlueZ headers); "
            "use source kind 'bleak', or a Python built with libbluetooth-dev",
        )
    try:
        s = socket.socket(af, socket.SOCK_RAW | socket.SOCK_CLOEXEC, BTPROTO_HCI)
    except OSError as e:
        if e.errno in (errno.EPERM, errno.EACCES):
            raise SourceUnavailable(SourceReason.DENIED, f"raw HCI socket needs CAP_NET_RAW: {e}") from e
        raise SourceUnavailable(SourceReason.NO_BLUETOOTH, f"cannot open a raw HCI socket: {e}") from e
    try:
        s.setsockopt(SOL_HCI, HCI_FILTER, HCI_FILTER_EVENTS)
        s.bind((dev_id,))
    except OSError as e:
        s.close()
        reason = {
            errno.ENODEV: SourceReason.ADAPTER_MISSING,
            errno.EPERM: SourceReason.DENIED,
            errno.EACCES: SourceReason.DENIED,
            errno.ENETDOWN: SourceReason.POWERED_OFF,
        }.get(e.errno or 0, SourceReason.OTHER)
        raise SourceUnavailable(reason, f"cannot bind raw HCI socket to hci{dev_id}: {e}") from e
    return s


class HciSource:
    """
    Adverts from a raw HCI socket.

    Args:
        dev_id: adapter number (``hci0`` → 0).
        clock: the injected clock; each packet is stamped with ``clock.monotonic_ns()`` on receipt.
        sock: an already open datagram-like socket delivering H4 packets (tests pass one end of a
            ``socketpair``); ``None`` opens the real HCI socket when iteration starts.
    """

    def __init__(self, dev_id: int, clock: Clock, *, sock: socket.socket | None = None) -> None:
        self.dev_id = dev_id
        self.clock = clock
        self._sock = sock
        self.packets = 0
        self.adverts_seen = 0
        self.bad_packets = 0
        """Packets that did not decode (counted and skipped)."""
        self.dropped_no_rssi = 0
        self._reasm = ExtendedReassembler()

    def stats(self) -> dict[str, int]:
        return {
            "packets": self.packets,
            "adverts": self.adverts_seen,
            "bad_packets": self.bad_packets,
            "dropped_no_rssi": self.dropped_no_rssi,
            "fragments_dropped": self._reasm.dropped,
        }

    def _decode(self, pkt: bytes, t_ns: int) -> list[Advert]:
        self.packets += 1
        try:
            reports = parse_h4(pkt)
        except DecodeError as e:
            self.bad_packets += 1
            log.warning("hci_packet_skipped", adapter=f"hci{self.dev_id}", error=str(e))
            return []
        out = []
        for rep in reports:
            whole = self._reasm.feed(rep)
            if whole is None:
                continue
            adv = report_to_advert(whole, t_ns, {"event_type": whole.event_type})
            if adv is None:
                self.dropped_no_rssi += 1
                continue
            out.append(adv)
        self.adverts_seen += len(out)
        return out

    async def batches(self) -> AsyncIterator[list[Advert]]:
        """
        Yield the adverts of every packet queued on the socket at a wake-up, until cancelled or the
        socket closes.

        After the packet that woke the loop, whatever else the socket already holds (up to
        `DRAIN_MAX` packets) is read without waiting, and the clock is read once for them all:
        each is stamped with that reading, as each packet alone was stamped right after its
        ``recv``; they differ by the microseconds the drain takes.

        Raises:
            SourceUnavailable: the socket cannot be opened (see `open_hci_socket`).
        """
        sock = self._sock if self._sock is not None else open_hci_socket(self.dev_id)
        sock.setblocking(False)
        loop = asyncio.get_running_loop()
        try:
            while True:
                pkts = [await loop.sock_recv(sock, RECV_SIZE)]
                ended = not pkts[0]
                while not ended and len(pkts) < DRAIN_MAX:
                    try:
                        pkt = sock.recv(RECV_SIZE)
                    except (BlockingIOError, InterruptedError):
                        break
                    ended = not pkt
                    if not ended:
                        pkts.append(pkt)
                t_ns = self.clock.monotonic_ns()
                batch = [adv for pkt in pkts if pkt for adv in self._decode(pkt, t_ns)]
                if batch:
                    yield batch
                if ended:
                    return
        finally:
            with contextlib.suppress(OSError):
                sock.close()

    def adverts(self) -> AsyncIterator[Advert]:
        """The same adverts one at a time."""
        return one_by_one(self.batches())
