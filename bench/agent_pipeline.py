"""
Agent pipeline throughput and memory, measured side by side in one run.

A synthetic recording (recorded-log format, ~300k adverts, 1,000 registered tags, a Brackenford-like
mix of iBeacon, Eddystone UID/TLM, custom-firmware tags and unregistered noise) is written to a temp
file and read twice:

(a) a bare loop: ``json.loads`` per line and the least decode that can find a registered tag
    (string slices of the hex payload, one set lookup) — the floor any pipeline is measured against;
(b) the agent: replay source → decode → filter → calibrate → sink (the spool when ``listenpost.agent.spool``
    provides one, otherwise a list, and the output says which).

Then a child process holding the 1,000 registered tags runs (b) and reports its peak RSS.
Targets: (b) >= 25 % of (a) and >= 100,000 adverts/s on one core; agent peak RSS <= 60 MB.
"""

from __future__ import annotations

import asyncio
import json
import random
import resource
import statistics
import subprocess
import sys
import tempfile
import time
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from bench import _repeat
from listenpost.agent.pipeline.decode import EDDYSTONE_UUID
from listenpost.core.records import Advert, Reading
from listenpost.core.settings import DecodeRule

N_ADVERTS = 300_000
N_ADVERTS_QUICK = 5_000
N_IBEACON, N_EDDYSTONE, N_CUSTOM = 700, 200, 100  # 1,000 registered tags
VENUE = uuid.UUID("6f1d8a52-3c0e-4b7a-a9d1-5e2c7b40f913")  # invented for the bench
NAMESPACE = bytes.fromhex("b7e4019c2d5a83f6e011")
LPX = DecodeRule("lpx", company_id=0xFFFF, prefix=b"\x4c\x50", offset=2, length=4)
TARGET_RATIO, TARGET_RATE, TARGET_RSS_MB = 0.25, 100_000, 60.0


def registered_tags() -> list[str]:
    """The 1,000 tags the board holds."""
    return (
        [f"ibeacon:{VENUE}:7:{m}" for m in range(1, N_IBEACON + 1)]
        + [f"eddystone:{NAMESPACE.hex()}:{i:012x}" for i in range(1, N_EDDYSTONE + 1)]
        + [f"lpx:{n:08x}" for n in range(1, N_CUSTOM + 1)]
    )


def _addr(rng: random.Random) -> str:
    return ":".join(f"{rng.randrange(256):02X}" for _ in range(6))


def synthetic_adverts(n: int = N_ADVERTS, seed: int = 1) -> Iterator[Advert]:
    """
    A mix like a busy gallery: 55 % registered iBeacon, 15 % Eddystone (every 10th frame a TLM),
    5 % custom firmware, 25 % noise (phones, unregistered iBeacon UUIDs and minors, other companies).
    """
    rng = random.Random(seed)
    ib_addr = [_addr(rng) for _ in range(N_IBEACON)]
    ed_addr = [_addr(rng) for _ in range(N_EDDYSTONE)]
    cu_addr = [_addr(rng) for _ in range(N_CUSTOM)]
    phones = [_addr(rng) for _ in range(400)]
    ed_seen = [0] * N_EDDYSTONE
    other_uuids = [uuid.UUID(int=rng.getrandbits(128)).bytes for _ in range(20)]
    t_ns = 50_000_000_000
    tlm = bytes.fromhex("20000bb817c0000004d200008ca0")
    for _ in range(n):
        t_ns += rng.randrange(100_000, 5_000_000)
        rssi = rng.randrange(-100, -40)
        x = rng.random()
        if x < 0.55:
            m = rng.randrange(N_IBEACON)
            yield Advert(
                t_ns,
                ib_addr[m],
                1,
                rssi,
                None,
                {0x004C: b"\x02\x15" + VENUE.bytes + b"\x00\x07" + (m + 1).to_bytes(2, "big") + b"\xc5"},
            )
        elif x < 0.70:
            i = rng.randrange(N_EDDYSTONE)
            ed_seen[i] += 1
            frame = (
                tlm
                if ed_seen[i] % 10 == 0
                else b"\x00\xec" + NAMESPACE + (i + 1).to_bytes(6, "big") + b"\0\0"
            )
            yield Advert(t_ns, ed_addr[i], 1, rssi, None, {}, {EDDYSTONE_UUID: frame}, (EDDYSTONE_UUID,))
        elif x < 0.75:
            k = rng.randrange(N_CUSTOM)
            yield Advert(
                t_ns, cu_addr[k], 1, rssi, None, {0xFFFF: b"\x4c\x50" + (k + 1).to_bytes(4, "big") + b"\x5a"}
            )
        elif x < 0.87:  # phones: Apple continuity or other vendors' data
            md = (
                {0x004C: b"\x10\x05" + rng.randbytes(5)}
                if rng.random() < 0.6
                else {0x0006: rng.randbytes(24)}
            )
            yield Advert(t_ns, rng.choice(phones), 1, rssi, None, md)
        elif x < 0.95:  # unregistered iBeacon-format tags
            u = rng.choice(other_uuids) if rng.random() < 0.5 else VENUE.bytes
            minor = rng.randrange(1000, 65536)
            yield Advert(
                t_ns,
                _addr(rng),
                1,
                rssi,
                None,
                {0x004C: b"\x02\x15" + u + b"\x00\x09" + minor.to_bytes(2, "big") + b"\xc5"},
            )
        else:  # other devices: service data only, or nothing decodable
            yield Advert(
                t_ns,
                _addr(rng),
                1,
                rssi,
                None,
                {},
                {"0000fd6f-0000-1000-8000-00805f9b34fb": rng.randbytes(20)},
            )


def write_synthetic(path: Path, n: int = N_ADVERTS) -> None:
    from listenpost.agent.sources.replay import write_recording

    write_recording(
        path, synthetic_adverts(n), board="g0-a", boot="bench-boot", wall_at_start=1_800_000_000.0
    )


# ---------------------------------------------------------------- (a) the bare loop


def bare_loop(path: Path) -> tuple[int, int]:
    """Parse every line and find registered tags with the least work possible. Returns (adverts, kept)."""
    ib_keys = {VENUE.hex + f"0007{m:04x}" for m in range(1, N_IBEACON + 1)}
    ed_keys = {NAMESPACE.hex() + f"{i:012x}" for i in range(1, N_EDDYSTONE + 1)}
    cu_keys = {f"4c50{n:08x}" for n in range(1, N_CUSTOM + 1)}
    last_uid: dict[str, str] = {}
    loads = json.loads
    out: list[tuple[str, float, int]] = []
    n = 0
    with open(path, encoding="utf-8") as f:
        f.readline()
        for line in f:
            n += 1
            d = loads(line)
            m = d.get("m")
            key = None
            if m is not None:
                p = m.get("004c")
                if p is not None and p[:4] == "0215":
                    key = p[4:44] if p[4:44] in ib_keys else None
                else:
                    p = m.get("ffff")
                    if p is not None and p[:12] in cu_keys:
                        key = p[:12]
            else:
                s = d.get("s")
                if s is not None:
                    p = s.get("feaa")
                    if p is not None:
                        if p[:2] == "00":
                            if p[4:36] in ed_keys:
                                key = last_uid[d["a"]] = p[4:36]
                        elif p[:2] == "20":
                            key = last_uid.get(d["a"])
            if key is not None:
                out.append((key, d["t"], d["r"]))
    return n, len(out)


# ---------------------------------------------------------------- (b) the agent

SEAL_EVERY = 5000
"""Readings per sealed batch in the bench (the agent's default ``uplink.max_batch_readings``)."""


async def _agent_run(path: Path, tmp: Path) -> tuple[dict[str, int], str]:
    from listenpost.agent.pipeline import build_pipeline
    from listenpost.agent.sources import open_replay
    from listenpost.core.clock import SystemClock

    clock = SystemClock()
    pipeline = build_pipeline(registered_tags(), [LPX], offset_db=2.5)
    try:
        from listenpost.agent.spool import Spool
    except ImportError:
        out: list[Reading] = []
        await pipeline.run(open_replay([path], clock, speed=0), out.append)
        return pipeline.stats(), "list (agent/spool.py not present)"

    spool_path = Path(tempfile.mkdtemp(dir=tmp)) / "bench-spool.sqlite"  # a fresh spool per run
    spool = await Spool.open(
        spool_path,
        clock=clock,
        max_bytes=1 << 30,
        flush_seconds=5.0,
        max_batch_readings=SEAL_EVERY,
        max_pending_readings=4 * SEAL_EVERY,
    )
    n = 0
    add, seal, boot = spool.add, spool.seal, clock.boot_id

    # Replayed at full speed, readings arrive far faster than flush_seconds allows, so the bench seals
    # by count: one durable batch per SEAL_EVERY readings, awaited in line, so the spool's whole cost
    # is in the figure. (Sealing beside intake, as Spool.run_sealer does at a board's real rate, was
    # slower here: the seal's encoding competes with intake for the GIL.)
    def sink(r: Reading) -> Any:
        nonlocal n
        add(r)
        n += 1
        if n >= SEAL_EVERY:
            n = 0
            return seal(boot=boot, offset_db=2.5)
        return None

    try:
        await pipeline.run(open_replay([path], clock, speed=0), sink)
    finally:
        await spool.close()
    st = spool.stats()
    if st.degraded or st.dropped_readings:
        print(f"    WARNING: spool degraded={st.degraded}, dropped {st.dropped_readings} readings")
    return pipeline.stats(), (
        f"listenpost.agent.spool.Spool, {st.next_seq} sealed batches of <= {SEAL_EVERY}, "
        f"{st.bytes / 1e6:.1f} MB, dropped {st.dropped_readings}"
    )


async def _source_only(path: Path) -> int:
    from listenpost.agent.sources import open_replay
    from listenpost.core.clock import SystemClock

    n = 0
    async for _ in open_replay([path], SystemClock(), speed=0).adverts():
        n += 1
    return n


def source_only(path: Path) -> int:
    """The replay source alone (parse every line into an Advert), to show where (b)'s time goes."""
    return asyncio.run(_source_only(path))


def agent_pipeline(path: Path, tmp: Path) -> tuple[dict[str, int], str]:
    return asyncio.run(_agent_run(path, tmp))


def _rss_child(path: str) -> None:
    """Run (b) in this process and print peak RSS (ru_maxrss is KiB on Linux)."""
    with tempfile.TemporaryDirectory() as d:
        stats, _ = agent_pipeline(Path(path), Path(d))
    heavy = sorted(m for m in ("numpy", "scipy", "collector") if m in sys.modules)
    hwm_kib = None
    try:  # VmHWM belongs to this process's own address space, so it starts fresh at exec
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                hwm_kib = int(line.split()[1])
    except OSError:
        pass
    print(
        json.dumps(
            {
                "maxrss_kib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss,
                "vmhwm_kib": hwm_kib,
                "readings": stats["readings_total"],
                "heavy_modules": heavy,
            }
        )
    )


def _timed(fn: Any, *args: Any) -> tuple[float, Any]:
    t0 = time.perf_counter()
    result = fn(*args)
    return time.perf_counter() - t0, result


def main(quick: bool = False) -> None:
    from listenpost.core.logs import configure

    n_adverts = N_ADVERTS_QUICK if quick else N_ADVERTS
    configure("console", level="warning")  # the spool's per-batch debug lines would swamp the figures
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        path = tmp / "synthetic.jsonl"
        gen_s, _ = _timed(write_synthetic, path, n_adverts)
        print(
            f"synthetic recording: {n_adverts} adverts, {path.stat().st_size / 1e6:.1f} MB, "
            f"{len(registered_tags())} registered tags (written in {gen_s:.1f} s)"
        )

        # Measured first: Linux carries the parent's RSS high-water mark into the child's ru_maxrss across
        # fork+exec, so the child must start while this process is still small.
        child = subprocess.run(
            [sys.executable, "-m", "bench.agent_pipeline", "--rss-child", str(path)],
            capture_output=True,
            text=True,
            timeout=600,
            check=True,
        )
        info = json.loads(child.stdout.strip().splitlines()[-1])
        rss_mb = info["maxrss_kib"] / 1024
        hwm = f", VmHWM {info['vmhwm_kib'] / 1024:.1f} MB" if info.get("vmhwm_kib") else ""
        print(
            f"agent peak RSS: {rss_mb:.1f} MB by getrusage{hwm} (target <= {TARGET_RSS_MB:g} MB; "
            f"numpy/scipy/collector imported: {info['heavy_modules'] or 'none'})"
        )

        # Interleaved rounds; the ratio is taken within each round, so the machine's drift hits both sides.
        got = _repeat.interleave(
            [
                ("a", lambda: _timed(bare_loop, path)),
                ("b", lambda: _timed(agent_pipeline, path, tmp)),
                ("src", lambda: _timed(source_only, path)),
            ],
            _repeat.repeats(3),
        )
        secs = {k: [s for s, _ in v] for k, v in got.items()}
        kept_a = got["a"][-1][1][1]
        stats, what = got["b"][-1][1]
        med = {k: statistics.median(v) for k, v in secs.items()}
        print(
            f"(a) bare loop:      {_repeat.spread([n_adverts / s for s in secs['a']])} adverts/s  ({kept_a} registered)"
        )
        print(
            f"(b) agent pipeline: {_repeat.spread([n_adverts / s for s in secs['b']])} adverts/s  "
            f"({stats['readings_total']} readings; sink: {what})"
        )
        rate_b = n_adverts / med["b"]
        print(
            f"    rate {'meets' if rate_b >= TARGET_RATE else 'MISSES'} the {TARGET_RATE:,} adverts/s target"
        )
        _repeat.report(
            "agent_pipeline",
            "pipeline/bare-loop throughput (b/a)",
            [a / b for a, b in zip(secs["a"], secs["b"], strict=True)],
            f">= {TARGET_RATIO}",
        )
        print(
            f"    of which the replay source alone: {n_adverts / med['src']:,.0f} adverts/s "
            f"({med['src'] / n_adverts * 1e6:.2f} us/advert); decode+filter+calibrate+spool "
            f"{(med['b'] - med['src']) / n_adverts * 1e6:.2f} us/advert; bare loop {med['a'] / n_adverts * 1e6:.2f} us/advert"
        )
        if stats["readings_total"] != kept_a:
            print(
                f"    WARNING: the two loops disagree on registered adverts ({kept_a} vs {stats['readings_total']})"
            )
        print("    pipeline stats: " + ", ".join(f"{k}={v}" for k, v in stats.items()))


if __name__ == "__main__":
    if len(sys.argv) == 3 and sys.argv[1] == "--rss-child":
        _rss_child(sys.argv[2])
    else:
        main()
