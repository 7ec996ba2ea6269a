"""
CPU per advert of a live paced agent against the dry-run pipeline, in the same run.

The same recording (the synthetic gallery mix of bench.agent_pipeline, re-timed to ``RATE`` adverts/s
with random gaps) goes through the agent's pipeline (replay source → decode → filter → calibrate →
a counting sink, batch by batch as `Pipeline.run` takes them) four ways, interleaved round by round:

(a) dry run: speed 0, as fast as the core allows (batches of ``ReplaySource.YIELD_EVERY``);
(b) live: speed 1 on the system clock, as a board replaying in real time (`ReplaySource` wakes at most
    once per ``PACING_GRAIN_S`` and hands over every advert then due as one batch);
(c) live, one wake-up per advert: the same with a grain of 0;
(d) live with the quarter-second grain the source had before (``GRAIN_BEFORE_S``).

The figure is process CPU time (``time.process_time``: all threads, user + system) per advert, so the
event loop's wake-ups are counted and its idle waiting is not. Target: (b) / (a) <= 1.5.

What (b) pays beyond (a) is per wake-up, not per advert: the loop's turn (timer, future, task: some
200 us on a shared core) and the caches the pipeline finds cold after sleeping. So the ratio falls with
the adverts per wake-up: RATE × grain.
"""

from __future__ import annotations

import asyncio
import random
import tempfile
import time
from dataclasses import replace
from pathlib import Path

from bench import _repeat
from bench.agent_pipeline import LPX, registered_tags, synthetic_adverts

RATE = 206.0
"""Adverts per second of the live replay (a busy gallery board)."""
SECONDS, SECONDS_QUICK = 10.0, 1.0
TARGET = 1.5
GRAIN_BEFORE_S = 0.25
"""The pacing grain before it became one second (side (d))."""


def write_paced(path: Path, n: int, seed: int = 3) -> float:
    """A recording of ``n`` adverts at ``RATE`` per second on average; returns its span in seconds."""
    from listenpost.agent.sources.replay import write_recording

    rng = random.Random(seed)
    t = 50_000_000_000
    out = []
    for a in synthetic_adverts(n, seed=seed):
        t += round(rng.expovariate(RATE) * 1e9)
        out.append(replace(a, t_mono_ns=t))
    write_recording(path, out, board="g0-a", boot="bench-boot", wall_at_start=1_800_000_000.0)
    return (out[-1].t_mono_ns - out[0].t_mono_ns) / 1e9


async def _run(path: Path, speed: float, grain: float | None) -> tuple[float, int]:
    from listenpost.agent.pipeline import build_pipeline
    from listenpost.agent.sources import open_replay
    from listenpost.core.clock import SystemClock

    pipeline = build_pipeline(registered_tags(), [LPX], offset_db=2.5)
    source = open_replay([path], SystemClock(), speed)
    if grain is not None:
        source.PACING_GRAIN_S = grain  # type: ignore[misc]  # an instance attribute shadows the class constant
    kept = 0

    def sink(_r: object) -> None:
        nonlocal kept
        kept += 1

    cpu0 = time.process_time()
    await pipeline.run(source, sink)
    return time.process_time() - cpu0, source.count


def cpu_per_advert_us(path: Path, speed: float, grain: float | None = None) -> float:
    cpu, n = asyncio.run(_run(path, speed, grain))
    return cpu / n * 1e6


def main(quick: bool = False) -> None:
    seconds = SECONDS_QUICK if quick else SECONDS
    rounds = _repeat.repeats(7)
    n = int(seconds * RATE)
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "paced.jsonl"
        span = write_paced(path, n)
        from listenpost.agent.sources import ReplaySource

        print(
            f"{n} adverts over {span:.1f} s ({RATE:g}/s), grain {ReplaySource.PACING_GRAIN_S * 1e3:g} ms, "
            f"{rounds} interleaved rounds; CPU us per advert:"
        )
        cpu_per_advert_us(path, 0.0)  # warm the parse caches before the first timed side
        got = _repeat.interleave(
            [
                ("dry", lambda: cpu_per_advert_us(path, 0.0)),
                ("live", lambda: cpu_per_advert_us(path, 1.0)),
                ("per_advert", lambda: cpu_per_advert_us(path, 1.0, grain=0.0)),
                ("quarter", lambda: cpu_per_advert_us(path, 1.0, grain=GRAIN_BEFORE_S)),
            ],
            rounds,
        )
    print(f"    (a) dry run, speed 0             : {_repeat.spread(got['dry'], '.1f', ' us')}")
    print(f"    (b) live, speed 1, grain wake-ups : {_repeat.spread(got['live'], '.1f', ' us')}")
    print(f"    (c) live, one wake-up per advert  : {_repeat.spread(got['per_advert'], '.1f', ' us')}")
    print(
        f"    (d) live, {GRAIN_BEFORE_S:g} s grain           : {_repeat.spread(got['quarter'], '.1f', ' us')}"
    )
    _repeat.report(
        "agent_live",
        "live/dry CPU per advert (b/a)",
        [b / a for a, b in zip(got["dry"], got["live"], strict=True)],
        f"<= {TARGET}",
    )
    _repeat.report(
        "agent_live",
        "per-advert wake-ups/dry (c/a)",
        [c / a for a, c in zip(got["dry"], got["per_advert"], strict=True)],
    )
    _repeat.report(
        "agent_live",
        f"{GRAIN_BEFORE_S:g} s grain/dry (d/a)",
        [d / a for a, d in zip(got["dry"], got["quarter"], strict=True)],
    )


if __name__ == "__main__":
    main()
