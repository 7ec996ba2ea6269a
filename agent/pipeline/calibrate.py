"""The board's RSSI offset: adapters and antennas differ by several dB, so each board adds its own."""

from __future__ import annotations

import math

from listenpost.agent.pipeline.decode import make_reading
from listenpost.core.errors import ConfigError
from listenpost.core.records import Reading

MAX_OFFSET_DB = 40.0
"""Same bound as ``calibration.offset_db`` in agent.yaml and ``offset_db`` on the wire."""


def _checked(offset_db: float) -> float:
    if (
        isinstance(offset_db, bool)
        or not isinstance(offset_db, int | float)
        or not math.isfinite(offset_db)
        or abs(offset_db) > MAX_OFFSET_DB
    ):
        raise ConfigError(f"offset_db: must be a number within ±{MAX_OFFSET_DB:g} dB, got {offset_db!r}")
    return float(offset_db)


class Calibrate:
    """
    Pipeline stage: add the board offset (dB) to a reading's RSSI.

    Args:
        offset_db: dB added to every RSSI; ``offset_db`` may be set later (the collector's config
            can change it), with the same check.

    Raises:
        ConfigError: the offset is not a finite number within ±40 dB.
    """

    __slots__ = ("_offset_db",)

    def __init__(self, offset_db: float = 0.0) -> None:
        self._offset_db = _checked(offset_db)

    @property
    def offset_db(self) -> float:
        """Offset added to every RSSI, dB."""
        return self._offset_db

    @offset_db.setter
    def offset_db(self, value: float) -> None:
        self._offset_db = _checked(value)

    def __call__(self, reading: Reading) -> Reading:
        off = self._offset_db
        if off == 0.0:
            # Reading is immutable, so handing the same object on is safe and saves an allocation.
            return reading
        return make_reading(reading.tag, reading.t_mono_ns, reading.rssi_dbm + off, reading.telemetry)
