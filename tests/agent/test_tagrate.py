"""
Effective per-tag reading rate: the sliding window on virtual time, the percentile against numpy,
and the heartbeat figures of a running board fed by a fake radio at known rates.
"""

from __future__ import annotations

import asyncio
import json
import statistics

import aiohttp
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from listenpost.agent.pipeline.tagrate import TagRates, percentile
from listenpost.agent.service import AgentService
from listenpost.agent.sources import RateMeter
from listenpost.core.clock import VirtualClock
from listenpost.core.records import Advert
from tests.agent.test_service import Collector, ListSource, board_config, ibeacon, tag

PHASE = 0.0137
"""Offset of every advert from the 5 s bucket edges, so the counts per window are exact."""


def at_rates(
    t0: float, seconds: float, rates: dict[int, float], noise_hz: float = 0.0, keep_every: int = 1
) -> list[Advert]:
    """
    iBeacon adverts of each minor at its rate (Hz) for ``seconds``, of which the radio passes one in
    ``keep_every`` per tag; noise at ``noise_hz``: an unregistered minor (900) and a phone.
    """
    out = []
    for minor, hz in rates.items():
        out += [
            ibeacon(t0 + PHASE + k / hz, minor, -60, address=f"D0:00:00:00:{minor:02X}:01")
            for k in range(int(seconds * hz))
            if k % keep_every == 0
        ]
    if noise_hz:
        n = int(seconds * noise_hz)
        out += [
            ibeacon(t0 + PHASE / 2 + k / noise_hz, 900, -50, address="D0:00:00:00:99:99") for k in range(n)
        ]
        out += [
            Advert(round((t0 + PHASE / 3 + k / noise_hz) * 1e9), "5A:11:22:33:44:55", 1, -40)
            for k in range(n)
        ]
    return sorted(out, key=lambda a: a.t_mono_ns)


# ------------------------------------------------------------------ the percentile


@settings(max_examples=200, deadline=None)
@given(st.lists(st.floats(0, 50, allow_nan=False), min_size=1, max_size=40), st.floats(0, 100))
def test_percentile_is_numpys_linear_method(values: list[float], q: float) -> None:
    """Cross-check with numpy.percentile (method="linear", its default: Hyndman and Fan definition 7)."""
    s = sorted(values)
    assert percentile(s, q) == pytest.approx(
        float(np.percentile(s, q, method="linear")), rel=1e-12, abs=1e-12
    )
    assert percentile(s, 50) == pytest.approx(statistics.median(s), rel=1e-12, abs=1e-12)  # stdlib median


def test_percentile_refuses_what_it_cannot_answer() -> None:
    with pytest.raises(ValueError, match="no values"):
        percentile([], 50)
    with pytest.raises(ValueError, match="q must be"):
        percentile([1.0], 101)


# ------------------------------------------------------------------ the sliding window


def test_rate_meter_slides_in_buckets() -> None:
    """A tag that goes quiet fades out bucket by bucket; rates divide by the span actually covered."""
    m = RateMeter(60.0, buckets=12)
    t0 = 1000.0 + PHASE
    for k in range(120):  # 2 Hz for 60 s
        m.note("a", t0 + k / 2)
    assert m.rates(1000.0) == {} and m.span(1000.0) == 0.0
    # 60 s after start: the twelve complete buckets are the whole burst.
    assert m.rates(1060.0 + 1) == {"a": 2.0} and m.span(1061.0) == 60.0
    # 30 s of silence later half the window is empty: the rate has halved, the span has not.
    assert m.rates(1090.0 + 1) == {"a": 1.0}
    assert m.rates(1120.0 + 1) == {}  # a whole window of silence: forgotten
    with pytest.raises(ValueError, match="buckets"):
        RateMeter(60.0, buckets=0)


def test_a_batch_counts_as_its_readings_one_by_one() -> None:
    """note_many (a pipeline batch, one clock reading) counts what note per reading at that time counts."""
    keys = ["a", "b", "a", "c", "a"] * 20
    one, many = RateMeter(60.0, buckets=12), RateMeter(60.0, buckets=12)
    for k, t in enumerate(range(1000, 1100, 5)):
        for key in keys[k::7]:
            one.note(key, t + PHASE)
        many.note_many(keys[k::7], t + PHASE)
    assert many.rates(1101.0) == one.rates(1101.0) and len(one.rates(1101.0)) == 3


async def test_right_after_start_the_span_is_what_was_covered() -> None:
    """Ten seconds in, two 5 s buckets are complete: the rate is counted over 10 s, not 60."""
    clock = VirtualClock()  # starts at 1000.0, a bucket edge
    rates = TagRates(clock)
    await clock.advance(PHASE)
    for _ in range(25):  # 2 Hz from 1000.0137 to 1012.0137
        rates.note("ibeacon:x:1:1")
        await clock.advance(0.5)
    s = rates.summary()
    assert clock.monotonic() == pytest.approx(1012.5137)
    assert (s.tags_heard, s.median_hz, s.p10_hz, s.window_s) == (1, 2.0, 2.0, 10.0)
    assert TagRates(VirtualClock()).summary().as_stats() == {
        "tags_heard": 0,
        "tag_rate_hz_median": None,
        "tag_rate_hz_p10": None,
        "tag_rate_window_s": 0.0,
    }


# ------------------------------------------------------------------ a running board


class SupervisedListSource(ListSource):
    """The fake radio with the figures a supervised live source reports (as `BleakSource.stats` does)."""

    def stats(self) -> dict[str, object]:
        return {"state": "scanning", "reason": None, "restarts": 2, "last_restart_reason": "stalled"}


async def run_board(
    tmp_path,
    clock: VirtualClock,
    adverts: list[Advert],
    until: float,
    url: str | None = None,
    session: aiohttp.ClientSession | None = None,
    source_type: type[ListSource] = ListSource,
) -> tuple[AgentService, asyncio.Task[int]]:
    """Start a board on the fake radio and move virtual time to ``until``; the board keeps running."""
    cfg = board_config(tmp_path, url, tags=[1, 2, 3, 4, 5])
    service = AgentService(cfg, clock=clock, source=source_type(clock, adverts, hang=True), session=session)
    task = asyncio.create_task(service.run())
    await asyncio.wait_for(service.started.wait(), 10)  # the spool opens on a real thread first
    while clock.monotonic() < until:
        await asyncio.wait({task}, timeout=0.001)  # bounded real wait: loopback I/O and the spool thread
        await clock.advance(min(1.0, until - clock.monotonic()))
    assert not task.done(), task
    return service, task


async def stop(service: AgentService, task: asyncio.Task[int]) -> None:
    service.request_stop()
    assert await asyncio.wait_for(task, 10) == 0


async def test_known_rates_give_median_p10_and_tags_heard(tmp_path) -> None:
    """Five registered tags at 0.5, 1, 2, 4 and 5 Hz; an unregistered tag and a phone at 8 Hz are not counted."""
    clock = VirtualClock()
    rates = {1: 0.5, 2: 1.0, 3: 2.0, 4: 4.0, 5: 5.0}
    adverts = at_rates(clock.monotonic(), 130.0, rates, noise_hz=8.0)
    service, task = await run_board(tmp_path, clock, adverts, until=1122.5)
    stats = service.stats()
    # Window [1060, 1120): every tag gave exactly 60 s x its rate readings.
    assert service.tag_rates.rates() == {tag(m): hz for m, hz in rates.items()}
    assert stats["tags_heard"] == 5
    assert stats["tag_rate_hz_median"] == 2.0
    assert stats["tag_rate_hz_p10"] == pytest.approx(0.7)  # (5-1)·0.1 = rank 0.4: 0.5 + 0.4·(1-0.5)
    assert stats["tag_rate_window_s"] == 60.0
    assert stats["pipeline"]["dropped_unregistered"] > 0  # the noise really was there, and dropped
    assert stats["source"]["radio"] is None  # the fake radio keeps no figures of its own
    blob = json.dumps(stats)
    assert "5A:11:22:33:44:55" not in blob and ":900" not in blob and "D0:00:00:00" not in blob
    await stop(service, task)


async def test_a_thinned_radio_shows_up_in_the_heartbeat(aiohttp_server, tmp_path) -> None:
    """The tags advertise at 2 Hz but the radio passes one report in ten: the heartbeat says 0.2 Hz."""
    clock = VirtualClock()
    collector = Collector(clock)
    server = await aiohttp_server(collector.app())
    thinned = at_rates(clock.monotonic(), 100.0, {m: 2.0 for m in range(1, 6)}, keep_every=10)
    async with aiohttp.ClientSession() as session:
        service, task = await run_board(
            tmp_path,
            clock,
            thinned,
            until=1072.5,
            url=str(server.make_url("")).rstrip("/"),
            session=session,
            source_type=SupervisedListSource,
        )
        assert service.heartbeat is not None
        await service.heartbeat.beat()
        await stop(service, task)
    last = collector.heartbeats[-1]["stats"]
    assert last["tags_heard"] == 5
    assert last["tag_rate_hz_median"] == pytest.approx(0.2) and last["tag_rate_hz_p10"] == pytest.approx(0.2)
    assert last["source"]["state"] == "running"
    assert last["source"]["radio"] == {
        "state": "scanning",
        "reason": None,
        "restarts": 2,
        "last_restart_reason": "stalled",
    }
