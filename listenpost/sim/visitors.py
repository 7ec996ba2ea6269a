"""
Visitor flow → where every visitor tag (and every advertising phone) is, second by second.

Visitors arrive as a Poisson process. Each takes the tag that has waited longest in the hand-out box
at the entrance (the room of the hand-out box), wanders the door graph with log-normal dwell times,
walks back to the entrance (perhaps through the shop), drops the tag in the return box and leaves.
Staff move returned tags to the hand-out box every ``restock_minutes``. A visitor who finds the
hand-out box empty goes round without a tag (counted, not tracked).

Positions are piecewise constant: within a room a visitor moves to a new random spot every
``move_every_s``. Times are true seconds from recording start; the simulation starts
``warmup_minutes`` earlier so the recording opens on a venue already in steady state.
"""

from __future__ import annotations

import enum
import heapq
import math
from dataclasses import dataclass, field

import numpy as np

from listenpost.sim.scenario import Placed, Scenario
from listenpost.sim.venue import Venue


class Holder(enum.IntEnum):
    """Where a tag is."""

    HANDOUT_BOX = 0
    """Waiting at the entrance to be handed out."""
    VISITOR = 1
    """Carried by a visitor."""
    RETURN_BOX = 2
    """Returned, waiting for staff to restock it."""
    FIXED = 3
    """Mounted (reference tags, fixed noise devices)."""


@dataclass(frozen=True, slots=True)
class Track:
    """Piecewise-constant position of one device over the recording."""

    t0: np.ndarray
    """Segment starts, true seconds from recording start (float64)."""
    t1: np.ndarray
    """Segment ends, seconds."""
    pos: np.ndarray
    """Positions, shape (n, 3), metres; z above the ground slab."""
    room: np.ndarray
    """Room index per segment."""
    holder: np.ndarray
    """`Holder` value per segment."""
    advertising: np.ndarray
    """Whether the device advertises during the segment."""

    @staticmethod
    def fixed(pos: tuple[float, float, float], room: int, duration_s: float) -> Track:
        """A device that never moves."""
        return Track(
            np.array([0.0]),
            np.array([duration_s]),
            np.array([pos], dtype=float),
            np.array([room]),
            np.array([Holder.FIXED]),
            np.array([True]),
        )


@dataclass(slots=True)
class _TrackBuilder:
    t0: list[float] = field(default_factory=list)
    t1: list[float] = field(default_factory=list)
    pos: list[tuple[float, float, float]] = field(default_factory=list)
    room: list[int] = field(default_factory=list)
    holder: list[int] = field(default_factory=list)
    advertising: list[bool] = field(default_factory=list)

    def add(
        self,
        t0: float,
        t1: float,
        pos: tuple[float, float, float],
        room: int,
        holder: Holder,
        advertising: bool,
    ) -> None:
        if t1 > t0:
            self.t0.append(t0)
            self.t1.append(t1)
            self.pos.append(pos)
            self.room.append(room)
            self.holder.append(int(holder))
            self.advertising.append(advertising)

    def build(self, duration_s: float) -> Track:
        t0, t1 = np.array(self.t0, dtype=float), np.array(self.t1, dtype=float)
        keep = (t1 > 0) & (t0 < duration_s)
        return Track(
            np.clip(t0[keep], 0, duration_s),
            np.clip(t1[keep], 0, duration_s),
            np.array(self.pos, dtype=float).reshape(-1, 3)[keep],
            np.array(self.room, dtype=np.int64)[keep],
            np.array(self.holder, dtype=np.int64)[keep],
            np.array(self.advertising, dtype=bool)[keep],
        )


@dataclass(frozen=True, slots=True)
class VisitorRun:
    """Result of one visitor simulation."""

    tags: tuple[Track, ...]
    """One track per visitor tag, in the order the caller numbered them."""
    phones: tuple[Track, ...]
    """One track per advertising phone (only while its visitor is inside)."""
    visitors: int
    """Visitors who arrived during warm-up and recording."""
    without_tag: int
    """Visitors who found the hand-out box empty."""


def _placed_pos(scenario: Scenario, p: Placed) -> tuple[float, float, float]:
    floor = scenario.room(p.room).floor
    return (p.at[0], p.at[1], floor * scenario.floor_height_m + p.at[2])


def simulate_visitors(
    scenario: Scenario, venue: Venue, n_tags: int, duration_s: float, rng: np.random.Generator
) -> VisitorRun:
    """
    Run the visitor flow for ``duration_s`` seconds of recording (after the warm-up).

    Args:
        n_tags: visitor tags in the hand-out box at the start of the warm-up.
    """
    v = scenario.visitors
    tags = scenario.tags
    entrance = venue.index[tags.handout_box.room]
    handout_pos = _placed_pos(scenario, tags.handout_box)
    return_pos = _placed_pos(scenario, tags.return_box)
    restock_s = tags.restock_minutes * 60.0
    start = -v.warmup_minutes * 60.0
    builders = [_TrackBuilder() for _ in range(n_tags)]
    phones: list[Track] = []
    # (time the tag became available in the hand-out box, tie-break, tag)
    order = rng.permutation(n_tags)
    box: list[tuple[float, int, int]] = [(start, i, int(t)) for i, t in enumerate(order)]
    heapq.heapify(box)
    weights = np.array([r.weight for r in scenario.rooms])
    dwell_factor = np.array([r.dwell_factor for r in scenario.rooms])
    cafe = venue.index[v.cafe_room] if v.cafe_room else -1
    shop = venue.index[v.shop_room] if v.shop_room else -1

    def spot(room: int) -> tuple[float, float, float]:
        m = v.wall_margin_m
        x = rng.uniform(venue.x0[room] + m, venue.x1[room] - m)
        y = rng.uniform(venue.y0[room] + m, venue.y1[room] - m)
        return (float(x), float(y), float(venue.floor[room] * venue.floor_height + tags.carry_height_m))

    def dwell(room: int, factor: float = 1.0) -> float:
        return float(
            v.dwell_median_s * dwell_factor[room] * factor * math.exp(v.dwell_sigma * rng.standard_normal())
        )

    visitors = without_tag = 0
    t = start
    rate = v.arrivals_per_minute / 60.0
    while rate > 0:
        t += rng.exponential(1.0 / rate)
        if t >= duration_s:
            break
        visitors += 1
        # The itinerary: (room, dwell seconds).
        stops = [(entrance, dwell(entrance))]
        wants_cafe = cafe >= 0 and rng.random() < v.cafe_probability
        here, prev = entrance, -1
        for _ in range(1 + rng.poisson(max(v.rooms_per_visit_mean - 1, 0))):
            cand = np.array(venue.doors[here])
            w = weights[cand].copy()
            w[cand == prev] *= 0.15  # people rarely turn straight back
            w[cand == entrance] *= 0.5
            if cafe >= 0:
                w[cand == cafe] = 1.0 if wants_cafe else 0.0
            if w.sum() <= 0:
                w = np.ones(len(cand))
            nxt = int(rng.choice(cand, p=w / w.sum()))
            if nxt == cafe:
                wants_cafe = False
            prev, here = here, nxt
            stops.append((here, dwell(here)))
        way_home = venue.shortest_path(here, entrance)[1:]
        if shop >= 0 and rng.random() < v.shop_on_exit_probability:
            way_home = venue.shortest_path(here, shop)[1:] + venue.shortest_path(shop, entrance)[1:]
        for r in way_home:
            # Passing through on the way out is quick, except a real stop in the shop.
            stops.append((r, dwell(r, 1.0 if r == shop else 0.3)))

        tag = -1
        if box and box[0][0] <= t:
            _, _, tag = heapq.heappop(box)
        else:
            without_tag += 1
        has_phone = rng.random() < scenario.noise.phone_fraction
        if tag < 0 and not has_phone:
            continue
        seg = _TrackBuilder()
        now = t
        for room, stay in stops:
            pieces = max(1, math.ceil(stay / v.move_every_s))
            for k in range(pieces):
                seg.add(
                    now + stay * k / pieces,
                    now + stay * (k + 1) / pieces,
                    spot(room),
                    room,
                    Holder.VISITOR,
                    True,
                )
            now += stay
        if tag >= 0:
            b = builders[tag]
            last = b.t1[-1] if b.t1 else start
            b.add(last, t, handout_pos, entrance, Holder.HANDOUT_BOX, tags.handout_advertising)
            for i in range(len(seg.t0)):
                b.add(seg.t0[i], seg.t1[i], seg.pos[i], seg.room[i], Holder.VISITOR, True)
            restock = start + math.ceil((now - start) / restock_s) * restock_s
            b.add(now, restock, return_pos, entrance, Holder.RETURN_BOX, True)
            heapq.heappush(box, (restock, visitors, tag))
        if has_phone:
            phones.append(seg.build(duration_s))
    for b in builders:
        last = b.t1[-1] if b.t1 else start
        b.add(
            last, max(duration_s, last), handout_pos, entrance, Holder.HANDOUT_BOX, tags.handout_advertising
        )
    return VisitorRun(
        tuple(b.build(duration_s) for b in builders),
        tuple(p for p in phones if len(p.t0)),
        visitors,
        without_tag,
    )
