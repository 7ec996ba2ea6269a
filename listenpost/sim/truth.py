"""
The simulator's ground truth, ``truth.json``: one schema for the writer (`generate`) and every reader
(the demo fleet, the end-to-end tests).

A board's entry is written from and read into `BoardTruth`, so both sides name the same keys; the
rest of the document (tags' room segments, the venue plan, radio constants, noise) is read as the
mapping it is. Nothing here imports numpy: the demo reads truth in the collector's environment.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from listenpost.core.errors import ConfigError

TRUTH_FORMAT = "listenpost-sim-truth"
TRUTH_VERSION = 1
TRUTH_NOTES = (
    "Times are true seconds from recording start. Board time t_board = (t_true + uptime_at_start_s)"
    " * (1 + skew_ppm*1e-6). true_offset_db is what the board's adapter adds to every report;"
    " the calibrated correction is its negative. Segments are [t0, t1, room, holder]."
)


@dataclass(frozen=True, slots=True)
class BoardTruth:
    """One board as the simulator made it (``truth.json`` ``boards.<name>``)."""

    name: str
    room: str
    """Room code, e.g. ``G0``."""
    pos_m: tuple[float, float, float]
    """Where the board hangs: x, y in its floor's plan and z above the ground slab, metres."""
    file: str
    """The board's recording, relative to the truth file."""
    boot: str
    """Boot id of the recording; a replaying board uses it, so the collector's clock model keys match."""
    skew_ppm: float
    """True clock rate error, parts per million (positive: board fast)."""
    uptime_at_start_s: float
    """True seconds since boot when the recording starts."""
    wall_error_s: float
    """Board wall clock minus true time, seconds."""
    true_offset_db: float
    """What the board's adapter adds to every RSSI report, dB."""
    adverts: int
    """Lines in the board's recording."""
    last_advert_true_s: float | None
    """True time of the board's last recorded advert, seconds from recording start."""
    power_off_at_s: float | None = None
    """True seconds from recording start when the board loses power for good."""
    radio_hang_at_s: float | None = None
    """True seconds from recording start when the radio stops hearing (the board stays up)."""
    gain_step_at_s: float | None = None
    """True seconds from recording start when the board's receive gain changes for good."""
    gain_step_db: float = 0.0
    """That change, added to every report from then on, dB."""
    # Filled in by the reader from the venue plan; not part of the board's entry.
    room_label: str = ""
    """Room as the collector is told, e.g. ``G0 Foyer``."""
    floor: str = ""
    """Floor name, e.g. ``ground``."""
    recording: Path = Path()
    """Absolute path of the recording."""

    def board_time(self, t_true: float) -> float:
        """Board monotonic seconds at true time ``t_true`` (seconds from recording start)."""
        return (t_true + self.uptime_at_start_s) * (1.0 + self.skew_ppm * 1e-6)

    def entry(self) -> dict[str, Any]:
        """The board's JSON entry."""
        return {
            "room": self.room,
            "pos_m": [round(v, 3) for v in self.pos_m],
            "true_offset_db": self.true_offset_db,
            "skew_ppm": self.skew_ppm,
            "boot": self.boot,
            "uptime_at_start_s": self.uptime_at_start_s,
            "wall_error_s": self.wall_error_s,
            "power_off_at_s": self.power_off_at_s,
            "radio_hang_at_s": self.radio_hang_at_s,
            "gain_step_at_s": self.gain_step_at_s,
            "gain_step_db": self.gain_step_db,
            "adverts": self.adverts,
            "last_advert_true_s": self.last_advert_true_s,
            "file": self.file,
        }


@dataclass(frozen=True, slots=True)
class Truth:
    """A simulator output directory: recordings, ``truth.json`` and ``tags.txt``."""

    directory: Path
    start_wall: float
    """True Unix time of recording start, seconds."""
    duration_s: float
    """Length of the recording, seconds."""
    boards: tuple[BoardTruth, ...]
    tags_file: Path
    decode_rules: tuple[dict[str, Any], ...]
    """Decode rules for the custom tag firmware, in the collector.yaml form."""
    document: dict[str, Any] = field(repr=False)
    """The whole ``truth.json`` (segments of every tag, noise, venue plan)."""

    def board(self, name: str) -> BoardTruth:
        for b in self.boards:
            if b.name == name:
                return b
        raise KeyError(name)


def write_truth(path: Path, document: Mapping[str, Any]) -> None:
    """Write a truth document atomically, keys sorted, so reruns are byte-identical."""
    text = json.dumps(document, sort_keys=True, separators=(",", ":")) + "\n"
    tmp = path.with_name(f".{path.name}.tmp")
    tmp.write_text(text, encoding="utf-8")
    tmp.replace(path)


def read_truth(directory: str | Path) -> Truth:
    """
    Read ``truth.json`` of a simulator output directory and check that its recordings exist.

    Raises:
        ConfigError: a missing file or field, or another format or version, named with the file.
    """
    d = Path(directory)
    path = d / "truth.json"
    try:
        doc = json.loads(path.read_text())
    except OSError as e:
        raise ConfigError(f"{path}: cannot read: {e.strerror or e}") from e
    except ValueError as e:
        raise ConfigError(f"{path}: not JSON: {e}") from e

    def need(obj: Any, key: str, where: str) -> Any:
        if not isinstance(obj, dict) or key not in obj:
            raise ConfigError(f"{path}: {where}{key}: is required")
        return obj[key]

    if need(doc, "format", "") != TRUTH_FORMAT or need(doc, "version", "") != TRUTH_VERSION:
        raise ConfigError(
            f"{path}: format/version: expected {TRUTH_FORMAT} {TRUTH_VERSION}, "
            f"got {doc.get('format')!r} {doc.get('version')!r}"
        )
    venue = need(doc, "venue", "")
    rooms = need(venue, "rooms", "venue.")
    floors = need(venue, "floors", "venue.")
    boards = []
    for name, b in sorted(need(doc, "boards", "").items()):
        where = f"boards.{name}."
        room = need(b, "room", where)
        info = need(rooms, room, "venue.rooms.")
        floor_idx = need(info, "floor", f"venue.rooms.{room}.")
        if not isinstance(floor_idx, int) or not 0 <= floor_idx < len(floors):
            raise ConfigError(f"{path}: venue.rooms.{room}.floor: must index venue.floors, got {floor_idx!r}")
        recording = d / need(b, "file", where)
        if not recording.exists():
            raise ConfigError(f"{path}: {where}file: {recording} does not exist")
        try:
            x, y, z = need(b, "pos_m", where)
            boards.append(
                BoardTruth(
                    name=name,
                    room=room,
                    pos_m=(float(x), float(y), float(z)),
                    file=str(b["file"]),
                    boot=str(need(b, "boot", where)),
                    skew_ppm=float(need(b, "skew_ppm", where)),
                    uptime_at_start_s=float(need(b, "uptime_at_start_s", where)),
                    wall_error_s=float(need(b, "wall_error_s", where)),
                    true_offset_db=float(need(b, "true_offset_db", where)),
                    adverts=int(need(b, "adverts", where)),
                    last_advert_true_s=b.get("last_advert_true_s"),
                    power_off_at_s=b.get("power_off_at_s"),
                    radio_hang_at_s=b.get("radio_hang_at_s"),
                    gain_step_at_s=b.get("gain_step_at_s"),
                    gain_step_db=float(b.get("gain_step_db", 0.0)),
                    room_label=f"{room} {need(info, 'title', f'venue.rooms.{room}.')}",
                    floor=str(floors[floor_idx]),
                    recording=recording,
                )
            )
        except (TypeError, ValueError) as e:
            raise ConfigError(f"{path}: boards.{name}: {e}") from e
    tags_file = d / "tags.txt"
    if not tags_file.exists():
        raise ConfigError(f"{tags_file}: does not exist (the simulator writes it next to truth.json)")
    return Truth(
        directory=d,
        start_wall=float(need(doc, "start_wall", "")),
        duration_s=float(need(doc, "duration_s", "")),
        boards=tuple(boards),
        tags_file=tags_file,
        decode_rules=tuple(doc.get("decode_rules") or ()),
        document=doc,
    )
