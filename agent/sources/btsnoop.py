"""
btsnoop capture files (what ``btmon -w`` and Android write): stream-read advertisements, and write.

Layout (BlueZ ``src/shared/btsnoop.{c,h}``; "BTSnoop File Format", after RFC 1761 snoop):

* file header, 16 bytes big-endian: ``b"btsnoop\\0"``, version u32 = 1, datalink u32;
* per record, 24 bytes big-endian: original length u32, included length u32, flags u32,
  cumulative drops u32, timestamp int64 (µs since the format's nominal year 0), then the packet.

Datalinks read here:

* **1001** un-encapsulated HCI: no indicator byte; flags bit 1 = command/event, bit 0 = received.
* **1002** HCI UART (H4): the packet starts with its indicator (0x04 = event), as a raw socket gives it.
* **2001** Linux monitor (``btmon -w``): flags = ``(adapter_index << 16) | opcode``; opcode 3 is an
  event, without an indicator byte.

Board time of a replayed capture: ``Advert.t_mono_ns`` is the capture time relative to the first
record of the file (a capture carries wall-clock time only, and no boot id).
"""

from __future__ import annotations

import gzip
import struct
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from types import TracebackType
from typing import IO, NamedTuple

import structlog

from listenpost.agent.sources.hci_events import (
    H4_EVENT,
    ExtendedReassembler,
    advert_to_event,
    parse_event_packet,
    report_to_advert,
)
from listenpost.core.errors import CaptureFormatError, DecodeError
from listenpost.core.records import Advert

log = structlog.get_logger(__name__)

MAGIC = b"btsnoop\0"
DATALINK_H1 = 1001
DATALINK_H4 = 1002
DATALINK_MONITOR = 2001
DATALINKS = (DATALINK_H1, DATALINK_H4, DATALINK_MONITOR)
MONITOR_NEW_INDEX = 0
MONITOR_EVENT = 3

EPOCH_DELTA_US = 0x00DCDDB30F2F8000
"""btsnoop timestamp minus Unix µs. A convention of the format (719 540 days, not the calendar's
719 528), as BlueZ and Android use it: never derive it with date arithmetic (docs/references.md §3)."""

_FILE_HDR = struct.Struct(">8sII")
_REC_HDR = struct.Struct(">IIIIq")
MAX_RECORD = 1 << 16
"""Largest included length we accept; HCI packets are far smaller, so more means a damaged file."""


class CapturedAdvert(NamedTuple):
    """One advertisement from a capture."""

    t_unix_us: int
    """Capture time, Unix microseconds."""
    hci_index: int
    """Adapter index (datalink 2001); 0 for other datalinks."""
    advert: Advert
    """The advertisement; ``t_mono_ns`` is relative to the file's first record."""


@dataclass
class BtsnoopStats:
    """What a read pass saw; warnings are counted here, not raised."""

    records: int = 0
    events: int = 0
    reports: int = 0
    adverts: int = 0
    no_rssi: int = 0
    """Reports with RSSI 127 (not available): dropped."""
    bad_events: int = 0
    """Well-framed records whose HCI event did not decode: skipped."""
    truncated: int = 0
    """1 when the last record was cut short (a capture stopped mid-write)."""
    errors: list[str] = field(default_factory=list)
    """The first few skip reasons, for the summary."""


def _open_binary(path: Path) -> IO[bytes]:
    try:
        f = open(path, "rb")  # noqa: SIM115 - closed by the caller
    except OSError as e:
        raise CaptureFormatError(f"{path}: cannot open: {e.strerror or e}") from e
    if f.peek(2)[:2] == b"\x1f\x8b":
        f.close()
        return gzip.open(path, "rb")
    return f


def _read(f: IO[bytes], n: int, path: Path, rec: int) -> bytes:
    try:
        return f.read(n)
    except (OSError, EOFError) as e:
        raise CaptureFormatError(f"{path}: record {rec}: cannot read: {e}") from None
    except Exception as e:  # zlib.error from a damaged gzip'd capture
        raise CaptureFormatError(f"{path}: record {rec}: damaged compressed data: {e}") from None


class BtsnoopReader:
    """
    Stream advertisements from one capture; iterate it once.

    A damaged header or record framing raises `CaptureFormatError` naming the file and record;
    a truncated last record ends the stream with a warning (``stats.truncated``); an undecodable
    HCI event inside a well-framed record is skipped and counted (``stats.bad_events``).
    """

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self.stats = BtsnoopStats()
        self.datalink: int | None = None

    def __iter__(self) -> Iterator[CapturedAdvert]:
        f = _open_binary(self.path)
        try:
            yield from self._records(f)
        finally:
            f.close()

    def _records(self, f: IO[bytes]) -> Iterator[CapturedAdvert]:
        path, st = self.path, self.stats
        hdr = _read(f, _FILE_HDR.size, path, 0)
        if len(hdr) < _FILE_HDR.size or hdr[:8] != MAGIC:
            raise CaptureFormatError(f"{path}: not a btsnoop file (bad magic or short header)")
        _, version, datalink = _FILE_HDR.unpack(hdr)
        if version != 1:
            raise CaptureFormatError(f"{path}: btsnoop version {version} is not supported (only 1)")
        if datalink not in DATALINKS:
            raise CaptureFormatError(
                f"{path}: btsnoop datalink {datalink} is not supported "
                f"(only {', '.join(map(str, DATALINKS))})"
            )
        self.datalink = datalink
        t0: int | None = None
        reasm: dict[int, ExtendedReassembler] = {}
        rec = 0
        while True:
            rec += 1
            rh = _read(f, _REC_HDR.size, path, rec)
            if not rh:
                return
            if len(rh) < _REC_HDR.size:
                self._truncated(rec, "record header")
                return
            orig, incl, flags, _drops, ts = _REC_HDR.unpack(rh)
            if incl > orig or incl > MAX_RECORD:
                raise CaptureFormatError(
                    f"{path}: record {rec}: included length {incl} "
                    f"(original {orig}) is not a valid record size"
                )
            pkt = _read(f, incl, path, rec)
            if len(pkt) < incl:
                self._truncated(rec, "packet")
                return
            st.records += 1
            t_us = ts - EPOCH_DELTA_US
            if t0 is None:
                t0 = t_us
            index = 0
            if datalink == DATALINK_MONITOR:
                index, opcode = flags >> 16, flags & 0xFFFF
                if opcode != MONITOR_EVENT:
                    continue
                event = pkt
            elif datalink == DATALINK_H4:
                if not pkt or pkt[0] != H4_EVENT:
                    continue
                event = pkt[1:]
            else:  # H1: bit 1 set and bit 0 set = event received from the controller
                if flags & 0x3 != 0x3:
                    continue
                event = pkt
            st.events += 1
            try:
                reports = parse_event_packet(event)
            except DecodeError as e:
                st.bad_events += 1
                if len(st.errors) < 10:
                    st.errors.append(f"record {rec}: {e}")
                log.warning("capture_event_skipped", file=str(path), record=rec, error=str(e))
                continue
            t_rel_ns = (t_us - t0) * 1000
            for rep in reports:
                st.reports += 1
                whole = reasm.setdefault(index, ExtendedReassembler()).feed(rep)
                if whole is None:
                    continue
                adv = report_to_advert(whole, t_rel_ns, {"hci_index": index, "event_type": whole.event_type})
                if adv is None:
                    st.no_rssi += 1
                    continue
                st.adverts += 1
                yield CapturedAdvert(t_us, index, adv)

    def _truncated(self, rec: int, what: str) -> None:
        self.stats.truncated = 1
        log.warning("capture_truncated", file=str(self.path), record=rec, part=what)


def read_btsnoop(path: str | Path) -> Iterator[CapturedAdvert]:
    """Stream the advertisements of a capture (see `BtsnoopReader` for errors and warnings)."""
    return iter(BtsnoopReader(path))


def is_btsnoop(head: bytes) -> bool:
    """Whether the first bytes of a file are the btsnoop magic."""
    return head[:8] == MAGIC


class BtsnoopWriter:
    """
    Write a capture (datalink 1002 H4 or 2001 monitor) that btmon and other readers accept.

    For datalink 2001 a NEW_INDEX record (adapter announcement) precedes the first event of each
    adapter index, as btmon writes it, so readers can name the adapter.
    """

    def __init__(self, path: str | Path, datalink: int = DATALINK_H4) -> None:
        if datalink not in (DATALINK_H4, DATALINK_MONITOR):
            raise ValueError(f"datalink must be {DATALINK_H4} or {DATALINK_MONITOR}, got {datalink!r}")
        self.path = Path(path)
        self.datalink = datalink
        self._f: IO[bytes] = open(self.path, "wb")  # noqa: SIM115 - closed in close()
        self._f.write(_FILE_HDR.pack(MAGIC, 1, datalink))
        self._announced: set[int] = set()
        self.records = 0

    def _record(self, t_unix_us: int, flags: int, pkt: bytes) -> None:
        self._f.write(_REC_HDR.pack(len(pkt), len(pkt), flags, 0, t_unix_us + EPOCH_DELTA_US))
        self._f.write(pkt)
        self.records += 1

    def write_event(self, t_unix_us: int, event: bytes, index: int = 0) -> None:
        """
        Append one HCI event received from the controller.

        Args:
            t_unix_us: capture time, Unix microseconds.
            event: ``[code][param_len][params]`` without the H4 indicator.
            index: adapter index (kept in datalink 2001 only).
        """
        if self.datalink == DATALINK_H4:
            self._record(t_unix_us, 0x3, bytes((H4_EVENT,)) + event)  # received, command/event
            return
        if index not in self._announced:
            self._announced.add(index)
            # NEW_INDEX: type 0 (primary), bus 0 (virtual), bdaddr, name (8 bytes)
            name = f"hci{index}".encode()[:8].ljust(8, b"\0")
            self._record(t_unix_us, (index << 16) | MONITOR_NEW_INDEX, b"\x00\x00" + b"\0" * 6 + name)
        self._record(t_unix_us, (index << 16) | MONITOR_EVENT, event)

    def write_advert(self, t_unix_us: int, advert: Advert, index: int = 0) -> None:
        """Append the LE Advertising Report a controller would have sent for ``advert``."""
        self.write_event(t_unix_us, advert_to_event(advert), index)

    def close(self) -> None:
        if not self._f.closed:
            self._f.close()

    def __enter__(self) -> BtsnoopWriter:
        return self

    def __exit__(
        self, et: type[BaseException] | None, e: BaseException | None, tb: TracebackType | None
    ) -> None:
        self.close()
