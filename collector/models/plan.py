"""
The venue plan: floors, rooms as polygons in metres, where each board hangs and where the fixed
reference tags sit. The installer writes it once (YAML, docs/technician.md "The venue plan file") and
imports it with ``collector plan import FILE``; the plan view draws it, and calibration reads the
reference tags' positions from it.

Pure: `parse_plan` turns a parsed YAML/JSON document into a `VenuePlan` or raises `ConfigError`
naming the key path (``floors[0].rooms[2].polygon[1]: ...``); `VenuePlan.to_document` gives the
canonical document back (what the collector keeps), so a plan read, written and read again is equal.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from listenpost.core.errors import DecodeError
from listenpost.core.identity import parse_tag_id
from listenpost.core.settings import BOARD_NAME, Section, load_yaml

PLAN_FORMAT = "listenpost-venue-plan"
PLAN_VERSION = 1
PLAN_FILE = "venue-plan.json"
"""Where the collector keeps the imported plan, in its state directory (canonical JSON)."""

Point = tuple[float, float]


@dataclass(frozen=True, slots=True)
class Room:
    id: str
    """Short room id, unique in the plan (``G0``)."""
    name: str
    """The room as boards are registered with ``board add --room`` (``G0 Foyer``); boards are matched
    to rooms by position, this is for people."""
    polygon: tuple[Point, ...]
    """Outline on the floor's plan, metres, at least 3 corners, in order (either direction)."""

    def area_m2(self) -> float:
        p = self.polygon
        return abs(sum(p[i][0] * p[i - 1][1] - p[i - 1][0] * p[i][1] for i in range(len(p)))) / 2.0

    def contains(self, x: float, y: float) -> bool:
        """Point in polygon (even-odd rule); a point on an edge may fall either way."""
        inside, p = False, self.polygon
        for i in range(len(p)):
            (x1, y1), (x2, y2) = p[i - 1], p[i]
            if (y1 > y) != (y2 > y) and x < x1 + (y - y1) * (x2 - x1) / (y2 - y1):
                inside = not inside
        return inside


@dataclass(frozen=True, slots=True)
class Floor:
    id: str
    """The floor as boards are registered with ``board add --floor`` (``ground``)."""
    title: str
    level_m: float
    """Height of the floor above the venue's reference level, metres."""
    rooms: tuple[Room, ...]


@dataclass(frozen=True, slots=True)
class Placement:
    """A board or a reference tag: which floor, where on its plan, how high above that floor."""

    id: str
    floor: str
    x: float
    y: float
    height_m: float


@dataclass(frozen=True, slots=True)
class ReferenceTag(Placement):
    power_1m_dbm: float | None = None
    """The tag's RSSI at 1 m as measured or as its firmware advertises, dBm (None: not known)."""


@dataclass(frozen=True, slots=True)
class VenuePlan:
    title: str
    floors: tuple[Floor, ...]
    boards: tuple[Placement, ...]
    reference_tags: tuple[ReferenceTag, ...]

    def floor(self, floor_id: str) -> Floor:
        return next(f for f in self.floors if f.id == floor_id)

    def room_at(self, floor_id: str, x: float, y: float) -> Room | None:
        return next((r for r in self.floor(floor_id).rooms if r.contains(x, y)), None)

    def to_document(self) -> dict[str, Any]:
        def place(p: Placement) -> dict[str, Any]:
            return {"floor": p.floor, "position": [p.x, p.y], "height_m": p.height_m}

        return {
            "format": PLAN_FORMAT,
            "version": PLAN_VERSION,
            "title": self.title,
            "floors": [
                {
                    "id": f.id,
                    "title": f.title,
                    "level_m": f.level_m,
                    "rooms": [
                        {"id": r.id, "name": r.name, "polygon": [[x, y] for x, y in r.polygon]}
                        for r in f.rooms
                    ],
                }
                for f in self.floors
            ],
            "boards": [{"name": b.id, **place(b)} for b in self.boards],
            "reference_tags": [
                {
                    "id": t.id,
                    **place(t),
                    **({"power_1m_dbm": t.power_1m_dbm} if t.power_1m_dbm is not None else {}),
                }
                for t in self.reference_tags
            ],
        }


def _finite(v: float) -> str | None:
    return None if math.isfinite(v) else "must be a finite number"


def _xy(s: Section, name: str) -> Point:
    raw = s.get(name, list)
    if len(raw) != 2 or not all(isinstance(v, int | float) and not isinstance(v, bool) for v in raw):
        raise s.fail(name, f"must be [x, y] in metres, got {raw!r}")
    if not all(math.isfinite(v) for v in raw):
        raise s.fail(name, f"must be finite numbers, got {raw!r}")
    return float(raw[0]), float(raw[1])


def _polygon(s: Section) -> tuple[Point, ...]:
    raw = s.get("polygon", list)
    if len(raw) < 3:
        raise s.fail("polygon", f"needs at least 3 corners [x, y] in metres, got {len(raw)}")
    points = []
    for i, v in enumerate(raw):
        where = f"polygon[{i}]"
        if not (isinstance(v, list) and len(v) == 2) or not all(
            isinstance(c, int | float) and not isinstance(c, bool) and math.isfinite(c) for c in v
        ):
            raise s.fail(where, f"must be [x, y] in metres, got {v!r}")
        points.append((float(v[0]), float(v[1])))
    if len(set(points)) < 3:
        raise s.fail("polygon", "needs at least 3 distinct corners")
    room = Room("", "", tuple(points))
    if room.area_m2() <= 0:
        raise s.fail("polygon", "encloses no area (all corners on one line)")
    return room.polygon


def _placement(s: Section, ident: str, floors: dict[str, Floor]) -> tuple[str, float, float, float]:
    floor = s.get("floor", str)
    if floor not in floors:
        raise s.fail("floor", f"must be one of the plan's floors {sorted(floors)}, got {floor!r}")
    x, y = _xy(s, "position")
    height = s.get("height_m", float, 0.0, _finite)
    return floor, x, y, height


def parse_plan(data: Any, origin: str = "plan") -> VenuePlan:
    """
    Validate a plan document (parsed YAML or JSON).

    Raises:
        ConfigError: ``"{origin}: {key path}: {problem}"`` for the first problem found.
    """
    top = Section(data, "", origin)
    fmt = top.get("format", str, PLAN_FORMAT)
    if fmt != PLAN_FORMAT:
        raise top.fail("format", f"must be {PLAN_FORMAT!r}, got {fmt!r}")
    version = top.get("version", int, PLAN_VERSION)
    if version != PLAN_VERSION:
        raise top.fail("version", f"this collector reads version {PLAN_VERSION}, got {version!r}")
    title = top.get("title", str, "")
    floors: dict[str, Floor] = {}
    room_ids: set[str] = set()
    floor_sections = top.items("floors")
    if not floor_sections:
        raise top.fail("floors", "needs at least one floor")
    for fs in floor_sections:
        fid = fs.get("id", str, check=lambda v: None if v.strip() else "must not be empty")
        if fid in floors:
            raise fs.fail("id", f"floor {fid!r} appears twice")
        rooms = []
        for rs in fs.items("rooms"):
            rid = rs.get("id", str, check=lambda v: None if v.strip() else "must not be empty")
            if rid in room_ids:
                raise rs.fail("id", f"room {rid!r} appears twice")
            room_ids.add(rid)
            rooms.append(Room(rid, rs.get("name", str, rid), _polygon(rs)))
            rs.done()
        floors[fid] = Floor(
            fid, fs.get("title", str, fid), fs.get("level_m", float, 0.0, _finite), tuple(rooms)
        )
        fs.done()
    boards: list[Placement] = []
    for bs in top.items("boards"):
        name = bs.get("name", str)
        if not BOARD_NAME.fullmatch(name):
            raise bs.fail("name", f"must be a board name (lower-case letters, digits, '-'), got {name!r}")
        if any(b.id == name for b in boards):
            raise bs.fail("name", f"board {name!r} appears twice")
        boards.append(Placement(name, *_placement(bs, name, floors)))
        bs.done()
    refs: list[ReferenceTag] = []
    for ts in top.items("reference_tags"):
        raw = ts.get("id", str)
        try:
            tag = parse_tag_id(raw)
        except DecodeError as e:
            raise ts.fail("id", str(e)) from None
        if any(t.id == tag for t in refs):
            raise ts.fail("id", f"tag {tag!r} appears twice")
        place = _placement(ts, tag, floors)
        power = ts.get(
            "power_1m_dbm", float, None, lambda v: None if -120 <= v <= 20 else "must be within -120..20 dBm"
        )
        refs.append(ReferenceTag(tag, *place, power_1m_dbm=power))
        ts.done()
    top.done()
    return VenuePlan(title, tuple(floors.values()), tuple(boards), tuple(refs))


def load_plan(path: str | Path) -> VenuePlan:
    """Read and validate a plan file (YAML or JSON); errors name the file and the key path."""
    return parse_plan(load_yaml(path), str(path))


def plan_from_truth(
    document: dict[str, Any], reference: list[tuple[str, str, tuple[float, float, float]]]
) -> dict[str, Any]:
    """
    The plan document of a simulated venue: rooms from ``truth.json``'s venue (rectangles ``x``/``y``
    on numbered floors), boards at their ``pos_m`` (z above the venue's ground), and the reference
    tags given as (canonical id, room, [x, y, z above its floor]).
    """
    venue = document["venue"]
    floors, height = venue["floors"], float(venue.get("floor_height_m", 0.0))
    rooms_by_floor: dict[int, list[dict[str, Any]]] = {i: [] for i in range(len(floors))}
    for rid, r in sorted(venue["rooms"].items()):
        (x0, x1), (y0, y1) = r["x"], r["y"]
        rooms_by_floor[r["floor"]].append(
            {"id": rid, "name": f"{rid} {r['title']}", "polygon": [[x0, y0], [x1, y0], [x1, y1], [x0, y1]]}
        )
    room_floor = {rid: floors[r["floor"]] for rid, r in venue["rooms"].items()}
    boards = []
    for name, b in sorted(document["boards"].items()):
        x, y, z = b["pos_m"]
        floor_index = venue["rooms"][b["room"]]["floor"]
        boards.append(
            {
                "name": name,
                "floor": floors[floor_index],
                "position": [x, y],
                "height_m": round(z - floor_index * height, 3),
            }
        )
    return {
        "format": PLAN_FORMAT,
        "version": PLAN_VERSION,
        "title": str(document.get("scenario", "")),
        "floors": [
            {"id": f, "title": f"{f.capitalize()} floor", "level_m": i * height, "rooms": rooms_by_floor[i]}
            for i, f in enumerate(floors)
        ],
        "boards": boards,
        "reference_tags": [
            {"id": tag, "floor": room_floor[room], "position": [at[0], at[1]], "height_m": at[2]}
            for tag, room, at in reference
        ],
    }


__all__ = [
    "PLAN_FILE",
    "Floor",
    "Placement",
    "ReferenceTag",
    "Room",
    "VenuePlan",
    "load_plan",
    "parse_plan",
    "plan_from_truth",
]
