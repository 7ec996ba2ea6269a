"""
Scenario YAML → validated frozen dataclasses.

A scenario describes one invented venue: floors, rooms (axis-aligned rectangles on a per-floor plan)
and their doors, receiver boards with their hidden hardware quirks and faults, the tag population,
noise devices, the radio model and the visitor flow. Every error names the file and the key path,
through `listenpost.core.settings.Section`, e.g. ``brackenford.yaml: boards[3].room: unknown room 'G9'``.

All lengths are metres, times seconds, powers dBm, gains and losses dB.
"""

from __future__ import annotations

import enum
import re
import uuid
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import Any

from listenpost.core.errors import ConfigError
from listenpost.core.settings import Section, load_yaml, non_negative, positive

_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,31}$")
_BOARD = re.compile(r"^[a-z0-9][a-z0-9._-]{0,62}$")


def _probability(v: float) -> str | None:
    return None if 0.0 <= v <= 1.0 else "must be within 0..1"


def _point(s: Section, name: str) -> tuple[float, float, float]:
    raw = s.get(name, list)
    if len(raw) != 3 or not all(isinstance(v, int | float) and not isinstance(v, bool) for v in raw):
        raise s.fail(name, f"must be [x, y, z] in metres, got {raw!r}")
    return (float(raw[0]), float(raw[1]), float(raw[2]))


def _span(s: Section, name: str) -> tuple[float, float]:
    raw = s.get(name, list)
    if len(raw) != 2 or not all(isinstance(v, int | float) and not isinstance(v, bool) for v in raw):
        raise s.fail(name, f"must be [low, high], got {raw!r}")
    lo, hi = float(raw[0]), float(raw[1])
    if not lo < hi:
        raise s.fail(name, f"low must be < high, got {raw!r}")
    return lo, hi


def _int_span(s: Section, name: str) -> tuple[int, int]:
    raw = s.get(name, list)
    if (
        len(raw) != 2
        or not all(isinstance(v, int) and not isinstance(v, bool) for v in raw)
        or raw[0] > raw[1]
    ):
        raise s.fail(name, f"must be [first, last] integers with first <= last, got {raw!r}")
    return int(raw[0]), int(raw[1])


def _hex(s: Section, name: str, nbytes: int | None = None, default: str | None = None) -> bytes:
    text = s.get(name, str, default)
    try:
        value = bytes.fromhex(text)
    except ValueError:
        raise s.fail(name, f"must be hex bytes, got {text!r}") from None
    if nbytes is not None and len(value) != nbytes:
        raise s.fail(name, f"must be {nbytes} bytes, got {len(value)}")
    return value


@dataclass(frozen=True, slots=True)
class Room:
    """One room: a rectangle on its floor's plan, with the rooms a visitor can walk to from it."""

    name: str
    """Short name, e.g. ``G3``."""
    title: str
    floor: int
    """Floor level, 0 = ground."""
    x: tuple[float, float]
    """West and east wall, metres."""
    y: tuple[float, float]
    """South and north wall, metres."""
    doors: tuple[str, ...]
    """Rooms reachable through a door or a stair."""
    dwell_factor: float = 1.0
    """Multiplies the median dwell time (large galleries keep people longer, landings shorter)."""
    weight: float = 1.0
    """Relative attraction when a visitor picks the next room (0 = closed)."""


@dataclass(frozen=True, slots=True)
class BoardSpec:
    """One receiver board as the scenario defines it; ``None`` values are drawn from the seed."""

    name: str
    room: str
    at: tuple[float, float, float]
    """Position on its floor, metres (z above that floor's slab)."""
    offset_db: float | None = None
    """Hidden RSSI offset this board's adapter adds to every report, dB."""
    skew_ppm: float | None = None
    """Monotonic clock rate error, parts per million (positive: runs fast)."""
    wall_error_s: float | None = None
    """Wall clock minus true time, seconds."""
    power_off_at_s: float | None = None
    """Recording time at which the board loses power for good, seconds."""
    radio_hang_at_s: float | None = None
    """Recording time at which the radio stops delivering adverts (the process lives on), seconds."""
    gain_step_at_s: float | None = None
    """Recording time at which the board's receive gain changes for good (antenna knocked), seconds."""
    gain_step_db: float = 0.0
    """The change in every report from ``gain_step_at_s`` on, dB (negative: hears weaker)."""


@dataclass(frozen=True, slots=True)
class ClockSpec:
    """Ranges the per-board clock parameters are drawn from when the board does not fix them."""

    skew_ppm_max: float = 30.0
    """Skew drawn uniformly from ±this, ppm."""
    uptime_s: tuple[float, float] = (120.0, 900.0)
    """Time since boot at recording start, seconds."""
    wall_error_s_max: float = 0.02
    """Wall-clock error of a board with network time, drawn from ±this, seconds."""
    offset_db_max: float = 4.0
    """Hidden RSSI offset drawn from ±this, dB."""


@dataclass(frozen=True, slots=True)
class Placed:
    """A fixed device position."""

    room: str
    at: tuple[float, float, float]


@dataclass(frozen=True, slots=True)
class ReferenceTag:
    """A fixed calibration tag (iBeacon format)."""

    minor: int
    place: Placed


@dataclass(frozen=True, slots=True)
class DecodeRuleSpec:
    """The configured decode rule the custom firmware needs (the agent's `DecodeRule` shape)."""

    name: str
    company_id: int
    prefix: bytes
    offset: int
    length: int

    def as_dict(self) -> dict[str, Any]:
        """The rule in the form config files and the collector take."""
        return {
            "name": self.name,
            "company_id": self.company_id,
            "prefix": self.prefix.hex(),
            "offset": self.offset,
            "length": self.length,
        }


@dataclass(frozen=True, slots=True)
class TagSpec:
    """The tag population."""

    interval_s: float
    """Advertising interval, seconds."""
    adv_delay_max_s: float
    """Random delay added to each advertising event, seconds (the spec's advDelay)."""
    measured_power_dbm: int
    """RSSI at 1 m, dBm (also the iBeacon measured-power byte)."""
    carry_height_m: float
    """Height of a carried tag above the floor, metres."""
    venue_uuid: str
    ibeacon_major: int
    ibeacon_minors: tuple[int, int]
    eddystone_namespace: bytes
    eddystone_instances: tuple[int, int]
    tlm_every: int
    """Every n-th Eddystone advertisement is a TLM frame instead of a UID frame."""
    battery_mv: tuple[float, float]
    """Battery voltage at recording start drawn from this range, millivolts."""
    battery_drop_mv_per_hour: float
    temperature_c: float
    custom_rule: DecodeRuleSpec
    custom_numbers: tuple[int, int]
    reference_major: int
    reference: tuple[ReferenceTag, ...]
    handout_box: Placed
    return_box: Placed
    handout_advertising: bool
    """Whether tags waiting in the hand-out box advertise (True) or are switched off."""
    restock_minutes: float
    """Staff move returned tags to the hand-out box every this many minutes."""


class NoiseKind(enum.Enum):
    """Fixed noise devices the filter must drop."""

    IBEACON = "ibeacon"
    """An iBeacon-format beacon with a UUID nobody registered."""
    MANUFACTURER = "manufacturer"
    """Manufacturer data under another company ID."""


@dataclass(frozen=True, slots=True)
class FixedNoise:
    """One fixed noise device."""

    kind: NoiseKind
    place: Placed
    interval_s: float
    measured_power_dbm: int
    uuid: str | None = None
    major: int = 0
    minor: int = 0
    company_id: int = 0
    payload: bytes = b""


@dataclass(frozen=True, slots=True)
class NoiseSpec:
    """Devices that are not tags."""

    phone_fraction: float
    """Share of visitors carrying a phone that advertises."""
    phone_interval_s: float
    phone_rotation_s: float
    """Phones change their random address this often, seconds."""
    phone_power_dbm: int
    fixed: tuple[FixedNoise, ...]


@dataclass(frozen=True, slots=True)
class RadioSpec:
    """Log-distance path loss with walls, floor slabs and shadowing."""

    exponent: float = 3.0
    """Path-loss exponent n from the 1 m reference."""
    wall_db: float = 5.0
    """Loss per wall crossed, dB."""
    floor_db: float = 15.0
    """Loss per floor slab crossed, dB."""
    shadowing_sigma_db: float = 5.0
    """Standard deviation of the per-advertisement Gaussian shadowing, dB."""
    sensitivity_dbm: float = -100.0
    """Reports below this are not heard, dBm."""
    hear_probability: float = 0.9
    """Chance a board hears an advertisement that is strong enough (collisions, scan gaps)."""


@dataclass(frozen=True, slots=True)
class VisitorSpec:
    """The visitor flow."""

    arrivals_per_minute: float
    warmup_minutes: float
    """Visitors start arriving this long before the recording, so it opens in steady state."""
    dwell_median_s: float
    dwell_sigma: float
    """Sigma of the log-normal dwell time (natural log)."""
    rooms_per_visit_mean: float
    cafe_room: str | None
    """The café: only some visitors go there, and only once."""
    cafe_probability: float
    shop_room: str | None
    """The shop on the exit route: some visitors stop there before returning their tag."""
    shop_on_exit_probability: float
    move_every_s: float
    """Visitors move to a new spot in the room this often, seconds."""
    wall_margin_m: float


@dataclass(frozen=True, slots=True)
class Scenario:
    """A whole venue."""

    name: str
    seed: int
    start_wall: float
    """True Unix time at recording start, seconds."""
    floor_height_m: float
    floors: tuple[str, ...]
    """Floor names by level (index 0 = ground)."""
    rooms: tuple[Room, ...]
    boards: tuple[BoardSpec, ...]
    clocks: ClockSpec
    tags: TagSpec
    noise: NoiseSpec
    radio: RadioSpec
    visitors: VisitorSpec
    origin: str = "scenario"

    def room(self, name: str) -> Room:
        """The room called ``name``."""
        for r in self.rooms:
            if r.name == name:
                return r
        raise KeyError(name)


def _placed(s: Section, rooms: dict[str, Room]) -> Placed:
    room = s.get("room", str, check=lambda v: None if v in rooms else "unknown room")
    at = _point(s, "at")
    r = rooms[room]
    if not (r.x[0] < at[0] < r.x[1] and r.y[0] < at[1] < r.y[1]):
        raise s.fail("at", f"must lie inside room {room} (x {r.x}, y {r.y}), got {list(at)!r}")
    return Placed(room, at)


def _parse_rooms(top: Section, floors: tuple[str, ...]) -> tuple[Room, ...]:
    rooms: list[Room] = []
    items = top.items("rooms")
    if not items:
        raise top.fail("rooms", "needs at least one room")
    for s in items:
        name = s.get("name", str, check=lambda v: None if _NAME.fullmatch(v) else "must be a short name")
        floor = s.get(
            "floor", str, check=lambda v: None if v in floors else f"must be one of {', '.join(floors)}"
        )
        rooms.append(
            Room(
                name=name,
                title=s.get("title", str, name),
                floor=floors.index(floor),
                x=_span(s, "x"),
                y=_span(s, "y"),
                doors=tuple(s.get("doors", list)),
                dwell_factor=s.get("dwell_factor", float, 1.0, positive),
                weight=s.get("weight", float, 1.0, non_negative),
            )
        )
        s.done()
    names = [r.name for r in rooms]
    for i, (s, r) in enumerate(zip(items, rooms, strict=True)):
        if names.index(r.name) != i:
            raise s.fail("name", f"duplicate room {r.name!r}")
        for d in r.doors:
            if d not in names:
                raise s.fail("doors", f"unknown room {d!r}")
            if r.name not in rooms[names.index(d)].doors:
                raise s.fail("doors", f"door to {d!r} must be listed on both sides")
    # Overlapping rectangles on one floor would make "which room is this point in" ambiguous.
    for i, a in enumerate(rooms):
        for b in rooms[i + 1 :]:
            if (
                a.floor == b.floor
                and a.x[0] < b.x[1]
                and b.x[0] < a.x[1]
                and a.y[0] < b.y[1]
                and b.y[0] < a.y[1]
            ):
                raise items[i].fail("x", f"room {a.name} overlaps room {b.name}")
    return tuple(rooms)


def parse_scenario(data: Any, origin: str = "scenario") -> Scenario:
    """Validate a parsed scenario; every error names ``origin`` and the key path."""
    top = Section(data, "", origin)
    name = top.get("name", str, check=lambda v: None if _NAME.fullmatch(v) else "must be a short name")
    seed = top.get("seed", int, check=lambda v: None if v >= 0 else "must be >= 0")
    start_wall = top.get("start_wall", float, check=positive)
    floor_height = top.get("floor_height_m", float, check=positive)
    floors = tuple(top.get("floors", list))
    if not floors or not all(isinstance(f, str) for f in floors) or len(set(floors)) != len(floors):
        raise top.fail(
            "floors", f"must be a list of distinct floor names, ground first, got {list(floors)!r}"
        )
    rooms = _parse_rooms(top, floors)
    by_name = {r.name: r for r in rooms}

    c = top.section("clocks")
    clocks = ClockSpec(
        skew_ppm_max=c.get("skew_ppm_max", float, 30.0, non_negative),
        uptime_s=_span(c, "uptime_s") if "uptime_s" in c.data else (120.0, 900.0),
        wall_error_s_max=c.get("wall_error_s_max", float, 0.02, non_negative),
        offset_db_max=c.get("offset_db_max", float, 4.0, non_negative),
    )
    c.done()

    boards: list[BoardSpec] = []
    items = top.items("boards")
    if not items:
        raise top.fail("boards", "needs at least one board")
    for s in items:
        bname = s.get(
            "name", str, check=lambda v: None if _BOARD.fullmatch(v) else "must be a lower-case board name"
        )
        place = _placed(s, by_name)
        boards.append(
            BoardSpec(
                name=bname,
                room=place.room,
                at=place.at,
                offset_db=s.get(
                    "offset_db",
                    float,
                    None,
                    check=lambda v: None if -40 <= v <= 40 else "must be within ±40 dB",
                ),
                skew_ppm=s.get(
                    "skew_ppm",
                    float,
                    None,
                    check=lambda v: None if -1000 <= v <= 1000 else "must be within ±1000 ppm",
                ),
                wall_error_s=s.get("wall_error_s", float, None),
                power_off_at_s=s.get("power_off_at_s", float, None, non_negative),
                radio_hang_at_s=s.get("radio_hang_at_s", float, None, non_negative),
                gain_step_at_s=s.get("gain_step_at_s", float, None, non_negative),
                gain_step_db=s.get(
                    "gain_step_db",
                    float,
                    0.0,
                    check=lambda v: None if -40 <= v <= 40 else "must be within ±40 dB",
                ),
            )
        )
        if (boards[-1].gain_step_at_s is None) != (boards[-1].gain_step_db == 0.0):
            raise s.fail("gain_step_db", "gain_step_at_s and a non-zero gain_step_db go together")
        s.done()
    if len({b.name for b in boards}) != len(boards):
        raise top.fail("boards", "board names must be unique")

    t = top.section("tags")
    ib = t.section("ibeacon")
    venue_uuid = ib.get("uuid", str)
    try:
        venue_uuid = str(uuid.UUID(venue_uuid))
    except ValueError:
        raise ib.fail("uuid", f"must be a UUID, got {venue_uuid!r}") from None
    ibeacon_major = ib.get("major", int, check=lambda v: None if 0 <= v <= 0xFFFF else "must be 0..65535")
    ibeacon_minors = _int_span(ib, "minors")
    ib.done()
    ed = t.section("eddystone")
    namespace = _hex(ed, "namespace", 10)
    instances = _int_span(ed, "instances")
    tlm_every = ed.get("tlm_every", int, 10, check=lambda v: None if v >= 2 else "must be >= 2")
    battery = _span(ed, "battery_mv")
    drop = ed.get("battery_drop_mv_per_hour", float, 10.0, non_negative)
    temperature = ed.get("temperature_c", float, 21.0)
    ed.done()
    cu = t.section("custom")
    rs = cu.section("rule")
    rule = DecodeRuleSpec(
        name=rs.get("name", str),
        company_id=rs.get(
            "company_id", int, check=lambda v: None if 0 <= v <= 0xFFFF else "must be 0..65535"
        ),
        prefix=_hex(rs, "prefix"),
        offset=rs.get("offset", int, check=lambda v: None if v >= 0 else "must be >= 0"),
        length=rs.get("length", int, check=lambda v: None if 1 <= v <= 8 else "must be 1..8"),
    )
    rs.done()
    numbers = _int_span(cu, "numbers")
    cu.done()
    rf = t.section("reference")
    ref_major = rf.get("major", int, check=lambda v: None if 0 <= v <= 0xFFFF else "must be 0..65535")
    refs = []
    for s in rf.items("tags"):
        refs.append(
            ReferenceTag(
                s.get("minor", int, check=lambda v: None if 0 <= v <= 0xFFFF else "must be 0..65535"),
                _placed(s, by_name),
            )
        )
        s.done()
    rf.done()
    bx = t.section("boxes")
    ho, rt = bx.section("handout"), bx.section("return")
    handout, ret = _placed(ho, by_name), _placed(rt, by_name)
    ho.done()
    rt.done()
    handout_adv = bx.get("handout_advertising", bool, True)
    restock = bx.get("restock_minutes", float, 15.0, positive)
    bx.done()
    tags = TagSpec(
        interval_s=t.get("interval_s", float, 0.5, positive),
        adv_delay_max_s=t.get("adv_delay_max_s", float, 0.01, non_negative),
        measured_power_dbm=t.get(
            "measured_power_dbm", int, -59, check=lambda v: None if -127 <= v <= 20 else "must be -127..20"
        ),
        carry_height_m=t.get("carry_height_m", float, 1.2, positive),
        venue_uuid=venue_uuid,
        ibeacon_major=ibeacon_major,
        ibeacon_minors=ibeacon_minors,
        eddystone_namespace=namespace,
        eddystone_instances=instances,
        tlm_every=tlm_every,
        battery_mv=battery,
        battery_drop_mv_per_hour=drop,
        temperature_c=temperature,
        custom_rule=rule,
        custom_numbers=numbers,
        reference_major=ref_major,
        reference=tuple(refs),
        handout_box=handout,
        return_box=ret,
        handout_advertising=handout_adv,
        restock_minutes=restock,
    )
    t.done()
    if ibeacon_major == ref_major:
        raise t.fail("reference.major", "must differ from the visitor tags' major")

    n = top.section("noise")
    ph = n.section("phones")
    phone_fraction = ph.get("visitor_fraction", float, 0.3, _probability)
    phone_interval = ph.get("interval_s", float, 1.0, positive)
    phone_rotation = ph.get("address_rotation_s", float, 900.0, positive)
    phone_power = ph.get("measured_power_dbm", int, -60)
    ph.done()
    fixed: list[FixedNoise] = []
    for s in n.items("fixed"):
        kind_text = s.get(
            "kind",
            str,
            check=lambda v: (
                None
                if v in [k.value for k in NoiseKind]
                else f"must be one of {', '.join(k.value for k in NoiseKind)}"
            ),
        )
        kind = NoiseKind(kind_text)
        place = _placed(s, by_name)
        interval = s.get("interval_s", float, 1.0, positive)
        power = s.get("measured_power_dbm", int, -60)
        if kind is NoiseKind.IBEACON:
            u = s.get("uuid", str)
            try:
                u = str(uuid.UUID(u))
            except ValueError:
                raise s.fail("uuid", f"must be a UUID, got {u!r}") from None
            if u == venue_uuid:
                raise s.fail("uuid", "noise must not use the venue UUID")
            fixed.append(
                FixedNoise(
                    kind,
                    place,
                    interval,
                    power,
                    uuid=u,
                    major=s.get("major", int, 1),
                    minor=s.get("minor", int, 1),
                )
            )
        else:
            cid = s.get("company_id", int, check=lambda v: None if 0 <= v <= 0xFFFF else "must be 0..65535")
            if cid == rule.company_id:
                raise s.fail("company_id", "noise must not use the custom firmware's company ID")
            fixed.append(FixedNoise(kind, place, interval, power, company_id=cid, payload=_hex(s, "payload")))
        s.done()
    n.done()
    noise = NoiseSpec(phone_fraction, phone_interval, phone_rotation, phone_power, tuple(fixed))

    r = top.section("radio")
    radio = RadioSpec(
        exponent=r.get("exponent", float, 3.0, positive),
        wall_db=r.get("wall_db", float, 5.0, non_negative),
        floor_db=r.get("floor_db", float, 15.0, non_negative),
        shadowing_sigma_db=r.get("shadowing_sigma_db", float, 5.0, non_negative),
        sensitivity_dbm=r.get("sensitivity_dbm", float, -100.0),
        hear_probability=r.get("hear_probability", float, 0.9, _probability),
    )
    r.done()

    v = top.section("visitors")
    visitors = VisitorSpec(
        arrivals_per_minute=v.get("arrivals_per_minute", float, 4.0, non_negative),
        warmup_minutes=v.get("warmup_minutes", float, 40.0, non_negative),
        dwell_median_s=v.get("dwell_median_s", float, 90.0, positive),
        dwell_sigma=v.get("dwell_sigma", float, 0.6, non_negative),
        rooms_per_visit_mean=v.get("rooms_per_visit_mean", float, 8.0, positive),
        cafe_room=v.get("cafe_room", str, None, check=lambda r: None if r in by_name else "unknown room"),
        cafe_probability=v.get("cafe_probability", float, 0.35, _probability),
        shop_room=v.get("shop_room", str, None, check=lambda r: None if r in by_name else "unknown room"),
        shop_on_exit_probability=v.get("shop_on_exit_probability", float, 0.3, _probability),
        move_every_s=v.get("move_every_s", float, 30.0, positive),
        wall_margin_m=v.get("wall_margin_m", float, 0.5, non_negative),
    )
    v.done()
    top.done()
    return Scenario(
        name,
        seed,
        start_wall,
        floor_height,
        floors,
        rooms,
        tuple(boards),
        clocks,
        tags,
        noise,
        radio,
        visitors,
        origin,
    )


def builtin_path(name: str) -> Path:
    """Path of a scenario shipped with the package (``brackenford``)."""
    return Path(str(resources.files("listenpost.scenarios") / f"{name}.yaml"))


def load_scenario(ref: str | Path) -> Scenario:
    """
    Load a scenario from a file path, or by the name of a shipped one (``brackenford``).

    Raises:
        ConfigError: unreadable file, bad YAML (with line) or a bad value (with key path).
    """
    p = Path(ref)
    if not p.exists() and _NAME.fullmatch(str(ref)) and builtin_path(str(ref)).exists():
        p = builtin_path(str(ref))
    if not p.exists():
        raise ConfigError(f"{ref}: no such scenario file (shipped scenarios: brackenford)")
    return parse_scenario(load_yaml(p), origin=str(p))
