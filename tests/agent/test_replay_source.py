"""Recorded logs (write, stream-read, errors), content detection, paced replay on a virtual clock, open_source."""

from __future__ import annotations

import asyncio
import gzip
import json
import sys

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from listenpost.agent.config import SourceConfig
from listenpost.agent.sources import FileKind, ReplaySource, detect_kind, open_replay, open_source
from listenpost.agent.sources.btsnoop import BtsnoopWriter
from listenpost.agent.sources.replay import RecordingWriter, read_header, read_recording, write_recording
from listenpost.core.clock import VirtualClock, settle
from listenpost.core.errors import CaptureFormatError, SourceReason, SourceUnavailable
from listenpost.core.records import Advert, uuid16_to_128

EDDY = uuid16_to_128(0xFEAA)


def _adv(t_s: float, i: int = 1, rssi: int = -70) -> Advert:
    return Advert(
        round(t_s * 1e9), f"C4:7A:10:00:2B:{i:02X}", 1, rssi, None, {0xFFFF: b"LP" + i.to_bytes(4, "big")}
    )


def _write(path, adverts, **kw):
    return write_recording(
        path, adverts, board=kw.get("board", "g0-a"), boot="boot-1", wall_at_start=1_800_000_000.0
    )


# ---------------------------------------------------------------- format


def test_round_trip_plain_and_gzip(tmp_path):
    """Every Advert field survives a write and a read, plain and gzip'd; gzip is detected by content."""
    adverts = [
        Advert(
            51_234_000_000,
            "C4:7A:10:00:2B:91",
            1,
            -67,
            -4,
            {0x004C: bytes.fromhex("0215aa")},
            {EDDY: b"\x00\xee", "4d2a0c1e-7f3b-4c55-9e61-2b8f0a7d3c10": b"\x01"},
            (EDDY, "12345678-0000-1000-8000-00805f9b34fb"),
            "tag-01",
        ),
        Advert(51_234_500_001, "C4:7A:10:00:2B:92", 0, -127, None),
        Advert(51_235_000_000, "C4:7A:10:00:2B:93", 3, 20, 127, {}, {}, (), ""),
    ]
    for name in ("r.jsonl", "r.jsonl.gz", "gz-without-suffix"):
        p = tmp_path / name
        assert _write(p, adverts) == 3
        if name == "gz-without-suffix":
            p.write_bytes(gzip.compress((tmp_path / "r.jsonl").read_bytes()))
        header, it = read_recording(p)
        assert (header.board, header.boot, header.wall_at_start, header.version) == (
            "g0-a",
            "boot-1",
            1.8e9,
            1,
        )
        assert list(it) == adverts
    assert (tmp_path / "r.jsonl.gz").read_bytes()[:2] == b"\x1f\x8b"


def test_line_layout_matches_developers_md(tmp_path):
    """Lines use the documented keys: 4-hex company ids and 16-bit UUIDs, hex payloads, optional keys left out."""
    p = tmp_path / "r.jsonl"
    _write(
        p,
        [
            Advert(
                1_500_000_000,
                "C4:7A:10:00:2B:91",
                1,
                -67,
                None,
                {0x004C: b"\x02\x15"},
                {EDDY: b"\x10"},
                (EDDY,),
            )
        ],
    )
    lines = p.read_text().splitlines()
    assert json.loads(lines[0]) == {
        "format": "listenpost-recording",
        "version": 1,
        "board": "g0-a",
        "boot": "boot-1",
        "wall_at_start": 1_800_000_000.0,
    }
    assert json.loads(lines[1]) == {
        "t": 1.5,
        "a": "C4:7A:10:00:2B:91",
        "at": 1,
        "r": -67,
        "m": {"004c": "0215"},
        "s": {"feaa": "10"},
        "u": ["feaa"],
    }


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(st.integers(0, 10**15), min_size=1, max_size=20))
def test_board_time_round_trips_to_the_nanosecond(tmp_path, ts):
    """Board times up to 10⁶ s come back to the exact nanosecond."""
    p = tmp_path / "t.jsonl"
    _write(p, [Advert(t, "C4:7A:10:00:2B:91", 1, -60) for t in ts])
    assert [a.t_mono_ns for a in read_recording(p)[1]] == ts


def _lines(p, *extra):
    p.write_text(
        "\n".join(
            [
                json.dumps(
                    {
                        "format": "listenpost-recording",
                        "version": 1,
                        "board": "g0-a",
                        "boot": "b",
                        "wall_at_start": 1.0,
                    }
                ),
                *extra,
            ]
        )
        + "\n"
    )


@pytest.mark.parametrize(
    ("line", "match"),
    [
        ('{"t": 1, "a": "c4:7a:10:00:2b:91", "at": 1, "r": -60}', "a: must be an upper-case colon address"),
        ('{"t": -1, "a": "C4:7A:10:00:2B:91", "at": 1, "r": -60}', "t: must be board seconds"),
        ('{"t": 1, "a": "C4:7A:10:00:2B:91", "at": 4, "r": -60}', r"at: must be an integer in 0\.\.3"),
        ('{"t": 1, "a": "C4:7A:10:00:2B:91", "at": 1, "r": 127}', r"r: must be an integer in -127\.\.20"),
        ('{"t": 1, "a": "C4:7A:10:00:2B:91", "at": 1}', "r: must be an integer"),
        (
            '{"t": 1, "a": "C4:7A:10:00:2B:91", "at": 1, "r": -60, "m": {"4c": "00"}}',
            "m: company id must be 4 hex",
        ),
        ('{"t": 1, "a": "C4:7A:10:00:2B:91", "at": 1, "r": -60, "m": {"004c": "0g"}}', "m.004c: not hex"),
        (
            '{"t": 1, "a": "C4:7A:10:00:2B:91", "at": 1, "r": -60, "s": {"xyz": "00"}}',
            "s: must be a 4-hex or 128-bit UUID",
        ),
        ('{"t": 1, "a": "C4:7A:10:00:2B:91", "at": 1, "r": -60, "u": "feaa"}', "u: must be a list"),
        ('{"t": 1, "a": "C4:7A:10:00:2B:91", "at": 1, "r": -60, "n": 5}', "n: must be a string"),
        ('{"t": 1, "a": "C4:7A:10:00:2B:91", "at": 1, "r": -60', "not JSON"),
        ("[1, 2]", "must be a JSON object"),
    ],
)
def test_bad_lines_name_file_line_and_field(tmp_path, line, match):
    """A bad advertisement line raises CaptureFormatError with file:line and the field."""
    p = tmp_path / "bad.jsonl"
    _lines(p, '{"t": 1, "a": "C4:7A:10:00:2B:91", "at": 1, "r": -60}', line)
    header, it = read_recording(p)
    assert next(it).rssi_dbm == -60
    with pytest.raises(CaptureFormatError, match=rf"bad\.jsonl:3: {match}"):
        next(it)


@pytest.mark.parametrize(
    ("text", "match"),
    [
        ("", "empty file"),
        ("nope\n", "header is not JSON"),
        ('{"format": "other", "version": 1}\n', "format: expected 'listenpost-recording'"),
        ('{"format": "listenpost-recording", "version": 2}\n', "version: expected 1, got 2"),
        (
            '{"format": "listenpost-recording", "version": 1, "board": "", "boot": "b", "wall_at_start": 1}\n',
            "board",
        ),
        (
            '{"format": "listenpost-recording", "version": 1, "board": "a", "boot": "b", "wall_at_start": "x"}\n',
            "wall_at_start",
        ),
    ],
)
def test_bad_header_raises_at_open(tmp_path, text, match):
    """Header problems raise when the recording is opened, naming file:1."""
    p = tmp_path / "h.jsonl"
    p.write_text(text)
    with pytest.raises(CaptureFormatError, match=rf"h\.jsonl:1: {match}"):
        read_recording(p)


def test_missing_file_and_not_utf8(tmp_path):
    """A missing file and non-UTF-8 bytes are CaptureFormatErrors naming the file."""
    with pytest.raises(CaptureFormatError, match="nothere.jsonl: cannot open"):
        read_recording(tmp_path / "nothere.jsonl")
    p = tmp_path / "bin.jsonl"
    _lines(p)
    p.write_bytes(p.read_bytes() + b'{"t": 1, "a": "\xff"}\n')
    with pytest.raises(CaptureFormatError, match=r"bin\.jsonl:2: not UTF-8"):
        list(read_recording(p)[1])


def test_reading_streams(tmp_path):
    """Early lines are yielded before a bad line far down the file is read."""
    p = tmp_path / "big.jsonl"
    _write(p, (_adv(i * 0.01) for i in range(5000)))
    with open(p, "a") as f:
        f.write("garbage\n")
    _, it = read_recording(p)
    assert [next(it).t_mono_ns for _ in range(3)] == [0, 10_000_000, 20_000_000]
    with pytest.raises(CaptureFormatError, match=r"big\.jsonl:5002: not JSON"):
        list(it)


def test_truncated_gzip_yields_what_it_has_then_names_the_line(tmp_path):
    """A gzip'd recording cut short (a killed recorder) gives its whole lines, then an error saying so."""
    p = tmp_path / "cut.jsonl.gz"
    _write(p, (_adv(i * 0.5, i % 50) for i in range(2000)))
    raw = p.read_bytes()
    p.write_bytes(raw[: len(raw) // 2])
    _, it = read_recording(p)
    got = []
    with pytest.raises(
        CaptureFormatError, match=r"cut\.jsonl\.gz:\d+: (compressed data ends early|not JSON)"
    ):
        for a in it:
            got.append(a)
    assert 0 < len(got) < 2000
    assert [a.t_mono_ns for a in got] == [round(i * 0.5 * 1e9) for i in range(len(got))]


def test_incremental_writer_counts(tmp_path):
    """RecordingWriter writes one line per advert and closes cleanly."""
    p = tmp_path / "w.jsonl.gz"
    with RecordingWriter(p, board="u4-b", boot="b", wall_at_start=5.0) as w:
        for i in range(10):
            w.write(_adv(i))
        assert w.count == 10
    assert read_header(p).board == "u4-b"
    assert len(list(read_recording(p)[1])) == 10


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    edits=st.lists(st.tuples(st.integers(0, 400), st.integers(0, 255)), max_size=5),
    cut=st.integers(0, 500),
    gz=st.booleans(),
)
def test_mutated_recordings_raise_only_capture_format_error(tmp_path, edits, cut, gz):
    """Corrupted or cut recordings (plain or gzip'd) either read or raise CaptureFormatError."""
    p = tmp_path / "m.jsonl"
    _write(p, [_adv(i, i, -60 - i) for i in range(4)])
    raw = p.read_bytes()
    b = bytearray(gzip.compress(raw) if gz else raw)[:cut]
    for pos, val in edits:
        if pos < len(b):
            b[pos] = val
    p.write_bytes(bytes(b))
    try:
        _, it = read_recording(p)
        list(it)
    except CaptureFormatError:
        pass


# ---------------------------------------------------------------- detection


def test_detect_kind_by_content(tmp_path):
    """Recordings (plain, gzip'd) and btsnoop captures are told apart by content, not name."""
    rec = tmp_path / "a.btsnoop"  # misleading name on purpose
    _write(rec, [_adv(1)])
    gz = tmp_path / "b.bin"
    gz.write_bytes(gzip.compress(rec.read_bytes()))
    cap = tmp_path / "c.jsonl"
    with BtsnoopWriter(cap) as w:
        w.write_advert(1_700_000_000_000_000, _adv(0))
    junk = tmp_path / "d.jsonl"
    junk.write_bytes(b"PK\x03\x04zip")
    assert detect_kind(rec) is FileKind.RECORDING
    assert detect_kind(gz) is FileKind.RECORDING
    assert detect_kind(cap) is FileKind.BTSNOOP
    with pytest.raises(
        CaptureFormatError, match="d.jsonl: neither a listenpost recording nor a btsnoop capture"
    ):
        detect_kind(junk)
    with pytest.raises(CaptureFormatError, match="cannot read"):
        open_replay([tmp_path / "missing"], VirtualClock(), 1)


# ---------------------------------------------------------------- pacing


class CountingClock(VirtualClock):
    """The virtual clock, counting the sleeps its user asked for."""

    def __init__(self) -> None:
        super().__init__(start=1000.0)
        self.sleeps: list[float] = []

    async def sleep(self, seconds: float) -> None:
        self.sleeps.append(seconds)
        await super().sleep(seconds)


async def _run_paced(src: ReplaySource, clock: VirtualClock, total: float) -> list[tuple[float, int]]:
    got: list[tuple[float, int]] = []

    async def consume() -> None:
        async for a in src.adverts():
            got.append((clock.monotonic(), a.t_mono_ns))

    task = asyncio.create_task(consume())
    await settle()
    await clock.advance(total)
    await asyncio.wait_for(task, 5)  # bounded: the task is already finished after the advance
    return got


TIMES = [10.0, 10.5, 12.0, 12.0, 15.0]


@pytest.mark.parametrize(
    ("speed", "offsets", "sleeps"),
    [
        # due at 2.0, but the wake-up at 0.5 allows the next one only a grain (2 s) later
        (1.0, [0.0, 0.5, 2.5, 2.5, 5.0], 3),
        # due at 0.2, 0.2 and 0.5, but the wake-up at 0.05 allows the next one only a grain later,
        # which hands over all three
        (10.0, [0.0, 0.05, 2.05, 2.05, 2.05], 2),
        (0.0, [0.0, 0.0, 0.0, 0.0, 0.0], 0),
    ],
)
async def test_pacing_on_virtual_clock(tmp_path, speed, offsets, sleeps):
    """
    At speed S each advert comes (t_i - t_0)/S of clock time after the first, or when due sooner than
    a grain after the last wake-up, one grain after that wake-up; speed 0 does not wait.
    """
    assert ReplaySource.PACING_GRAIN_S == 2.0  # the offsets below are worked out for it
    p = tmp_path / "r.jsonl"
    _write(p, [_adv(t, i) for i, t in enumerate(TIMES)])
    clock = CountingClock()
    got = await _run_paced(open_replay([p], clock, speed), clock, 10)
    assert [g[0] - 1000.0 for g in got] == pytest.approx(offsets, abs=1e-9)
    assert [g[1] for g in got] == [round(t * 1e9) for t in TIMES]  # board time as recorded
    assert len(clock.sleeps) == sleeps  # no sleep for the first, for equal times, nor for what is already due


async def test_slow_consumer_is_not_slowed_further(tmp_path):
    """When the consumer lags behind the schedule the source does not sleep at all."""
    p = tmp_path / "r.jsonl"
    _write(p, [_adv(i * 0.01) for i in range(50)])
    src_clock = CountingClock()
    src = open_replay([p], src_clock, 1.0)
    n = 0

    async def consume() -> None:
        nonlocal n
        async for _ in src.adverts():
            n += 1
            await VirtualClock.sleep(
                src_clock, 0.02
            )  # the consumer's own work, slower than the 10 ms schedule

    task = asyncio.create_task(consume())
    await settle()
    await src_clock.advance(2.0)
    await asyncio.wait_for(task, 5)
    assert n == 50 and src_clock.sleeps == []  # the consumer slept on the base class: the source never did


async def test_fast_replay_yields_to_the_loop(tmp_path):
    """Speed 0 still lets other tasks run now and then."""
    p = tmp_path / "r.jsonl"
    _write(p, [_adv(i * 0.01) for i in range(2000)])
    ticks = 0

    async def other() -> None:
        nonlocal ticks
        while True:
            ticks += 1
            await asyncio.sleep(0)

    t = asyncio.create_task(other())
    n = 0
    async for _ in open_replay([p], VirtualClock(), 0).adverts():
        n += 1
    t.cancel()
    assert n == 2000 and ticks >= 2000 // ReplaySource.YIELD_EVERY


async def test_several_files_play_in_order_including_btsnoop(tmp_path):
    """A recording then a capture: the capture's board time restarts at 0, which is not waited for."""
    rec = tmp_path / "a.jsonl"
    _write(rec, [_adv(100.0, 1), _adv(101.0, 2)])
    cap = tmp_path / "b.btsnoop"
    with BtsnoopWriter(cap) as w:
        w.write_advert(1_700_000_000_000_000, _adv(0, 3))
        w.write_advert(1_700_000_000_500_000, _adv(0, 4))
    clock = VirtualClock(start=0.0)
    got = await _run_paced(open_replay([rec, cap], clock, 1.0), clock, 5)
    # the last is due at 1.5, but the wake-up at 1.0 allows the next one only a grain (2 s) later
    assert [g[0] for g in got] == pytest.approx([0.0, 1.0, 1.0, 3.0])
    assert [g[1] for g in got] == [100_000_000_000, 101_000_000_000, 0, 500_000_000]


# ---------------------------------------------------------------- open_source


def test_open_source_kinds(tmp_path):
    """The factory builds each kind; a btsnoop kind refuses a recording."""
    rec = tmp_path / "a.jsonl"
    _write(rec, [_adv(1)])
    clock = VirtualClock()
    assert isinstance(
        open_source(SourceConfig(kind="replay", files=(str(rec),), speed=2.0), clock), ReplaySource
    )
    with pytest.raises(CaptureFormatError, match="source.kind is 'btsnoop' but this is a recording"):
        open_source(SourceConfig(kind="btsnoop", files=(str(rec),)), clock)
    from listenpost.agent.sources.bleak_scan import BleakSource
    from listenpost.agent.sources.hci import HciSource

    b = open_source(SourceConfig(kind="bleak", adapter="hci1", stall_seconds=30), clock)
    assert isinstance(b, BleakSource) and b.adapter == "hci1" and b.stall_seconds == 30
    h = open_source(SourceConfig(kind="hci", adapter="hci2"), clock)
    assert isinstance(h, HciSource) and h.dev_id == 2


def test_open_source_names_a_missing_package(monkeypatch):
    """Without bleak installed, the bleak source says which package is missing."""
    monkeypatch.setitem(sys.modules, "bleak", None)
    monkeypatch.delitem(sys.modules, "listenpost.agent.sources.bleak_scan", raising=False)
    with pytest.raises(SourceUnavailable, match="needs the Python package 'bleak'") as e:
        open_source(SourceConfig(kind="bleak"), VirtualClock())
    assert e.value.reason is SourceReason.OTHER


def test_overlong_line_is_refused_without_reading_it_all(tmp_path):
    """A line beyond 64 KiB (e.g. a binary file with a brace first) is an error naming the line."""
    p = tmp_path / "long.jsonl"
    _lines(p, "{" + "x" * 200_000)
    with pytest.raises(CaptureFormatError, match=r"long\.jsonl:2: line longer than 65536 bytes"):
        list(read_recording(p)[1])


async def test_paced_replay_sleeps_per_grain_not_per_advert(tmp_path):
    """
    A dense replay wakes at most once per pacing grain, never once per advert, and no advert is handed
    over before its time nor later than one grain after it.
    """
    n, span = 2000, 10.0  # 200 adverts/s over 10 s of board time, uneven gaps
    times = sorted(10.0 + span * ((i * 7919) % n) / n for i in range(n))
    p = tmp_path / "r.jsonl"
    _write(p, [_adv(t, i % 200) for i, t in enumerate(times)])
    clock = CountingClock()
    got = await _run_paced(open_replay([p], clock, 1.0), clock, span + 1)
    assert len(got) == n
    grain = ReplaySource.PACING_GRAIN_S
    assert len(clock.sleeps) <= span / grain + 2
    for (at, t_ns), t in zip(got, times, strict=True):
        due = 1000.0 + (t - times[0])
        assert due - 1e-9 <= at <= due + grain + 1e-9, (at, due)
        assert t_ns == round(t * 1e9)  # board time as recorded, however late the hand-over


# ---------------------------------------------------------------- batches


async def _run_batches(
    src: ReplaySource, clock: VirtualClock, total: float
) -> list[tuple[float, list[Advert]]]:
    got: list[tuple[float, list[Advert]]] = []

    async def consume() -> None:
        async for batch in src.batches():
            got.append((clock.monotonic(), list(batch)))

    task = asyncio.create_task(consume())
    await settle()
    await clock.advance(total)
    await asyncio.wait_for(task, 5)
    return got


async def test_batches_hand_each_advert_over_once_in_order_as_one_by_one(tmp_path):
    """
    Paced batches, flattened, are the recording itself: same order, nothing dropped or repeated across
    wake-ups, board times as recorded and equal to those of one wake-up per advert. Each batch comes at
    one wake-up, every advert in it due by then and at most one grain late.
    """
    n, span = 2000, 10.0
    times = sorted(10.0 + span * ((i * 7919) % n) / n for i in range(n))
    p = tmp_path / "r.jsonl"
    _write(p, [_adv(t, i % 200, -40 - i % 50) for i, t in enumerate(times)])
    recorded = list(read_recording(p)[1])

    clock = CountingClock()
    src = open_replay([p], clock, 1.0)
    got = await _run_batches(src, clock, span + 2)
    assert all(batch for _, batch in got)
    assert [a for _, batch in got for a in batch] == recorded
    assert src.count == n
    grain = ReplaySource.PACING_GRAIN_S
    assert len(clock.sleeps) <= span / grain + 2  # wake-ups; a batch is split past YIELD_EVERY
    assert max(len(batch) for _, batch in got) <= ReplaySource.YIELD_EVERY
    for at, batch in got:
        for a in batch:
            due = 1000.0 + (a.t_mono_ns / 1e9 - times[0])
            assert due - 1e-9 <= at <= due + grain + 1e-9, (at, due)

    # the per-advert path: no grain, one wake-up per advert, handed over one at a time
    clock1 = CountingClock()
    one = open_replay([p], clock1, 1.0)
    one.PACING_GRAIN_S = 0.0  # type: ignore[misc]  # an instance attribute shadows the class constant
    singles = await _run_paced(one, clock1, span + 2)
    assert [t for _, t in singles] == [a.t_mono_ns for _, batch in got for a in batch]
    assert len(clock1.sleeps) > len(clock.sleeps) * 10


async def test_unpaced_batches_are_bounded_and_let_the_loop_turn(tmp_path):
    """Speed 0: batches of at most YIELD_EVERY, all adverts once, another task runs between batches."""
    n = 1000
    p = tmp_path / "r.jsonl"
    _write(p, [_adv(i * 0.01, i % 200) for i in range(n)])
    ticks: list[int] = []
    count = 0

    async def other() -> None:
        while True:
            ticks.append(count)
            await asyncio.sleep(0)

    t = asyncio.create_task(other())
    await asyncio.sleep(0)
    sizes = []
    async for batch in open_replay([p], VirtualClock(), 0).batches():
        sizes.append(len(batch))
        count += len(batch)
    t.cancel()
    cap = ReplaySource.YIELD_EVERY
    assert sum(sizes) == n and max(sizes) <= cap and len(sizes) == -(-n // cap)
    assert {c for c in ticks if 0 < c < n} == set(range(cap, n, cap))  # a turn after each full batch


async def test_a_bad_line_ends_the_batches_after_handing_over_what_came_before(tmp_path):
    """The adverts before a broken line still arrive, then the error names file:line."""
    p = tmp_path / "r.jsonl"
    _write(p, [_adv(i * 0.01, i) for i in range(5)])
    p.write_text(p.read_text() + '{"t": 1.0, "a": "not an address", "at": 1, "r": -70}\n')
    src = open_replay([p], VirtualClock(), 0)
    got: list[Advert] = []
    with pytest.raises(CaptureFormatError, match=r"r\.jsonl:7: a: must be an upper-case colon address"):
        async for batch in src.batches():
            got.extend(batch)
    assert [a.t_mono_ns for a in got] == [round(i * 0.01 * 1e9) for i in range(5)] and src.count == 5
