"""The pipeline: decode → filter → calibrate, its counters, its loop, and the privacy rule."""

from __future__ import annotations

import asyncio
import random
import uuid
from collections.abc import AsyncIterator, Sequence

import pytest
import structlog

from listenpost.agent.pipeline import STATS_DOC, build_pipeline
from listenpost.agent.pipeline.decode import EDDYSTONE_UUID
from listenpost.core.records import Advert, Reading, Telemetry, uuid16_to_128
from listenpost.core.settings import DecodeRule

VENUE = uuid.UUID("4d2a0c1e-7f3b-4c55-9e61-2b8f0a7d3c10")
NAMESPACE = bytes.fromhex("8b0ca750e7a74e14bd99")
LPX = DecodeRule("lpx", company_id=0xFFFF, prefix=b"\x4c\x50", offset=2, length=4)


class ListSource:
    """A radio-edge fake: yields the given adverts, then ends."""

    def __init__(self, adverts: Sequence[Advert]) -> None:
        self._adverts = adverts

    async def adverts(self) -> AsyncIterator[Advert]:
        for a in self._adverts:
            yield a


def ibeacon(addr: str, u: uuid.UUID, major: int, minor: int, t: int, rssi: int = -70) -> Advert:
    return Advert(
        t,
        addr,
        1,
        rssi,
        None,
        {0x004C: b"\x02\x15" + u.bytes + major.to_bytes(2, "big") + minor.to_bytes(2, "big") + b"\xc5"},
    )


def eddy_uid(addr: str, ns: bytes, inst: int, t: int, rssi: int = -70) -> Advert:
    return Advert(
        t,
        addr,
        1,
        rssi,
        None,
        {},
        {EDDYSTONE_UUID: b"\x00\xec" + ns + inst.to_bytes(6, "big") + b"\0\0"},
        (EDDYSTONE_UUID,),
    )


def eddy_tlm(addr: str, t: int, rssi: int = -70) -> Advert:
    return Advert(t, addr, 1, rssi, None, {}, {EDDYSTONE_UUID: bytes.fromhex("20000bb817c0000004d200008ca0")})


def lpx(addr: str, n: int, t: int, rssi: int = -70) -> Advert:
    return Advert(t, addr, 1, rssi, None, {0xFFFF: b"\x4c\x50" + n.to_bytes(4, "big")})


class TestProcess:
    def test_mixed_adverts(self):
        """Registered tags of every kind come out calibrated; the counters account for every advert."""
        tags = [
            f"ibeacon:{VENUE}:7:1",
            f"eddystone:{NAMESPACE.hex()}:000000000001",
            "lpx:00000007",
            "mac:C4:7A:10:00:2B:91",
        ]
        p = build_pipeline(tags, [LPX], offset_db=2.0)
        adverts = [
            ibeacon("D0:00:00:00:00:01", VENUE, 7, 1, 1, -60),  # registered
            ibeacon("D0:00:00:00:00:02", VENUE, 7, 2, 2),  # unregistered minor
            eddy_uid("D0:00:00:00:00:03", NAMESPACE, 1, 3, -61),  # registered
            eddy_tlm("D0:00:00:00:00:03", 4, -62),  # its telemetry
            eddy_tlm("D0:00:00:00:00:04", 5),  # TLM, no UID seen
            lpx("D0:00:00:00:00:05", 7, 6, -63),  # registered custom tag
            Advert(7, "C4:7A:10:00:2B:91", 0, -64),  # registered by address
            Advert(8, "D0:00:00:00:00:06", 1, -65),  # a phone
            Advert(9, "D0:00:00:00:00:07", 1, -66, None, {0x004C: b"\x02\x15\x00"}),  # truncated
        ]
        out = [r for a in adverts if (r := p.process(a)) is not None]
        assert [
            Reading(f"ibeacon:{VENUE}:7:1", 1, -58.0),
            Reading(f"eddystone:{NAMESPACE.hex()}:000000000001", 3, -59.0),
            Reading(
                f"eddystone:{NAMESPACE.hex()}:000000000001", 4, -60.0, Telemetry(3000, 23.75, 1234, 3600.0)
            ),
            Reading("lpx:00000007", 6, -61.0),
            Reading("mac:C4:7A:10:00:2B:91", 7, -62.0),
        ] == out
        assert {
            "adverts_total": 9,
            "adverts_decoded": 6,
            "adverts_registered": 5,
            "dropped_unregistered": 1,
            "no_identity": 1,
            "decode_errors": 1,
            "tlm_unmatched": 1,
            "dropped_other": 0,
            "readings_total": 5,
            "telemetry_total": 1,
            "registered_tags": 4,
        } == p.stats()
        assert set(STATS_DOC) == set(p.stats())

    def test_update_tags_and_offset_between_adverts(self):
        """The collector's config can change the tag set and the offset while the pipeline runs."""
        p = build_pipeline([f"ibeacon:{VENUE}:7:1"])
        assert p.process(ibeacon("D0:00:00:00:00:01", VENUE, 7, 2, 1)) is None
        p.update_tags([f"ibeacon:{VENUE}:7:2", "mac:D0:00:00:00:00:09"])
        p.set_offset_db(-1.5)
        assert Reading(f"ibeacon:{VENUE}:7:2", 2, -71.5) == p.process(
            ibeacon("D0:00:00:00:00:01", VENUE, 7, 2, 2)
        )
        assert Reading("mac:D0:00:00:00:00:09", 3, -81.5) == p.process(Advert(3, "D0:00:00:00:00:09", 1, -80))
        assert p.process(ibeacon("D0:00:00:00:00:01", VENUE, 7, 1, 4)) is None


class TestRun:
    async def test_sync_and_async_sinks(self):
        """run hands every surviving reading to the sink, awaiting it when it is a coroutine function."""
        adverts = [ibeacon("D0:00:00:00:00:01", VENUE, 7, i % 3, i) for i in range(30)]
        got_sync: list[Reading] = []
        p1 = build_pipeline([f"ibeacon:{VENUE}:7:1"])
        await p1.run(ListSource(adverts), got_sync.append)

        got_async: list[Reading] = []

        async def sink(r: Reading) -> None:
            await asyncio.sleep(0)
            got_async.append(r)

        p2 = build_pipeline([f"ibeacon:{VENUE}:7:1"])
        await p2.run(ListSource(adverts), sink)
        assert [a.t_mono_ns for a in adverts if a.manufacturer_data[0x004C][-2] == 1] == [
            r.t_mono_ns for r in got_sync
        ]
        assert got_sync == got_async
        assert 10 == p1.stats()["readings_total"] == p2.stats()["readings_total"]

    async def test_long_run_lets_other_tasks_in(self):
        """A source that never blocks still leaves the event loop to others (heartbeat, uplink)."""
        adverts = [Advert(i, "D0:00:00:00:00:01", 1, -70) for i in range(20_000)]
        p = build_pipeline([])
        turns = 0
        done = False

        async def other() -> None:
            nonlocal turns
            while not done:
                turns += 1
                await asyncio.sleep(0)

        task = asyncio.create_task(other())
        await p.run(ListSource(adverts), lambda r: None)
        done = True
        await task
        assert turns >= 10
        assert 20_000 == p.stats()["no_identity"]


class TestPrivacy:
    def test_unregistered_devices_leave_no_trace(self):
        """Noise (random phones, unregistered iBeacon UUIDs and minors, other companies, unregistered
        Eddystone) reaches no reading, no log event and no per-device counter; only aggregates exist."""
        rng = random.Random(7)
        registered = (
            [f"ibeacon:{VENUE}:7:{m}" for m in range(1, 6)]
            + [f"eddystone:{NAMESPACE.hex()}:{i:012x}" for i in range(1, 4)]
            + ["lpx:00000007"]
        )
        p = build_pipeline(registered, [LPX], offset_db=1.0)
        tag_addr = {f"ibeacon:{VENUE}:7:{m}": f"C0:00:00:00:00:{m:02X}" for m in range(1, 6)}

        adverts: list[Advert] = []
        secrets: set[str] = set()  # every address and payload hex that belongs to an unregistered device
        for i in range(3000):
            t = i * 1_000_000
            kind = rng.randrange(7)
            addr = ":".join(f"{rng.randrange(256):02X}" for _ in range(6))
            if kind == 0:
                m = rng.randrange(1, 6)
                adverts.append(ibeacon(tag_addr[f"ibeacon:{VENUE}:7:{m}"], VENUE, 7, m, t))
                continue
            if kind == 1:
                adverts.append(eddy_uid(f"C1:00:00:00:00:0{i % 3 + 1}", NAMESPACE, i % 3 + 1, t))
                continue
            if kind == 2:  # phone: random address, vendor data of some other company
                payload = rng.randbytes(rng.randrange(0, 24))
                a = Advert(
                    t,
                    addr,
                    1,
                    -80,
                    None,
                    {rng.choice([0x0006, 0x0075, 0x00E0]): payload},
                    {uuid16_to_128(0xFD6F): rng.randbytes(20)},
                )
            elif kind == 3:  # unregistered iBeacon-format UUID
                a = ibeacon(
                    addr, uuid.UUID(bytes=rng.randbytes(16)), rng.randrange(65536), rng.randrange(65536), t
                )
            elif kind == 4:  # registered UUID, unregistered minor
                a = ibeacon(addr, VENUE, 7, rng.randrange(100, 65536), t)
            elif kind == 5:  # unregistered Eddystone namespace, then its TLM
                a = eddy_uid(addr, rng.randbytes(10), rng.randrange(2**48), t)
                adverts.append(a)
                a = eddy_tlm(addr, t + 1)
            else:  # unregistered custom-firmware tag
                a = lpx(addr, rng.randrange(8, 2**32), t)
            adverts.append(a)
            secrets.add(addr)
            secrets.update(v.hex() for v in a.manufacturer_data.values() if len(v) >= 4)
            secrets.update(v[2:].hex() for v in a.service_data.values() if len(v) >= 6)

        out: list[Reading] = []
        with structlog.testing.capture_logs() as logs:
            out = [r for a in adverts if (r := p.process(a)) is not None]

        blob = repr(out) + repr(logs) + repr(p.stats()) + repr(p.decoder._eddy_by_addr)
        leaked = [s for s in secrets if s in blob or s.lower() in blob]
        assert [] == leaked
        assert all(r.tag in registered for r in out)
        assert out, "registered tags must still come through"
        stats = p.stats()
        assert all(isinstance(v, int) for v in stats.values()) and set(STATS_DOC) == set(stats)
        assert stats["adverts_total"] == sum(
            stats[k]
            for k in (
                "adverts_registered",
                "dropped_unregistered",
                "no_identity",
                "decode_errors",
                "tlm_unmatched",
                "dropped_other",
            )
        )


def test_a_batch_gives_what_one_by_one_gives():
    """process_batch over any split of a mixed stream: the readings and counters of process per advert."""
    rng = random.Random(5)
    adverts = []
    for i in range(600):
        kind = rng.randrange(4)
        addr = f"D0:00:00:00:00:{i % 7:02X}"
        if kind == 0:
            adverts.append(ibeacon(addr, VENUE, 7, rng.randrange(4), i, -40 - i % 50))
        elif kind == 1:
            adverts.append(eddy_uid(addr, NAMESPACE, rng.randrange(1, 3), i))
        elif kind == 2:
            adverts.append(eddy_tlm(addr, i))  # matched only after a UID from the same address
        else:
            adverts.append(lpx(addr, rng.randrange(1, 9), i))
    tags = [f"ibeacon:{VENUE}:7:1", f"eddystone:{NAMESPACE.hex()}:000000000001", "lpx:00000003"]
    one = build_pipeline(tags, [LPX], offset_db=1.5)
    singles = [r for a in adverts if (r := one.process(a)) is not None]
    assert singles and one.stats()["tlm_unmatched"] and one.stats()["telemetry_total"]
    for size in (1, 7, 64, len(adverts)):
        many = build_pipeline(tags, [LPX], offset_db=1.5)
        batched = [r for i in range(0, len(adverts), size) for r in many.process_batch(adverts[i : i + size])]
        assert batched == singles and many.stats() == one.stats(), size
    assert build_pipeline(tags).process_batch([]) == []


@pytest.mark.parametrize("offset", [0.0, -4.0])
def test_readings_per_tag_match_a_direct_count(offset):
    """Every registered advert becomes exactly one reading; nothing is duplicated or lost."""
    adverts = [ibeacon("D0:00:00:00:00:01", VENUE, 7, i % 5, i, -50 - i % 30) for i in range(500)]
    p = build_pipeline([f"ibeacon:{VENUE}:7:{m}" for m in (1, 3)], offset_db=offset)
    out = [r for a in adverts if (r := p.process(a)) is not None]
    assert [
        (a.t_mono_ns, a.rssi_dbm + offset) for a in adverts if a.manufacturer_data[0x004C][21] in (1, 3)
    ] == [(r.t_mono_ns, r.rssi_dbm) for r in out]
