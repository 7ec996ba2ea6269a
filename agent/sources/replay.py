"""
The recorded-log format (DEVELOPERS.md "Recorded-log format"): write and stream-read.

JSON Lines, gzip'd when the file name ends in ``.gz`` (the reader detects gzip by its magic bytes,
not by the name). Line 1 is the header; every further line is one advertisement::

    {"format": "listenpost-recording", "version": 1, "board": "g0-a", "boot": "…", "wall_at_start": 1800000000.0}
    {"t":51.234,"a":"C4:7A:10:00:2B:91","at":1,"r":-67,"m":{"004c":"0215…"}}

Board time ``t`` is written as float seconds; it reads back to the same nanosecond for board
times below 10⁶ s (11.5 days of uptime), and to the microsecond well beyond that.

The reader never holds more than one line; errors are `CaptureFormatError` naming ``file:line``.
"""

from __future__ import annotations

import gzip
import io
import json
import math
import re
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path
from types import TracebackType
from typing import IO, Any

from listenpost.core.errors import CaptureFormatError
from listenpost.core.records import BASE_UUID_SUFFIX, Advert, uuid16_to_128

FORMAT = "listenpost-recording"
VERSION = 1
GZIP_MAGIC = b"\x1f\x8b"
RSSI_RANGE = (-127, 20)
"""Valid RSSI per Core Spec Vol 4 Part E §7.7.65.2 (127 means "not available" and is never recorded)."""

MAX_LINE = 64 * 1024
"""Longest line accepted; real lines are a few hundred bytes, so more means the wrong file."""

_ADDRESS = re.compile(r"[0-9A-F]{2}(:[0-9A-F]{2}){5}")
_UUID128 = re.compile(r"[0-9a-f]{8}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{12}")
_HEX4 = re.compile(r"[0-9a-fA-F]{4}")


@dataclass(frozen=True, slots=True)
class RecordingHeader:
    """Line 1 of a recording."""

    board: str
    """Board name that heard the advertisements."""
    boot: str
    """Boot id of the board when recording; ``t`` values are on that boot's monotonic clock."""
    wall_at_start: float
    """Board wall clock at the start of the recording, Unix seconds (may be wrong on a board without NTP)."""
    version: int = VERSION

    def to_json(self) -> dict[str, Any]:
        return {
            "format": FORMAT,
            "version": self.version,
            "board": self.board,
            "boot": self.boot,
            "wall_at_start": self.wall_at_start,
        }


# ---------------------------------------------------------------- writing

_short_cache: dict[str, str] = {}


def _short_uuid(u: str) -> str:
    """``0000180f-0000-1000-8000-00805f9b34fb`` → ``180f``; other UUIDs unchanged (cached: few distinct)."""
    s = _short_cache.get(u)
    if s is None:
        s = u[4:8] if u.startswith("0000") and u.endswith(BASE_UUID_SUFFIX) else u
        if len(_short_cache) < 4096:
            _short_cache[u] = s
    return s


def advert_line(a: Advert) -> str:
    """One recording line for ``a`` (no newline)."""
    d: dict[str, Any] = {"t": a.t_mono_ns / 1e9, "a": a.address, "at": a.address_type, "r": a.rssi_dbm}
    if a.tx_power_dbm is not None:
        d["tx"] = a.tx_power_dbm
    if a.manufacturer_data:
        d["m"] = {f"{k:04x}": v.hex() for k, v in a.manufacturer_data.items()}
    if a.service_data:
        d["s"] = {_short_uuid(k): v.hex() for k, v in a.service_data.items()}
    if a.service_uuids:
        d["u"] = [_short_uuid(u) for u in a.service_uuids]
    if a.local_name is not None:
        d["n"] = a.local_name
    return json.dumps(d, separators=(",", ":"))


class RecordingWriter:
    """
    Write a recording one advertisement at a time (``agent record``, the simulator).

    Use as a context manager; the file is complete (gzip trailer written) after `close`.
    """

    __slots__ = ("path", "header", "_f", "count")

    def __init__(self, path: str | Path, *, board: str, boot: str, wall_at_start: float) -> None:
        self.path = Path(path)
        self.header = RecordingHeader(board, boot, float(wall_at_start))
        raw: IO[str]
        if self.path.name.endswith(".gz"):
            # compresslevel 6: most of level 9's ratio on repetitive JSON at a fraction of the CPU
            raw = io.TextIOWrapper(
                gzip.GzipFile(self.path, "wb", compresslevel=6, mtime=0),  # mtime 0: same input, same bytes
                encoding="utf-8",
                newline="\n",
            )
        else:
            raw = open(self.path, "w", encoding="utf-8", newline="\n")  # noqa: SIM115 - closed in close()
        self._f = raw
        self.count = 0
        """Advertisements written."""
        raw.write(json.dumps(self.header.to_json()) + "\n")

    def write(self, advert: Advert) -> None:
        self._f.write(advert_line(advert) + "\n")
        self.count += 1

    def write_many(self, adverts: Iterable[Advert]) -> None:
        write = self._f.write
        n = 0
        for a in adverts:
            write(advert_line(a) + "\n")
            n += 1
        self.count += n

    def flush(self) -> None:
        """Push buffered lines to the OS (for gzip: a sync point, so avoid calling it often)."""
        self._f.flush()

    def close(self) -> None:
        if not self._f.closed:
            self._f.close()

    def __enter__(self) -> RecordingWriter:
        return self

    def __exit__(
        self, et: type[BaseException] | None, e: BaseException | None, tb: TracebackType | None
    ) -> None:
        self.close()


def write_recording(
    path: str | Path, adverts: Iterable[Advert], *, board: str, boot: str, wall_at_start: float
) -> int:
    """Write a whole recording; gzip'd when the name ends in ``.gz``. Returns the number of lines after the header."""
    with RecordingWriter(path, board=board, boot=boot, wall_at_start=wall_at_start) as w:
        w.write_many(adverts)
        return w.count


# ---------------------------------------------------------------- reading


def _open_binary(path: Path) -> IO[bytes]:
    try:
        f = open(path, "rb")  # noqa: SIM115 - caller closes
        if f.peek(2)[:2] == GZIP_MAGIC:
            f.close()
            return gzip.open(path, "rb")
        return f
    except OSError as e:
        raise CaptureFormatError(f"{path}: cannot open: {e.strerror or e}") from e


def _lines(path: Path) -> Iterator[tuple[int, str]]:
    """Numbered lines, decoded one by one (so a bad byte names its own line)."""
    f = _open_binary(path)
    n = 0
    try:
        while True:
            try:
                raw = f.readline(MAX_LINE + 1)
            except EOFError:
                raise CaptureFormatError(
                    f"{path}:{n + 1}: compressed data ends early (file truncated?)"
                ) from None
            except OSError as e:  # includes gzip.BadGzipFile
                raise CaptureFormatError(f"{path}:{n + 1}: cannot read: {e}") from None
            except Exception as e:  # zlib.error and friends from a damaged stream
                raise CaptureFormatError(f"{path}:{n + 1}: damaged compressed data: {e}") from None
            if not raw:
                return
            n += 1
            if len(raw) > MAX_LINE:
                raise CaptureFormatError(f"{path}:{n}: line longer than {MAX_LINE} bytes (not a recording?)")
            try:
                line = raw.decode("utf-8")
            except UnicodeDecodeError as e:
                raise CaptureFormatError(
                    f"{path}:{n}: not UTF-8 text ({e.reason} at byte {e.start})"
                ) from None
            yield n, line
    finally:
        f.close()


def _header(path: Path, line: str | None) -> RecordingHeader:
    where = f"{path}:1"
    if line is None:
        raise CaptureFormatError(f"{where}: empty file, expected a recording header")
    try:
        h = json.loads(line)
    except ValueError as e:
        raise CaptureFormatError(f"{where}: header is not JSON ({e})") from None
    if not isinstance(h, dict) or h.get("format") != FORMAT:
        raise CaptureFormatError(
            f"{where}: format: expected {FORMAT!r}, got {h.get('format') if isinstance(h, dict) else h!r}"
        )
    if h.get("version") != VERSION:
        raise CaptureFormatError(f"{where}: version: expected {VERSION}, got {h.get('version')!r}")
    board, boot, wall = h.get("board"), h.get("boot"), h.get("wall_at_start")
    if not isinstance(board, str) or not board:
        raise CaptureFormatError(f"{where}: board: must be a non-empty string, got {board!r}")
    if not isinstance(boot, str) or not boot:
        raise CaptureFormatError(f"{where}: boot: must be a non-empty string, got {boot!r}")
    if isinstance(wall, bool) or not isinstance(wall, int | float) or not math.isfinite(wall):
        raise CaptureFormatError(f"{where}: wall_at_start: must be a number, got {wall!r}")
    return RecordingHeader(board, boot, float(wall))


def _int_field(d: dict[str, Any], key: str, lo: int, hi: int, where: str) -> int:
    v = d.get(key)
    if isinstance(v, bool) or not isinstance(v, int) or not lo <= v <= hi:
        raise CaptureFormatError(f"{where}: {key}: must be an integer in {lo}..{hi}, got {v!r}")
    return v


def _hex(v: Any, where: str, key: str) -> bytes:
    if not isinstance(v, str):
        raise CaptureFormatError(f"{where}: {key}: must be hex text, got {v!r}")
    try:
        return bytes.fromhex(v)
    except ValueError:
        raise CaptureFormatError(f"{where}: {key}: not hex: {v!r}") from None


def _uuid(u: Any, where: str, key: str) -> str:
    if isinstance(u, str):
        if _HEX4.fullmatch(u):
            return uuid16_to_128(int(u, 16))
        if _UUID128.fullmatch(u.lower()):
            return u.lower()
    raise CaptureFormatError(f"{where}: {key}: must be a 4-hex or 128-bit UUID, got {u!r}")


class _Where:
    """``file:line`` for error messages, formatted only when an error is raised (the hot path never pays)."""

    __slots__ = ("n", "path")

    def __init__(self, path: Path, n: int = 0) -> None:
        self.path, self.n = path, n

    def __str__(self) -> str:
        return f"{self.path}:{self.n}"


# Replays repeat the same addresses, keys and payloads millions of times: remember what was
# already validated and decoded. Bounded, so a hostile file cannot grow them without limit.
_CACHE_MAX = 16_384
_ok_addresses: set[str] = set()
_company_ids: dict[str, int] = {}
_uuid_keys: dict[str, str] = {}
_payloads: dict[str, bytes] = {}
_json_decode = json.JSONDecoder().decode


def _remember(cache: dict[str, Any], key: str, value: Any) -> Any:
    if len(cache) < _CACHE_MAX:
        cache[key] = value
    return value


def parse_line(line: str, where: str | _Where) -> Advert:
    """One advertisement line → `Advert`; ``where`` (``file:line``) prefixes every error."""
    try:
        d = _json_decode(line)
    except ValueError as e:
        raise CaptureFormatError(f"{where}: not JSON ({e})") from None
    if type(d) is not dict:
        raise CaptureFormatError(f"{where}: must be a JSON object")
    t = d.get("t")
    if (type(t) is not float and type(t) is not int) or not 0 <= t <= 1e10:  # NaN fails the range test
        raise CaptureFormatError(f"{where}: t: must be board seconds >= 0, got {t!r}")
    a = d.get("a")
    if a not in _ok_addresses:
        if not isinstance(a, str) or not _ADDRESS.fullmatch(a):
            raise CaptureFormatError(f"{where}: a: must be an upper-case colon address, got {a!r}")
        if len(_ok_addresses) < _CACHE_MAX:
            _ok_addresses.add(a)
    at = d.get("at")
    if type(at) is not int or not 0 <= at <= 3:
        at = _int_field(d, "at", 0, 3, where)
    r = d.get("r")
    if type(r) is not int or not RSSI_RANGE[0] <= r <= RSSI_RANGE[1]:
        r = _int_field(d, "r", *RSSI_RANGE, where)
    tx = _int_field(d, "tx", -128, 127, where) if d.get("tx") is not None else None
    mfg: dict[int, bytes] = {}
    if (m := d.get("m")) is not None:
        if type(m) is not dict:
            raise CaptureFormatError(f"{where}: m: must be an object")
        for k, v in m.items():
            cid = _company_ids.get(k)
            if cid is None:
                if not _HEX4.fullmatch(k):
                    raise CaptureFormatError(f"{where}: m: company id must be 4 hex digits, got {k!r}")
                cid = _remember(_company_ids, k, int(k, 16))
            b = _payloads.get(v) if type(v) is str else None
            mfg[cid] = b if b is not None else _remember(_payloads, v, _hex(v, where, f"m.{k}"))
    svc: dict[str, bytes] = {}
    if (s := d.get("s")) is not None:
        if type(s) is not dict:
            raise CaptureFormatError(f"{where}: s: must be an object")
        for k, v in s.items():
            key = _uuid_keys.get(k) or _remember(_uuid_keys, k, _uuid(k, where, "s"))
            b = _payloads.get(v) if type(v) is str else None
            svc[key] = b if b is not None else _remember(_payloads, v, _hex(v, where, f"s.{k}"))
    uuids: tuple[str, ...] = ()
    if (u := d.get("u")) is not None:
        if type(u) is not list:
            raise CaptureFormatError(f"{where}: u: must be a list")
        uuids = tuple(
            (type(x) is str and _uuid_keys.get(x)) or _remember(_uuid_keys, x, _uuid(x, where, "u"))
            for x in u
        )
    n = d.get("n")
    if n is not None and type(n) is not str:
        raise CaptureFormatError(f"{where}: n: must be a string, got {n!r}")
    return Advert(round(t * 1e9), a, at, r, tx, mfg, svc, uuids, n)


def read_header(path: str | Path) -> RecordingHeader:
    """Read and check only the header line."""
    p = Path(path)
    lines = _lines(p)
    try:
        first = next(lines, None)
        return _header(p, first[1] if first else None)
    finally:
        lines.close()


def read_recording(path: str | Path) -> tuple[RecordingHeader, Iterator[Advert]]:
    """
    Open a recording: the header now (errors raise here), the advertisements as a stream.

    The file is opened again when iteration starts and closed when it ends, so an iterator that
    is never used holds no file.

    Raises:
        CaptureFormatError: naming ``file:line`` — here for the header, while iterating for the rest.
    """
    p = Path(path)
    header = read_header(p)

    def adverts() -> Iterator[Advert]:
        lines = _lines(p)
        where = _Where(p)
        try:
            next(lines, None)
            for n, line in lines:
                if line.strip():
                    where.n = n
                    yield parse_line(line, where)
        finally:
            lines.close()

    return header, adverts()
