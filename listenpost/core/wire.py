"""
Wire protocol v1: the batch body both sides agree on.

The agent's uplink writes it, the collector's api validates it; both use these functions, so
the digest and the columnar layout have exactly one definition.

A batch body (JSON, usually gzip'd)::

    {"v": 1, "board": "g0-a", "boot": "<boot id>", "epoch": "<16 hex>", "seq": 17,
     "digest": "<sha256 hex of the content>", "clock": {"t1":..,"t2":..,"t3":..,"t4":..} | null,
     "t1": <board monotonic seconds at send>,
     "content": {                       # what the digest covers; fixed at seal time
        "boot": "<boot id>", "offset_db": 2.5,
        "readings": {"t0_ms": 51234, "dt_ms": [0, 3, ...], "tags": ["ibeacon:...", ...],
                     "tag": [0, 1, ...], "rssi_dd": [-671, ...]},
        "telemetry": [{"tag": "...", "t_ms": 51240, "battery_mv": 2980, ...}],
        "gap": null | {"first_seq": 3, "last_seq": 9, "readings": 4200, "reason": "spool_full"}}}

- ``t0_ms``/``dt_ms``: board monotonic milliseconds of the first reading, then non-negative deltas
  (readings are sorted by time when sealed).
- ``tag``: index into ``tags``, the distinct identities of this batch.
- ``rssi_dd``: RSSI after the board offset, in tenths of a dB (``offset_db`` says what was added).
- ``clock``: the four timestamps of the *previous* exchange (RFC 5905): t1 board send and t4 board
  receive in board monotonic seconds, t2/t3 collector receive/reply in collector Unix seconds.
- A gap record has ``readings`` empty and ``gap`` set; it takes its own ``seq``.
"""

from __future__ import annotations

import hashlib
import json
import math
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from itertools import accumulate
from typing import Any

from listenpost.core import jsonload
from listenpost.core.errors import DecodeError
from listenpost.core.identity import parse_tag_id
from listenpost.core.records import Reading, Telemetry

VERSION = 1
GAP_REASONS = ("spool_full", "spool_corrupt", "dead_letter")
MAX_BOARD_S = 2**53 / 1000
"""Largest board monotonic time in seconds (``t0_ms`` is below 2⁵³ ms); board times are never negative."""
MAX_TELEMETRY_ABS = 2**53
"""Telemetry numbers beyond this are not measurements (and would not fit a database integer)."""
_MAX_COUNT = 2**62
"""Bound of seqs and gap counts: a signed 64-bit database integer holds them."""
BOOT_ID = re.compile(r"[!-~]{1,64}")
"""A boot id: 1 to 64 printable ASCII characters without space (whole-string match)."""
"""A boot id: 1-64 printable ASCII characters without spaces (Linux gives a UUID)."""


class WireError(DecodeError):
    """A batch body that breaks the protocol; ``field`` names the offending field."""

    def __init__(self, field: str, problem: str) -> None:
        super().__init__(f"{field}: {problem}")
        self.field = field


def canonical_json(obj: Any) -> bytes:
    """The one serialisation the digest is computed over."""
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=True, allow_nan=False).encode()


def digest(content: Mapping[str, Any] | bytes) -> str:
    """sha256 hex of the canonical content (given as a mapping, or as its canonical bytes)."""
    raw = content if isinstance(content, bytes) else canonical_json(content)
    return hashlib.sha256(raw).hexdigest()


def encode_content(
    readings: Sequence[Reading], *, boot: str, offset_db: float, gap: Mapping[str, Any] | None = None
) -> dict[str, Any]:
    """Columnar content of one sealed batch (readings sorted by time here)."""
    rs = sorted(readings, key=lambda r: r.t_mono_ns)
    tags: dict[str, int] = {}
    t_ms = [r.t_mono_ns // 1_000_000 for r in rs]
    cols: dict[str, Any] = {
        "t0_ms": t_ms[0] if t_ms else 0,
        "dt_ms": [b - a for a, b in zip([t_ms[0], *t_ms[:-1]] if t_ms else [], t_ms, strict=True)],
        "tags": [],
        "tag": [tags.setdefault(r.tag, len(tags)) for r in rs],
        "rssi_dd": [round(r.rssi_dbm * 10) for r in rs],
    }
    cols["tags"] = list(tags)
    telemetry = [
        {
            "tag": r.tag,
            "t_ms": r.t_mono_ns // 1_000_000,
            **{
                k: v
                for k, v in (
                    ("battery_mv", r.telemetry.battery_mv),
                    ("temperature_c", r.telemetry.temperature_c),
                    ("adv_count", r.telemetry.adv_count),
                    ("uptime_s", r.telemetry.uptime_s),
                )
                if v is not None
            },
        }
        for r in rs
        if r.telemetry is not None
    ]
    return {
        "boot": boot,
        "offset_db": float(offset_db),
        "readings": cols,
        "telemetry": telemetry,
        "gap": dict(gap) if gap is not None else None,
    }


@dataclass(frozen=True, slots=True)
class DecodedContent:
    """A validated batch content, unpacked to one row per reading."""

    boot: str
    offset_db: float
    t_ms: list[int]
    tags: list[str]
    rssi_dd: list[int]
    telemetry: list[dict[str, Any]]
    gap: dict[str, Any] | None

    def readings(self) -> Iterable[Reading]:
        tel = {(t["tag"], t["t_ms"]): t for t in self.telemetry}
        for t, tag, rssi in zip(self.t_ms, self.tags, self.rssi_dd, strict=True):
            x = tel.get((tag, t))
            yield Reading(
                tag,
                t * 1_000_000,
                rssi / 10,
                Telemetry(x.get("battery_mv"), x.get("temperature_c"), x.get("adv_count"), x.get("uptime_s"))
                if x
                else None,
            )


def check_boot(v: Any, field: str) -> str:
    """A boot id as `BOOT_ID` allows; raises `WireError` naming ``field``."""
    if not isinstance(v, str) or not BOOT_ID.fullmatch(v):
        raise WireError(field, f"must be 1-64 printable ASCII characters without spaces, got {v!r:.80}")
    return v


_CANONICAL: set[str] = set()
"""Identities already found canonical: a fleet repeats the same few hundred in every batch, and
`parse_tag_id` costs microseconds each. Bounded by `_CANONICAL_MAX` (cleared when full)."""
_CANONICAL_MAX = 50_000


def _known_canonical(values: list[Any]) -> bool:
    """Every value already found canonical (one set operation in C, the common case of a batch's tags)."""
    try:
        return _CANONICAL.issuperset(values)
    except TypeError:  # an unhashable value: `check_tag` names it
        return False


def check_tag(v: Any, field: str) -> str:
    """A tag identity in canonical form (`listenpost.core.identity`), the only form a board sends."""
    if not isinstance(v, str) or len(v) > 200:
        raise WireError(field, "must be a tag identity string of at most 200 characters")
    if v in _CANONICAL:
        return v
    try:
        canonical = parse_tag_id(v)
    except DecodeError as e:
        raise WireError(field, f"not a tag identity: {e}") from None
    if canonical != v:
        raise WireError(field, f"not in canonical form {canonical!r}")
    if len(_CANONICAL) >= _CANONICAL_MAX:
        _CANONICAL.clear()
    _CANONICAL.add(v)
    return v


def board_seconds(v: Any, field: str) -> float:
    """Board monotonic seconds: a finite number in 0..`MAX_BOARD_S`."""
    if not isinstance(v, int | float) or isinstance(v, bool) or not 0 <= v <= MAX_BOARD_S:
        raise WireError(field, f"must be board monotonic seconds, 0..{MAX_BOARD_S:.0f}, got {v!r}")
    return float(v)


def _int_list(obj: Any, field: str, lo: int, hi: int) -> list[int]:
    if not isinstance(obj, list):
        raise WireError(field, "must be a list of integers")
    # Fast path for what json.loads produces (plain ints): the type test and the range test run in C,
    # not once per element in Python. Anything else falls through to the loop, which names the first bad
    # index exactly as before (and still accepts int subclasses other than bool).
    if not obj or (set(map(type, obj)) == {int} and lo <= min(obj) and max(obj) <= hi):
        return obj
    for i, v in enumerate(obj):
        if not isinstance(v, int) or isinstance(v, bool) or not lo <= v <= hi:
            raise WireError(f"{field}[{i}]", f"must be an integer in {lo}..{hi}, got {v!r}")
    return obj


def decode_content(content: Any, *, max_readings: int = 200_000) -> DecodedContent:
    """Validate a batch content and unpack it; raises `WireError` naming the first bad field."""
    if not isinstance(content, dict):
        raise WireError("content", "must be an object")
    boot = check_boot(content.get("boot"), "content.boot")
    offset = content.get("offset_db")
    if (
        not isinstance(offset, int | float)
        or isinstance(offset, bool)
        or not math.isfinite(offset)
        or abs(offset) > 40
    ):
        raise WireError("content.offset_db", f"must be a number within ±40, got {offset!r}")
    gap = content.get("gap")
    if gap is not None:
        if not isinstance(gap, dict):
            raise WireError("content.gap", "must be an object or null")
        for k in ("first_seq", "last_seq", "readings"):
            v = gap.get(k)
            if not isinstance(v, int) or isinstance(v, bool) or not 0 <= v < _MAX_COUNT:
                raise WireError(f"content.gap.{k}", f"must be an integer in 0..2^62-1, got {v!r}")
        if gap["last_seq"] < gap["first_seq"]:
            raise WireError("content.gap.last_seq", "must be >= first_seq")
        if gap.get("reason") not in GAP_REASONS:
            raise WireError(
                "content.gap.reason", f"must be one of {', '.join(GAP_REASONS)}, got {gap.get('reason')!r}"
            )
    cols = content.get("readings")
    if not isinstance(cols, dict):
        raise WireError("content.readings", "must be an object")
    t0 = cols.get("t0_ms")
    if not isinstance(t0, int) or isinstance(t0, bool) or not 0 <= t0 < 2**53:
        raise WireError("content.readings.t0_ms", f"must be a non-negative integer, got {t0!r}")
    dt = _int_list(cols.get("dt_ms"), "content.readings.dt_ms", 0, 2**40)
    n = len(dt)
    if n > max_readings:
        raise WireError("content.readings", f"has {n} readings, more than {max_readings}")
    tags = cols.get("tags")
    if not isinstance(tags, list):
        raise WireError("content.readings.tags", "must be a list of tag identity strings")
    if not _known_canonical(tags):
        for i, x in enumerate(tags):
            check_tag(x, f"content.readings.tags[{i}]")
    idx = _int_list(cols.get("tag"), "content.readings.tag", 0, max(len(tags) - 1, 0))
    rssi = _int_list(cols.get("rssi_dd"), "content.readings.rssi_dd", -2000, 500)
    if len(idx) != n or len(rssi) != n:
        raise WireError(
            "content.readings", f"columns differ in length: dt_ms {n}, tag {len(idx)}, rssi_dd {len(rssi)}"
        )
    if n and not tags:
        raise WireError("content.readings.tags", "is empty but there are readings")
    if gap is not None and n:
        raise WireError("content.gap", "a gap record carries no readings")
    t_ms = list(accumulate(dt, initial=t0))
    del t_ms[0]
    telemetry = content.get("telemetry") or []
    if not isinstance(telemetry, list):
        raise WireError("content.telemetry", "must be a list")
    known = set(tags)
    for i, x in enumerate(telemetry):
        if not isinstance(x, dict):
            raise WireError(f"content.telemetry[{i}]", "must be an object with tag and t_ms")
        if x.get("tag") not in known:
            raise WireError(f"content.telemetry[{i}].tag", "must be one of content.readings.tags")
        t = x.get("t_ms")
        if not isinstance(t, int) or isinstance(t, bool) or not 0 <= t < 2**53:
            raise WireError(f"content.telemetry[{i}].t_ms", f"must be board milliseconds, got {t!r}")
        for k in ("battery_mv", "temperature_c", "adv_count", "uptime_s"):
            v = x.get(k)
            if v is not None and (
                not isinstance(v, int | float)
                or isinstance(v, bool)
                or not math.isfinite(v)
                or abs(v) > MAX_TELEMETRY_ABS
            ):
                raise WireError(f"content.telemetry[{i}].{k}", f"must be a number within ±2^53, got {v!r}")
    return DecodedContent(boot, float(offset), t_ms, list(map(tags.__getitem__, idx)), rssi, telemetry, gap)


# ------------------------------------------------------------------ the batch envelope


@dataclass(frozen=True, slots=True)
class BatchEnvelope:
    """The outer fields of ``POST /v1/batches`` plus the validated content (docs/wire-protocol.md)."""

    board: str
    boot: str
    """The board's boot at send time (content.boot is the boot at seal time; they differ after a reboot)."""
    epoch: str
    seq: int
    digest: str
    t1: float
    """Board monotonic seconds at send, in ``boot``."""
    clock: tuple[float, float, float, float] | None
    """The previous exchange's t1..t4, or ``None`` on the first request of a boot."""
    content: DecodedContent


def encode_batch(
    *,
    board: str,
    boot: str,
    epoch: str,
    seq: int,
    digest: str,
    t1: float,
    clock: Mapping[str, float] | None,
    content: bytes,
) -> bytes:
    """
    One request body of ``POST /v1/batches``.

    ``content`` is the canonical JSON the digest was computed over at seal time: it goes into the body
    as the very bytes that were digested, never decoded and encoded again.
    """
    head = canonical_json(
        {
            "v": VERSION,
            "board": board,
            "boot": boot,
            "epoch": epoch,
            "seq": seq,
            "digest": digest,
            "clock": dict(clock) if clock is not None else None,
            "t1": t1,
        }
    )
    return head[:-1] + b',"content":' + content + b"}"


def _finite(obj: Mapping[str, Any], key: str, field: str) -> float:
    v = obj.get(key)
    if not isinstance(v, int | float) or isinstance(v, bool) or not math.isfinite(v):
        raise WireError(field, f"must be a finite number, got {v!r}")
    return float(v)


def parse_clock(obj: Any, field: str = "clock") -> tuple[float, float, float, float] | None:
    """Validate a ``{"t1".."t4"}`` exchange (or null): board send ≤ board receive, collector receive ≤ reply."""
    if obj is None:
        return None
    if not isinstance(obj, dict):
        raise WireError(field, "must be an object with t1..t4, or null")
    t1, t4 = (board_seconds(obj.get(k), f"{field}.{k}") for k in ("t1", "t4"))
    t2, t3 = (_finite(obj, k, f"{field}.{k}") for k in ("t2", "t3"))
    if t4 < t1:
        raise WireError(f"{field}.t4", "must be >= t1 (board receive after board send)")
    if t3 < t2:
        raise WireError(f"{field}.t3", "must be >= t2 (collector reply after collector receive)")
    return t1, t2, t3, t4


EPOCH = re.compile(r"[0-9a-f]{8,32}")
"""A spool epoch: 8 to 32 lower-case hex digits (whole-string match)."""
DIGEST = re.compile(r"[0-9a-f]{64}")
"""A SHA-256 digest in lower-case hex (whole-string match)."""


_CONTENT_MEMBER = b',"content":'


def parse_batch_body(data: bytes, *, max_readings: int) -> BatchEnvelope:
    """
    Parse (`jsonload.loads`) and validate a request body as sent; raises `WireError` naming the first bad
    field, or `jsonload.JsonError` for a body that is not strict JSON.

    A body laid out as `encode_batch` lays it out (the envelope, then ``"content"`` last) is parsed in its
    two parts, so the content's own bytes are at hand: when they hash to the digest they are the canonical
    bytes the digest was taken over, and the content need not be encoded again to check it (re-encoding
    costs more than parsing). Any other layout is parsed whole and its content re-encoded.
    """
    head, sep, tail = data.partition(_CONTENT_MEMBER)
    if sep and tail.endswith(b"}"):
        try:
            body = jsonload.loads(head + b"}")
            raw = tail[:-1]
            if isinstance(body, dict) and "content" not in body:
                body["content"] = jsonload.loads(raw, max_depth=jsonload.MAX_DEPTH - 1)
                return parse_batch(body, max_readings=max_readings, content_bytes=raw)
        except jsonload.JsonError:
            pass  # not split where it seemed: the whole body says what is wrong
    return parse_batch(jsonload.loads(data), max_readings=max_readings)


def parse_batch(body: Any, *, max_readings: int, content_bytes: bytes | None = None) -> BatchEnvelope:
    """
    Validate a batch body; raises `WireError` whose ``field`` names the first bad field.

    ``content_bytes``: the content's text exactly as it stood in the body; if it hashes to the digest, the
    digest holds without encoding the content again.
    """
    if not isinstance(body, dict):
        raise WireError("body", "must be a JSON object")
    if body.get("v") != VERSION:
        raise WireError("v", f"must be {VERSION}, got {body.get('v')!r}")
    board = body.get("board")
    if not isinstance(board, str) or not board:
        raise WireError("board", "must be the board name")
    boot = check_boot(body.get("boot"), "boot")
    epoch = body.get("epoch")
    if not isinstance(epoch, str) or not EPOCH.fullmatch(epoch):
        raise WireError("epoch", f"must be 8-32 lower-case hex characters, got {epoch!r}")
    seq = body.get("seq")
    if not isinstance(seq, int) or isinstance(seq, bool) or not 0 <= seq < _MAX_COUNT:
        raise WireError("seq", f"must be a non-negative integer, got {seq!r}")
    dig = body.get("digest")
    if not isinstance(dig, str) or not DIGEST.fullmatch(dig):
        raise WireError("digest", "must be 64 lower-case hex characters (sha256)")
    t1 = board_seconds(body.get("t1"), "t1")
    clock = parse_clock(body.get("clock"))
    raw = body.get("content")
    if not isinstance(raw, dict):
        raise WireError("content", "must be an object")
    content = decode_content(raw, max_readings=max_readings)
    as_sent = content_bytes is not None and digest(content_bytes) == dig and _canonical(raw, content_bytes)
    if not as_sent and digest(raw) != dig:
        raise WireError("digest", "does not match the content")
    return BatchEnvelope(board, boot, epoch, seq, dig, t1, clock, content)


_INT_COLUMNS = ("dt_ms", "tag", "rssi_dd")
_HOLE = b'"\\u0000"'
"""A NUL string as `canonical_json` writes it: no content holds one (`jsonload` refuses NUL)."""


def _canonical(raw: dict[str, Any], sent: bytes) -> bool:
    """
    Whether ``sent``, which parses to the validated content ``raw``, is ``canonical_json(raw)``: only then
    is its hash the content's digest (a content laid out otherwise, a key twice, ``1.00`` for ``1.0``,
    would else be stored under a digest of its own). The readings' integer columns, nearly all of the
    bytes, are not encoded again: everything else is, with a hole for each column, and each column's text
    as sent must be integers and commas only. That text parsed (``sent`` is valid JSON) as a list of
    integers, so it is canonical unless it spells zero ``-0``.
    """
    shell = {**raw, "readings": {**raw["readings"], **dict.fromkeys(_INT_COLUMNS, "\x00")}}
    pieces = canonical_json(shell).split(_HOLE)
    pos = 0
    for i, piece in enumerate(pieces):
        if not sent.startswith(piece, pos):
            return False
        pos += len(piece)
        if i == len(pieces) - 1:
            break
        end = sent.find(b"]", pos) + 1
        col = sent[pos:end]
        if not col.startswith(b"[") or col.translate(None, b"0123456789,-") != b"[]" or b"-0" in col:
            return False
        pos = end
    return pos == len(sent)
