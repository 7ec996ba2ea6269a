"""btsnoop captures: our writer read back by btsnoop-parser and BlueZ btmon; our reader on good, cut and damaged files."""

from __future__ import annotations

import datetime as dt
import gzip
import os
import struct
import subprocess

import btsnoop_parser
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from listenpost.agent.sources.btsnoop import (
    DATALINK_H4,
    DATALINK_MONITOR,
    EPOCH_DELTA_US,
    BtsnoopReader,
    BtsnoopWriter,
    read_btsnoop,
)
from listenpost.agent.sources.hci_events import advert_to_event
from listenpost.core.errors import CaptureFormatError, DecodeError
from listenpost.core.records import Advert
from tests.conftest import require_tool

T0 = 1_700_000_000_123_456  # Unix µs of the docs/references.md §3 vector
EVENT = bytes.fromhex(
    "3e13020103015544332211c00702010603097431c4"
)  # docs/references.md §2 legacy vector, no H4 byte


def _advert(i: int, rssi: int = -60) -> Advert:
    return Advert(
        0, f"C0:11:22:33:44:{i:02X}", 1, rssi, None, {0xFFFF: b"LP" + i.to_bytes(4, "big")}, {}, (), None
    )


def test_epoch_constant_is_bluez_form():
    """BlueZ writes (tv_sec - 946684800)·10⁶ + usec + 0x00E03AB44A676000; same offset (docs/references.md §3, BlueZ btsnoop.c)."""
    assert 0x00E03AB44A676000 - 946_684_800 * 10**6 == EPOCH_DELTA_US


def test_writer_matches_reference_vector(tmp_path):
    """Datalink 1002, one received event at 1700000000.123456: header and record bytes as in docs/references.md §3."""
    p = tmp_path / "h4.btsnoop"
    with BtsnoopWriter(p, DATALINK_H4) as w:
        w.write_event(T0, EVENT)
    raw = p.read_bytes()
    assert raw[:16].hex() == "6274736e6f6f7000000000010000" + "03ea"
    assert raw[16:40].hex() == "000000160000001600000003000000000" + "0e2e7d7274fa240"
    assert raw[40:] == b"\x04" + EVENT


@pytest.mark.parametrize("datalink", [DATALINK_H4, DATALINK_MONITOR])
def test_btsnoop_parser_reads_our_files(tmp_path, datalink):
    """PyPI btsnoop-parser 0.10 reads our captures: payload, direction, time, adapter index."""
    p = tmp_path / f"c{datalink}.btsnoop"
    with BtsnoopWriter(p, datalink) as w:
        for i in range(3):
            w.write_advert(T0 + i * 250_000, _advert(i), index=2)
    # reference_time just after the capture: the parser's epoch is 378 days off otherwise (docs/references.md §3)
    recs = [
        r
        for r in btsnoop_parser.iter_records(str(p), reference_time=dt.datetime(2023, 11, 15, tzinfo=dt.UTC))
        if r["packet_type"] == 4
    ]
    assert [r["payload"] for r in recs] == [advert_to_event(_advert(i)) for i in range(3)]
    assert {r["direction"] for r in recs} == {"RX"}
    assert recs[0]["timestamp"] == dt.datetime(2023, 11, 14, 22, 13, 20, 123456, tzinfo=dt.UTC)
    assert [r["timestamp"] - recs[0]["timestamp"] for r in recs] == [
        dt.timedelta(seconds=0.25 * i) for i in range(3)
    ]
    if datalink == DATALINK_MONITOR:
        assert {r["adapter"] for r in recs} == {2}
    # and ours reads them back
    got = list(read_btsnoop(p))
    assert [g.advert.address for g in got] == [f"C0:11:22:33:44:{i:02X}" for i in range(3)]
    assert [g.t_unix_us for g in got] == [T0, T0 + 250_000, T0 + 500_000]
    assert [g.advert.t_mono_ns for g in got] == [0, 250_000_000, 500_000_000]
    assert {g.hci_index for g in got} == {2 if datalink == DATALINK_MONITOR else 0}


@pytest.mark.parametrize("datalink", [DATALINK_H4, DATALINK_MONITOR])
def test_btmon_reads_our_files(tmp_path, datalink):
    """BlueZ btmon 5.66 `-r` decodes our capture: time, address and RSSI (golden check, docs/references.md §3)."""
    btmon = require_tool("btmon")
    p = tmp_path / "c.btsnoop"
    with BtsnoopWriter(p, datalink) as w:
        w.write_event(T0, EVENT)
        w.write_advert(T0 + 1_000_000, _advert(0x2B, rssi=-77))
    out = subprocess.run(
        [btmon, "-T", "-r", str(p)],
        capture_output=True,
        text=True,
        timeout=30,
        env={**os.environ, "TZ": "UTC"},
    ).stdout
    assert "2023-11-14 22:13:20.123456" in out
    assert "Address: C0:11:22:33:44:55" in out and "RSSI: -60 dBm (0xc4)" in out
    assert "Address: C0:11:22:33:44:2B" in out and "RSSI: -77 dBm (0xb3)" in out
    assert out.count("LE Advertising Report (0x02)") == 2


def test_h1_datalink_reads_events_only(tmp_path):
    """Datalink 1001 (no indicator byte): only records flagged received command/event are events."""
    p = tmp_path / "h1.btsnoop"
    rec = struct.Struct(">IIIIq")
    with open(p, "wb") as f:
        f.write(b"btsnoop\0" + struct.pack(">II", 1, 1001))
        for flags, pkt in ((0x2, b"\x0c\x20\x02\x01\x00"), (0x3, EVENT), (0x1, b"\x00" * 5)):
            f.write(rec.pack(len(pkt), len(pkt), flags, 0, T0 + EPOCH_DELTA_US) + pkt)
    got = list(read_btsnoop(p))
    assert [(g.advert.address, g.advert.rssi_dbm, g.advert.local_name) for g in got] == [
        ("C0:11:22:33:44:55", -60, "t1")
    ]


def _capture(tmp_path, n=4):
    p = tmp_path / "cap.btsnoop"
    with BtsnoopWriter(p, DATALINK_H4) as w:
        for i in range(n):
            w.write_advert(T0 + i * 1000, _advert(i))
    return p


def test_truncated_last_record_stops_with_warning(tmp_path):
    """A capture cut mid-record yields the whole records and counts the cut, without raising."""
    p = _capture(tmp_path)
    p.write_bytes(p.read_bytes()[:-5])
    r = BtsnoopReader(p)
    assert len(list(r)) == 3
    assert r.stats.truncated == 1 and r.stats.records == 3


def test_bad_header_names_the_file(tmp_path):
    """Wrong magic, version or datalink: CaptureFormatError naming the file."""
    p = tmp_path / "x.btsnoop"
    p.write_bytes(b"notsnoop" + bytes(8))
    with pytest.raises(CaptureFormatError, match=r"x\.btsnoop: not a btsnoop file"):
        list(read_btsnoop(p))
    p.write_bytes(b"btsnoop\0" + struct.pack(">II", 1, 1003))
    with pytest.raises(CaptureFormatError, match="datalink 1003 is not supported"):
        list(read_btsnoop(p))
    p.write_bytes(b"btsnoop\0" + struct.pack(">II", 2, 1002))
    with pytest.raises(CaptureFormatError, match="version 2"):
        list(read_btsnoop(p))


def test_impossible_record_length_names_the_record(tmp_path):
    """An included length larger than the original is damage, not truncation."""
    p = _capture(tmp_path, 2)
    raw = bytearray(p.read_bytes())
    second = 16 + 24 + raw[16 + 7]  # after the first record
    raw[second + 4 : second + 8] = struct.pack(">I", 0xFFFF)
    p.write_bytes(bytes(raw))
    with pytest.raises(CaptureFormatError, match="record 2: included length 65535"):
        list(read_btsnoop(p))


def test_bad_event_is_skipped_and_counted(tmp_path):
    """A well-framed record whose event does not decode is skipped; the next record still reads."""
    p = tmp_path / "c.btsnoop"
    with BtsnoopWriter(p, DATALINK_H4) as w:
        w.write_event(T0, EVENT[:-3])  # length byte now lies
        w.write_event(T0 + 1, EVENT)
    r = BtsnoopReader(p)
    assert len(list(r)) == 1
    assert r.stats.bad_events == 1 and "record 1" in r.stats.errors[0]


def test_rssi_unavailable_is_dropped_and_counted(tmp_path):
    """Reports with RSSI 127 give no Advert."""
    p = tmp_path / "c.btsnoop"
    with BtsnoopWriter(p, DATALINK_H4) as w:
        w.write_event(T0, EVENT[:-1] + b"\x7f")
    r = BtsnoopReader(p)
    assert list(r) == [] and r.stats.no_rssi == 1


def test_gzipped_capture_reads(tmp_path):
    """A gzip'd capture reads like the plain one."""
    p = _capture(tmp_path)
    gz = tmp_path / "cap.btsnoop.gz"
    gz.write_bytes(gzip.compress(p.read_bytes()))
    assert list(read_btsnoop(gz)) == list(read_btsnoop(p))


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    edits=st.lists(st.tuples(st.integers(0, 300), st.integers(0, 255)), max_size=6), cut=st.integers(0, 400)
)
def test_mutated_captures_raise_only_format_errors(tmp_path, edits, cut):
    """Corrupted or cut captures either read or raise DecodeError/CaptureFormatError, nothing else."""
    good = _capture(tmp_path, 5).read_bytes()
    b = bytearray(good[:cut])
    for pos, val in edits:
        if pos < len(b):
            b[pos] = val
    p = tmp_path / "m.btsnoop"
    p.write_bytes(bytes(b))
    try:
        list(read_btsnoop(p))
    except DecodeError:  # CaptureFormatError is a DecodeError
        pass
