"""
Venue geometry: which room a point is in, how many walls and floor slabs a straight line crosses,
and the shortest walk between rooms.

Rooms are axis-aligned rectangles on their floor's plan; floors are stacked ``floor_height_m`` apart.
A point is ``(x, y, z)`` with ``z`` measured from the ground floor's slab, so a point on floor ``f``
has ``f·floor_height ≤ z < (f+1)·floor_height``.

Walls crossed along a line = the number of distinct places where it passes a room boundary. Two
rooms sharing a wall give one crossing there; a line that leaves the building (or crosses a
service core that is no room) and comes back crosses two walls. All functions take numpy arrays of
many lines at once, so the simulator never loops per advertisement.
"""

from __future__ import annotations

from collections import deque

import numpy as np

from listenpost.sim.scenario import Scenario

#: Crossings closer than this along a line are one wall (a wall shared by two rooms), metres.
_SAME_WALL_M = 0.01


class Venue:
    """Room rectangles as arrays, plus the door graph."""

    __slots__ = ("names", "floor", "x0", "x1", "y0", "y1", "floor_height", "doors", "index")

    def __init__(self, scenario: Scenario) -> None:
        rooms = scenario.rooms
        self.names: tuple[str, ...] = tuple(r.name for r in rooms)
        self.index: dict[str, int] = {n: i for i, n in enumerate(self.names)}
        self.floor = np.array([r.floor for r in rooms], dtype=np.int64)
        self.x0 = np.array([r.x[0] for r in rooms])
        self.x1 = np.array([r.x[1] for r in rooms])
        self.y0 = np.array([r.y[0] for r in rooms])
        self.y1 = np.array([r.y[1] for r in rooms])
        self.floor_height = scenario.floor_height_m
        self.doors: tuple[tuple[int, ...], ...] = tuple(tuple(self.index[d] for d in r.doors) for r in rooms)

    def floor_of(self, z: np.ndarray) -> np.ndarray:
        """Floor level of heights ``z`` (metres above the ground slab)."""
        return np.floor(np.asarray(z, dtype=float) / self.floor_height).astype(np.int64)

    def room_at(self, x: np.ndarray, y: np.ndarray, z: np.ndarray) -> np.ndarray:
        """Room index of each point, or -1 outside every room."""
        x, y, z = (np.asarray(a, dtype=float)[..., None] for a in (x, y, z))
        inside = (
            (self.x0 <= x) & (x < self.x1) & (self.y0 <= y) & (y < self.y1) & (self.floor == self.floor_of(z))
        )
        return np.where(inside.any(axis=-1), inside.argmax(axis=-1), -1)

    def floors_crossed(self, za: np.ndarray, zb: np.ndarray) -> np.ndarray:
        """Number of floor slabs between heights ``za`` and ``zb``."""
        return np.abs(self.floor_of(za) - self.floor_of(zb))

    def walls_crossed(self, a: np.ndarray, b: np.ndarray) -> np.ndarray:
        """
        Walls crossed by the straight lines from points ``a`` to points ``b``.

        Args:
            a, b: arrays of shape ``(..., 3)``, metres.
        Returns:
            integer array of shape ``(...)``.

        A line that changes floor is split where it passes the slab; each part counts the walls of
        its own floor's plan.
        """
        a = np.asarray(a, dtype=float)
        b = np.asarray(b, dtype=float)
        a, b = np.broadcast_arrays(a, b)
        shape = a.shape[:-1]
        a = a.reshape(-1, 3)
        b = b.reshape(-1, 3)
        fa, fb = self.floor_of(a[:, 2]), self.floor_of(b[:, 2])
        total = np.zeros(len(a), dtype=np.int64)
        lo, hi = np.minimum(fa, fb), np.maximum(fa, fb)
        # Split every line at each slab it passes: part k lies on floor lo+k.
        for k in range(int((hi - lo).max(initial=0)) + 1):
            f = lo + k
            live = f <= hi
            if not live.any():
                break
            dz = b[:, 2] - a[:, 2]
            with np.errstate(divide="ignore", invalid="ignore"):
                s0 = np.where(fa == fb, 0.0, (f * self.floor_height - a[:, 2]) / dz)
                s1 = np.where(fa == fb, 1.0, ((f + 1) * self.floor_height - a[:, 2]) / dz)
            s0, s1 = np.clip(np.minimum(s0, s1), 0, 1), np.clip(np.maximum(s0, s1), 0, 1)
            p = a + s0[:, None] * (b - a)
            q = a + s1[:, None] * (b - a)
            total += np.where(live, self._walls_on_floor(p[:, :2], q[:, :2], f), 0)
        return total.reshape(shape)

    def _walls_on_floor(self, p: np.ndarray, q: np.ndarray, floor: np.ndarray) -> np.ndarray:
        """Distinct boundary crossings of 2-D segments p→q with the rooms of ``floor`` (per segment)."""
        n = len(p)
        d = q - p
        # Liang–Barsky clipping of each segment against each rectangle: parameter interval inside.
        t_in = np.zeros((n, len(self.names)))
        t_out = np.ones((n, len(self.names)))
        ok = self.floor[None, :] == floor[:, None]
        for axis, lo, hi in ((0, self.x0, self.x1), (1, self.y0, self.y1)):
            start = p[:, axis][:, None]
            delta = d[:, axis][:, None]
            flat = np.abs(delta) < 1e-12
            ok &= ~flat | ((lo <= start) & (start <= hi))
            with np.errstate(divide="ignore", invalid="ignore"):
                ta = (lo - start) / delta
                tb = (hi - start) / delta
            t_in = np.where(flat, t_in, np.maximum(t_in, np.minimum(ta, tb)))
            t_out = np.where(flat, t_out, np.minimum(t_out, np.maximum(ta, tb)))
        ok &= t_in < t_out
        length = np.hypot(d[:, 0], d[:, 1])[:, None]
        eps = _SAME_WALL_M / np.maximum(length, 1e-9)
        # Entering at the segment's start or leaving at its end is no wall: the point is in that room.
        cross = np.concatenate(
            [np.where(ok & (t_in > eps), t_in, np.nan), np.where(ok & (t_out < 1 - eps), t_out, np.nan)],
            axis=1,
        )
        cross.sort(axis=1)  # NaN sorts last
        valid = ~np.isnan(cross)
        gaps = np.diff(cross, axis=1) > eps
        distinct = valid[:, :1].astype(np.int64).sum(axis=1) + (gaps & valid[:, 1:]).sum(axis=1)
        # A start point outside every room (should not happen for tags) would miss its first wall;
        # callers place points inside rooms.
        return distinct

    def shortest_path(self, src: int, dst: int) -> list[int]:
        """Rooms on a shortest door path from ``src`` to ``dst`` (both included)."""
        prev = {src: src}
        queue = deque([src])
        while queue:
            r = queue.popleft()
            if r == dst:
                break
            for n in self.doors[r]:
                if n not in prev:
                    prev[n] = r
                    queue.append(n)
        if dst not in prev:
            raise ValueError(f"room {self.names[dst]} cannot be reached from {self.names[src]}")
        path = [dst]
        while path[-1] != src:
            path.append(prev[path[-1]])
        return path[::-1]
