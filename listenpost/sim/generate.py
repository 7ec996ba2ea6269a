"""
Scenario → per-board recordings, a btsnoop capture, the ground truth and the registered tag list.

The heavy part is vectorised: for each device the advertising times, its position segment at each
advertisement and the mean RSSI at every board are numpy arrays (advertisements × boards); shadowing,
rounding, sensitivity and the hearing draw are applied to the whole array at once. Python loops run
per device, per visitor and per written line, never per (advertisement, board) pair.

Outputs in ``out_dir``:

- ``<board>.jsonl.gz`` — the board's recording (DEVELOPERS.md "Recorded-log format"), board time on
  the board's own monotonic clock: ``t_board = (t_true − boot_true)·(1 + skew)``, rounded to the ms.
- ``<board>.btsnoop.gz`` — the same adverts of ``btsnoop_board`` as a btsnoop capture (datalink 2001,
  gzip'd like the recordings; the project's reader takes it as is, ``btmon -r`` after ``gunzip``).
- ``truth.json`` — what really happened (`truth_document`; its schema is `listenpost.sim.truth`).
- ``tags.txt`` — registered tag identities, one canonical ID per line.

Same scenario, seed and duration → byte-identical files (gzip mtime 0, sorted JSON keys).
"""

from __future__ import annotations

import enum
import gzip
import math
import os
import shutil
import time
import uuid
from collections.abc import Iterator
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import structlog

from listenpost.core.records import Advert, uuid16_to_128
from listenpost.sim.radio import mean_rssi_dbm, sample_reports
from listenpost.sim.scenario import FixedNoise, NoiseKind, Placed, Scenario
from listenpost.sim.truth import TRUTH_FORMAT, TRUTH_NOTES, TRUTH_VERSION, BoardTruth, write_truth
from listenpost.sim.venue import Venue
from listenpost.sim.visitors import Holder, Track, simulate_visitors

log = structlog.get_logger(__name__)

APPLE_COMPANY_ID = 0x004C
"""Company ID under which iBeacon-format frames travel (Bluetooth SIG assigned numbers)."""
EDDYSTONE_UUID = uuid16_to_128(0xFEAA)


class DeviceKind(enum.Enum):
    """What a simulated transmitter is."""

    IBEACON_TAG = "ibeacon"
    EDDYSTONE_TAG = "eddystone"
    CUSTOM_TAG = "custom"
    REFERENCE_TAG = "reference"
    PHONE = "phone"
    NOISE = "noise"


@dataclass(frozen=True, slots=True)
class Device:
    """One transmitter: identity, payload, and where it is when."""

    kind: DeviceKind
    tag_id: str | None
    """Canonical identity of a registered tag; ``None`` for noise."""
    addresses: tuple[str, ...]
    """On-air address; phones rotate through several, one per ``rotation_s``."""
    interval_s: float
    p1_dbm: int
    track: Track
    manufacturer: dict[int, bytes] = field(default_factory=dict)
    service_data: dict[str, bytes] = field(default_factory=dict)
    service_uuids: tuple[str, ...] = ()
    rotation_s: float = 0.0
    eddystone: tuple[float, float, int] | None = None
    """(battery mV at start, temperature °C, TLM phase) for Eddystone tags."""


@dataclass(frozen=True, slots=True)
class DrawnBoard:
    """A board's hidden parameters, as drawn for this run."""

    name: str
    room: str
    pos: tuple[float, float, float]
    """Position, metres; z above the ground slab."""
    offset_db: float
    """dB the adapter adds to every report (the calibrated correction is its negative)."""
    skew_ppm: float
    uptime_at_start_s: float
    """Board monotonic time at recording start is this × (1 + skew)."""
    boot: str
    wall_error_s: float
    power_off_at_s: float | None
    radio_hang_at_s: float | None
    gain_step_at_s: float | None
    gain_step_db: float

    def board_time(self, t_true: np.ndarray) -> np.ndarray:
        """Board monotonic seconds at true recording times ``t_true``."""
        return (np.asarray(t_true) + self.uptime_at_start_s) * (1.0 + self.skew_ppm * 1e-6)

    def listening_until(self, duration_s: float) -> float:
        """True time after which this board delivers no adverts."""
        ends = [t for t in (self.power_off_at_s, self.radio_hang_at_s, duration_s) if t is not None]
        return min(ends)


@dataclass(frozen=True, slots=True)
class Heard:
    """Everything one board heard, sorted by time."""

    t_true: np.ndarray
    device: np.ndarray
    """Index into the device list."""
    k: np.ndarray
    """Advertisement number of that device (for frames that vary: TLM, address rotation)."""
    rssi: np.ndarray


@dataclass(frozen=True, slots=True)
class Simulation:
    """The arrays of one run, before anything is written."""

    scenario: Scenario
    duration_s: float
    devices: tuple[Device, ...]
    boards: tuple[DrawnBoard, ...]
    heard: tuple[Heard, ...]
    """Per board, in `boards` order."""
    visitors: int
    without_tag: int
    adverts_sent: int


# ---------------------------------------------------------------- payloads


def ibeacon_payload(uuid_text: str, major: int, minor: int, power_dbm: int) -> bytes:
    """iBeacon-format manufacturer payload after the company ID: ``02 15`` uuid major minor power."""
    return (
        b"\x02\x15"
        + uuid.UUID(uuid_text).bytes
        + major.to_bytes(2, "big")
        + minor.to_bytes(2, "big")
        + power_dbm.to_bytes(1, "big", signed=True)
    )


def eddystone_uid_frame(namespace: bytes, instance: int, ranging_dbm: int) -> bytes:
    """Eddystone-UID service data after the UUID: frame 0x00, TX power at 0 m, namespace, instance, RFU."""
    return (
        b"\x00"
        + ranging_dbm.to_bytes(1, "big", signed=True)
        + namespace
        + instance.to_bytes(6, "big")
        + b"\x00\x00"
    )


def eddystone_tlm_frame(battery_mv: int, temperature_c: float, adv_count: int, uptime_s: float) -> bytes:
    """Unencrypted Eddystone-TLM v0: battery mV, temperature 8.8 fixed point, advert count, 0.1 s count."""
    temp = round(temperature_c * 256) & 0xFFFF
    return (
        b"\x20\x00"
        + battery_mv.to_bytes(2, "big")
        + temp.to_bytes(2, "big")
        + (adv_count & 0xFFFFFFFF).to_bytes(4, "big")
        + (int(uptime_s * 10) & 0xFFFFFFFF).to_bytes(4, "big")
    )


def _random_address(rng: np.random.Generator, top_bits: int) -> str:
    """A random device address; ``top_bits`` 0b11 static, 0b01 resolvable private (Core Spec Vol 6 Part B §1.3)."""
    b = rng.integers(0, 256, 6, dtype=np.uint8)
    b[0] = (int(b[0]) & 0x3F) | (top_bits << 6)
    return ":".join(f"{int(x):02X}" for x in b)


def _pos(scenario: Scenario, p: Placed) -> tuple[float, float, float]:
    return (p.at[0], p.at[1], scenario.room(p.room).floor * scenario.floor_height_m + p.at[2])


# ---------------------------------------------------------------- the run


def _devices(
    scenario: Scenario,
    venue: Venue,
    duration_s: float,
    rng: np.random.Generator,
    addr_rng: np.random.Generator,
) -> tuple[list[Device], int, int]:
    t = scenario.tags
    visitor_ids: list[tuple[DeviceKind, str, dict[str, Any]]] = []
    for minor in range(t.ibeacon_minors[0], t.ibeacon_minors[1] + 1):
        visitor_ids.append(
            (
                DeviceKind.IBEACON_TAG,
                f"ibeacon:{t.venue_uuid}:{t.ibeacon_major}:{minor}",
                {
                    "manufacturer": {
                        APPLE_COMPANY_ID: ibeacon_payload(
                            t.venue_uuid, t.ibeacon_major, minor, t.measured_power_dbm
                        )
                    }
                },
            )
        )
    ranging = t.measured_power_dbm + 41  # Eddystone: TX power at 0 m ≈ RSSI at 1 m + 41 dB (spec's advice)
    for inst in range(t.eddystone_instances[0], t.eddystone_instances[1] + 1):
        visitor_ids.append(
            (
                DeviceKind.EDDYSTONE_TAG,
                f"eddystone:{t.eddystone_namespace.hex()}:{inst:012x}",
                {
                    "service_data": {
                        EDDYSTONE_UUID: eddystone_uid_frame(t.eddystone_namespace, inst, ranging)
                    },
                    "service_uuids": (EDDYSTONE_UUID,),
                },
            )
        )
    rule = t.custom_rule
    for num in range(t.custom_numbers[0], t.custom_numbers[1] + 1):
        ident = num.to_bytes(rule.length, "big")
        payload = rule.prefix + bytes(max(0, rule.offset - len(rule.prefix))) + ident
        visitor_ids.append(
            (
                DeviceKind.CUSTOM_TAG,
                f"{rule.name}:{ident.hex()}",
                {"manufacturer": {rule.company_id: payload}},
            )
        )

    run = simulate_visitors(scenario, venue, len(visitor_ids), duration_s, rng)
    devices: list[Device] = []
    for (kind, ident, payload), track in zip(visitor_ids, run.tags, strict=True):
        extra: dict[str, Any] = {}
        if kind is DeviceKind.EDDYSTONE_TAG:
            extra["eddystone"] = (
                float(addr_rng.uniform(*t.battery_mv)),
                t.temperature_c + float(addr_rng.normal(0, 1.0)),
                int(addr_rng.integers(0, t.tlm_every)),
            )
        devices.append(
            Device(
                kind,
                ident,
                (_random_address(addr_rng, 0b11),),
                t.interval_s,
                t.measured_power_dbm,
                track,
                **payload,
                **extra,
            )
        )
    for ref in t.reference:
        ident = f"ibeacon:{t.venue_uuid}:{t.reference_major}:{ref.minor}"
        devices.append(
            Device(
                DeviceKind.REFERENCE_TAG,
                ident,
                (_random_address(addr_rng, 0b11),),
                t.interval_s,
                t.measured_power_dbm,
                Track.fixed(_pos(scenario, ref.place), venue.index[ref.place.room], duration_s),
                manufacturer={
                    APPLE_COMPANY_ID: ibeacon_payload(
                        t.venue_uuid, t.reference_major, ref.minor, t.measured_power_dbm
                    )
                },
            )
        )
    n = scenario.noise
    for fx in n.fixed:
        devices.append(_fixed_noise(scenario, venue, fx, duration_s, addr_rng))
    epochs = int(duration_s // n.phone_rotation_s) + 2
    for track in run.phones:
        addrs = tuple(_random_address(addr_rng, 0b01) for _ in range(epochs))
        junk = bytes(addr_rng.integers(0, 256, 8, dtype=np.uint8))
        company = APPLE_COMPANY_ID if addr_rng.random() < 0.6 else 0x0075
        devices.append(
            Device(
                DeviceKind.PHONE,
                None,
                addrs,
                n.phone_interval_s,
                n.phone_power_dbm,
                track,
                manufacturer={company: b"\x10\x05" + junk[:5] if company == APPLE_COMPANY_ID else junk},
                rotation_s=n.phone_rotation_s,
            )
        )
    return devices, run.visitors, run.without_tag


def _fixed_noise(
    scenario: Scenario, venue: Venue, fx: FixedNoise, duration_s: float, addr_rng: np.random.Generator
) -> Device:
    track = Track.fixed(_pos(scenario, fx.place), venue.index[fx.place.room], duration_s)
    if fx.kind is NoiseKind.IBEACON:
        assert fx.uuid is not None
        mfg = {APPLE_COMPANY_ID: ibeacon_payload(fx.uuid, fx.major, fx.minor, fx.measured_power_dbm)}
    else:
        mfg = {fx.company_id: fx.payload}
    return Device(
        DeviceKind.NOISE,
        None,
        (_random_address(addr_rng, 0b11),),
        fx.interval_s,
        fx.measured_power_dbm,
        track,
        manufacturer=mfg,
    )


def _boards(scenario: Scenario, rng: np.random.Generator) -> tuple[DrawnBoard, ...]:
    c = scenario.clocks
    out = []
    for b in scenario.boards:
        # Draw every value even when the file fixes it, so fixing one board leaves the others unchanged.
        offset = float(rng.uniform(-c.offset_db_max, c.offset_db_max))
        skew = float(rng.uniform(-c.skew_ppm_max, c.skew_ppm_max))
        uptime = float(rng.uniform(*c.uptime_s))
        wall = float(rng.uniform(-c.wall_error_s_max, c.wall_error_s_max))
        boot = str(uuid.UUID(bytes=bytes(rng.integers(0, 256, 16, dtype=np.uint8)), version=4))
        out.append(
            DrawnBoard(
                name=b.name,
                room=b.room,
                pos=_pos(scenario, Placed(b.room, b.at)),
                offset_db=round(b.offset_db if b.offset_db is not None else offset, 2),
                skew_ppm=round(b.skew_ppm if b.skew_ppm is not None else skew, 3),
                uptime_at_start_s=round(uptime, 3),
                boot=boot,
                wall_error_s=round(b.wall_error_s if b.wall_error_s is not None else wall, 4),
                power_off_at_s=b.power_off_at_s,
                radio_hang_at_s=b.radio_hang_at_s,
                gain_step_at_s=b.gain_step_at_s,
                gain_step_db=b.gain_step_db,
            )
        )
    return tuple(out)


def _advert_times(
    dev: Device, duration_s: float, adv_delay_max_s: float, rng: np.random.Generator
) -> np.ndarray:
    n = int(math.ceil(duration_s / dev.interval_s)) + 2
    gaps = dev.interval_s + rng.uniform(0.0, adv_delay_max_s, n)
    t = rng.uniform(0.0, dev.interval_s) + np.concatenate([[0.0], np.cumsum(gaps[:-1])])
    return t[t < duration_s]


def simulate(scenario: Scenario, minutes: float, seed: int | None = None) -> Simulation:
    """
    Run the scenario for ``minutes`` of recording and return what every board heard (no files).

    Args:
        seed: overrides the scenario's seed.
    """
    if not minutes > 0:
        raise ValueError(f"minutes must be > 0, got {minutes!r}")
    duration = float(minutes) * 60.0
    seed = scenario.seed if seed is None else seed
    ss = np.random.SeedSequence(seed)
    visit_ss, addr_ss, board_ss, radio_ss = ss.spawn(4)
    venue = Venue(scenario)
    devices, visitors, without_tag = _devices(
        scenario, venue, duration, np.random.default_rng(visit_ss), np.random.default_rng(addr_ss)
    )
    boards = _boards(scenario, np.random.default_rng(board_ss))
    bpos = np.array([b.pos for b in boards])
    offsets = np.array([b.offset_db for b in boards], dtype=np.float32)
    until = np.array([b.listening_until(duration) for b in boards])
    step_at = np.array([np.inf if b.gain_step_at_s is None else b.gain_step_at_s for b in boards])
    step_db = np.array([b.gain_step_db for b in boards], dtype=np.float32)
    per_board: list[list[tuple[np.ndarray, ...]]] = [[] for _ in boards]
    sent = 0
    for di, (dev, dss) in enumerate(zip(devices, radio_ss.spawn(len(devices)), strict=True)):
        rng = np.random.default_rng(dss)
        tr = dev.track
        times = _advert_times(dev, duration, scenario.tags.adv_delay_max_s, rng)
        k = np.arange(len(times))
        seg = np.searchsorted(tr.t1, times, side="right")
        ok = seg < len(tr.t0)
        seg = np.minimum(seg, len(tr.t0) - 1)
        ok &= (tr.t0[seg] <= times) & tr.advertising[seg]
        times, k, seg = times[ok], k[ok], seg[ok]
        sent += len(times)
        if not len(times):
            continue
        # Geometry per (segment, board): few segments, so this is cheap; adverts then index into it.
        dist = np.linalg.norm(tr.pos[:, None, :] - bpos[None, :, :], axis=-1)
        walls = venue.walls_crossed(tr.pos[:, None, :], bpos[None, :, :])
        floors = venue.floors_crossed(tr.pos[:, None, 2], bpos[None, :, 2])
        mean = mean_rssi_dbm(dev.p1_dbm, dist, walls, floors, scenario.radio).astype(np.float32)
        # A gain step adds to the board's offset from its minute on; the draws stay the same either way.
        offset = offsets[None, :] + np.where(
            times[:, None] >= step_at[None, :], step_db[None, :], np.float32(0)
        )
        rssi, heard = sample_reports(mean[seg], offset, scenario.radio, rng)
        heard &= times[:, None] < until[None, :]
        for b in range(len(boards)):
            idx = np.flatnonzero(heard[:, b])
            if len(idx):
                per_board[b].append((times[idx], np.full(len(idx), di, dtype=np.int32), k[idx], rssi[idx, b]))
    heard_all = []
    for parts in per_board:
        if parts:
            t, d, kk, r = (np.concatenate(x) for x in zip(*parts, strict=True))
        else:
            t, d, kk, r = np.zeros(0), np.zeros(0, np.int32), np.zeros(0, np.int64), np.zeros(0, np.int16)
        order = np.lexsort((d, t))
        heard_all.append(Heard(t[order], d[order], kk[order], r[order]))
    return Simulation(
        scenario, duration, tuple(devices), boards, tuple(heard_all), visitors, without_tag, sent
    )


# ---------------------------------------------------------------- adverts as a board sees them


def board_adverts(sim: Simulation, board_index: int) -> Iterator[Advert]:
    """The `Advert` values of one board's recording, in time order (board monotonic time, ms resolution)."""
    board = sim.boards[board_index]
    h = sim.heard[board_index]
    t_ms = np.rint(board.board_time(h.t_true) * 1000.0).astype(np.int64)
    tags = sim.scenario.tags
    devices = sim.devices
    tlm_every = tags.tlm_every
    drop_per_s = tags.battery_drop_mv_per_hour / 3600.0
    for tms, di, k, r, tt in zip(
        t_ms.tolist(), h.device.tolist(), h.k.tolist(), h.rssi.tolist(), h.t_true.tolist(), strict=True
    ):
        dev = devices[di]
        addr = dev.addresses[0]
        service_data = dev.service_data
        if dev.rotation_s:
            addr = dev.addresses[min(int(tt // dev.rotation_s), len(dev.addresses) - 1)]
        elif dev.eddystone is not None and (k + dev.eddystone[2]) % tlm_every == 0:
            battery0, temp, _ = dev.eddystone
            # Tags were switched on a day before the recording; the count keeps running from there.
            service_data = {
                EDDYSTONE_UUID: eddystone_tlm_frame(
                    int(battery0 - drop_per_s * tt), round(temp * 4) / 4, 172_800 + k, 86_400.0 + tt
                )
            }
        yield Advert(tms * 1_000_000, addr, 1, r, None, dev.manufacturer, service_data, dev.service_uuids)


# ---------------------------------------------------------------- files


def _gzip_deterministic(src: Path, dst: Path) -> None:
    """gzip ``src`` to ``dst`` with mtime 0 and no file name in the header, so reruns are byte-identical."""
    with (
        open(src, "rb") as fi,
        open(dst, "wb") as fo,
        gzip.GzipFile(filename="", mode="wb", fileobj=fo, compresslevel=9, mtime=0) as gz,
    ):
        shutil.copyfileobj(fi, gz, 1 << 20)


def write_recordings(sim: Simulation, out_dir: Path) -> dict[str, int]:
    """Write ``<board>.jsonl.gz`` for every board with the project's recording writer; returns line counts."""
    from listenpost.agent.sources.replay import write_recording

    counts = {}
    for i, b in enumerate(sim.boards):
        plain = out_dir / f".{b.name}.jsonl.tmp"
        try:
            counts[b.name] = write_recording(
                plain,
                board_adverts(sim, i),
                board=b.name,
                boot=b.boot,
                wall_at_start=round(sim.scenario.start_wall + b.wall_error_s, 3),
            )
            _gzip_deterministic(plain, out_dir / f"{b.name}.jsonl.gz")
        finally:
            plain.unlink(missing_ok=True)
    return counts


def _merge_segments(track: Track, names: tuple[str, ...]) -> list[list[Any]]:
    """Run-length room segments ``[t0, t1, room, holder]``, seconds to 0.1 s; moves inside a room merge."""
    out: list[list[Any]] = []
    for t0, t1, room, holder in zip(
        track.t0.tolist(), track.t1.tolist(), track.room.tolist(), track.holder.tolist(), strict=True
    ):
        label = Holder(holder).name.lower()
        if (
            out
            and out[-1][2] == names[room]
            and out[-1][3] == label
            and abs(out[-1][1] - round(t0, 1)) < 0.11
        ):
            out[-1][1] = round(t1, 1)
        else:
            out.append([round(t0, 1), round(t1, 1), names[room], label])
    return out


def truth_document(sim: Simulation, counts: dict[str, int] | None = None) -> dict[str, Any]:
    """What really happened, as one JSON-ready mapping."""
    s = sim.scenario
    names = tuple(r.name for r in s.rooms)
    boards = {
        b.name: BoardTruth(
            name=b.name,
            room=b.room,
            pos_m=b.pos,
            file=f"{b.name}.jsonl.gz",
            boot=b.boot,
            skew_ppm=b.skew_ppm,
            uptime_at_start_s=b.uptime_at_start_s,
            wall_error_s=b.wall_error_s,
            true_offset_db=b.offset_db,
            adverts=int(len(h.t_true)) if counts is None else counts[b.name],
            last_advert_true_s=round(float(h.t_true[-1]), 3) if len(h.t_true) else None,
            power_off_at_s=b.power_off_at_s,
            radio_hang_at_s=b.radio_hang_at_s,
            gain_step_at_s=b.gain_step_at_s,
            gain_step_db=b.gain_step_db,
        ).entry()
        for b, h in zip(sim.boards, sim.heard, strict=True)
    }
    tags = {}
    for d in sim.devices:
        if d.tag_id is not None:
            tags[d.tag_id] = {
                "kind": d.kind.value,
                "address": d.addresses[0],
                "segments": _merge_segments(d.track, names),
            }
    return {
        "format": TRUTH_FORMAT,
        "version": TRUTH_VERSION,
        "scenario": s.name,
        "seed": s.seed,
        "duration_s": sim.duration_s,
        "start_wall": s.start_wall,
        "notes": TRUTH_NOTES,
        "venue": {
            "ibeacon_uuid": s.tags.venue_uuid,
            "ibeacon_major": s.tags.ibeacon_major,
            "reference_major": s.tags.reference_major,
            "eddystone_namespace": s.tags.eddystone_namespace.hex(),
            "floor_height_m": s.floor_height_m,
            "floors": list(s.floors),
            "rooms": {
                r.name: {
                    "title": r.title,
                    "floor": r.floor,
                    "x": list(r.x),
                    "y": list(r.y),
                    "doors": list(r.doors),
                }
                for r in s.rooms
            },
        },
        "decode_rules": [s.tags.custom_rule.as_dict()],
        "radio": {
            "exponent": s.radio.exponent,
            "wall_db": s.radio.wall_db,
            "floor_db": s.radio.floor_db,
            "shadowing_sigma_db": s.radio.shadowing_sigma_db,
            "sensitivity_dbm": s.radio.sensitivity_dbm,
            "hear_probability": s.radio.hear_probability,
            "p1_dbm": s.tags.measured_power_dbm,
        },
        "faults": {
            b.name: {
                k: v
                for k, v in (
                    ("power_off_at_s", b.power_off_at_s),
                    ("radio_hang_at_s", b.radio_hang_at_s),
                    ("gain_step_at_s", b.gain_step_at_s),
                )
                if v is not None
            }
            | ({"gain_step_db": b.gain_step_db} if b.gain_step_at_s is not None else {})
            | ({"wall_error_s": b.wall_error_s} if abs(b.wall_error_s) > 1 else {})
            | ({"skew_ppm": b.skew_ppm} if abs(b.skew_ppm) > s.clocks.skew_ppm_max else {})
            for b in sim.boards
            if b.power_off_at_s is not None
            or b.radio_hang_at_s is not None
            or b.gain_step_at_s is not None
            or abs(b.wall_error_s) > 1
            or abs(b.skew_ppm) > s.clocks.skew_ppm_max
        },
        "boards": boards,
        "tags": tags,
        "visitors": {"arrived": sim.visitors, "without_tag": sim.without_tag},
        "noise": {
            "phones": sum(d.kind is DeviceKind.PHONE for d in sim.devices),
            "fixed": sum(d.kind is DeviceKind.NOISE for d in sim.devices),
        },
        "adverts_sent": sim.adverts_sent,
    }


def tag_lines(sim: Simulation) -> list[str]:
    """The registered tag identities (visitor and reference tags), canonical form."""
    return [d.tag_id for d in sim.devices if d.tag_id is not None]


@dataclass(frozen=True, slots=True)
class Result:
    """What `generate` wrote."""

    out_dir: Path
    files: tuple[Path, ...]
    lines: dict[str, int]
    """Advertisement lines per board recording."""
    seconds: dict[str, float]
    """Wall-clock seconds per phase (``simulate``, ``recordings``, ``btsnoop``, ``truth``)."""


def generate(
    scenario: Scenario,
    minutes: float,
    out_dir: str | Path,
    *,
    seed: int | None = None,
    btsnoop_board: str | None = "g0-a",
) -> Result:
    """
    Simulate and write everything into ``out_dir`` (created if missing).

    Args:
        btsnoop_board: board whose adverts also go to ``<board>.btsnoop``; ``None`` for none.
    Raises:
        ValueError: ``btsnoop_board`` is not a board of the scenario, or minutes <= 0.
    """
    if btsnoop_board is not None and btsnoop_board not in [b.name for b in scenario.boards]:
        raise ValueError(f"btsnoop board {btsnoop_board!r} is not in the scenario")
    if seed is not None:
        scenario = replace(scenario, seed=seed)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    timing: dict[str, float] = {}
    t0 = time.perf_counter()
    sim = simulate(scenario, minutes)
    timing["simulate"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    counts = write_recordings(sim, out)
    timing["recordings"] = time.perf_counter() - t0
    files = [out / f"{b.name}.jsonl.gz" for b in sim.boards]
    if btsnoop_board is not None:
        t0 = time.perf_counter()
        files.append(write_btsnoop(sim, btsnoop_board, out / f"{btsnoop_board}.btsnoop.gz"))
        timing["btsnoop"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    truth = truth_document(sim, counts)
    truth["btsnoop"] = f"{btsnoop_board}.btsnoop.gz" if btsnoop_board else None
    write_truth(out / "truth.json", truth)
    _write_atomic(
        out / "tags.txt",
        f"# registered tags of scenario {scenario.name} (seed {scenario.seed})\n"
        + "".join(t + "\n" for t in tag_lines(sim)),
    )
    files += [out / "truth.json", out / "tags.txt"]
    timing["truth"] = time.perf_counter() - t0
    log.info(
        "sim_written",
        scenario=scenario.name,
        minutes=minutes,
        seed=scenario.seed,
        out=str(out),
        lines=sum(counts.values()),
        **{f"{k}_s": round(v, 2) for k, v in timing.items()},
    )
    return Result(out, tuple(files), counts, timing)


def _write_atomic(path: Path, text: str) -> None:
    tmp = path.with_name(f".{path.name}.tmp")
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, path)


def write_btsnoop(sim: Simulation, board: str, path: Path) -> Path:
    """
    Write one board's adverts as a gzip'd btsnoop capture (datalink 2001, as ``btmon -w`` writes) with
    the project's capture writer. Record times are the board's wall clock, Unix µs.
    """
    from listenpost.agent.sources.btsnoop import DATALINK_MONITOR, BtsnoopWriter

    i = [b.name for b in sim.boards].index(board)
    b = sim.boards[i]
    wall0_us = round((sim.scenario.start_wall + b.wall_error_s) * 1e6)
    t_us = (wall0_us + np.rint(sim.heard[i].t_true * 1e6).astype(np.int64)).tolist()
    plain = path.with_name(f".{path.name}.tmp")
    try:
        with BtsnoopWriter(plain, datalink=DATALINK_MONITOR) as w:
            for tu, advert in zip(t_us, board_adverts(sim, i), strict=True):
                w.write_advert(tu, advert)
        _gzip_deterministic(plain, path)
    finally:
        plain.unlink(missing_ok=True)
    return path
