"""The registered-tag filter and the board RSSI offset."""

from __future__ import annotations

import math

import pytest
import structlog

from listenpost.agent.pipeline.calibrate import Calibrate
from listenpost.agent.pipeline.filter import TagFilter
from listenpost.core.errors import ConfigError, DecodeError
from listenpost.core.records import Reading, Telemetry

IB = "ibeacon:4d2a0c1e-7f3b-4c55-9e61-2b8f0a7d3c10"


class TestTagFilter:
    def test_keeps_registered_drops_the_rest_and_counts(self):
        """Registered tags pass unchanged; others are dropped; only two aggregate counts change."""
        f = TagFilter([f"{IB}:7:1", "mac:C4:7A:10:00:2B:91"])
        keep = Reading(f"{IB}:7:1", 1, -60)
        assert keep is f(keep)
        assert f(Reading(f"{IB}:7:2", 2, -61)) is None
        assert f(Reading("mac:D0:00:00:00:00:01", 3, -62)) is None
        assert (1, 2) == (f.kept, f.dropped)

    def test_registration_is_normalised(self):
        """A hand-written registration in another case still matches the decoder's canonical identity."""
        f = TagFilter([f"{IB.upper().replace('IBEACON', 'ibeacon')}:007:1", "MAC:c4-7a-10-00-2b-91"])
        assert f(Reading(f"{IB}:7:1", 1, -60)) is not None
        assert f(Reading("mac:C4:7A:10:00:2B:91", 1, -60)) is not None
        assert {"C4:7A:10:00:2B:91": "mac:C4:7A:10:00:2B:91"} == dict(f.registered.mac_tags)

    def test_update_swaps_whole_set(self):
        """update replaces the set in one step; a snapshot taken before keeps its old contents."""
        f = TagFilter([f"{IB}:7:1"])
        old = f.registered
        f.update([f"{IB}:7:2", "mac:C4:7A:10:00:2B:91"])
        assert frozenset({f"{IB}:7:1"}) == old.ids
        assert f(Reading(f"{IB}:7:1", 1, -60)) is None
        assert f(Reading(f"{IB}:7:2", 1, -60)) is not None
        assert 2 == len(f) and "mac:C4:7A:10:00:2B:91" in f

    def test_bad_update_leaves_set_unchanged(self):
        """A malformed identity in an update raises and the previous set stays in force."""
        f = TagFilter([f"{IB}:7:1"])
        with pytest.raises(DecodeError):
            f.update([f"{IB}:7:2", "ibeacon:not-a-uuid:1:1"])
        assert frozenset({f"{IB}:7:1"}) == f.registered.ids

    def test_logs_nothing(self):
        """The filter never logs, so no unregistered identity can reach a log line."""
        f = TagFilter([f"{IB}:7:1"])
        with structlog.testing.capture_logs() as logs:
            for i in range(100):
                f(Reading(f"mac:D0:00:00:00:00:{i:02X}", i, -70))
        assert [] == logs
        assert 100 == f.dropped


class TestCalibrate:
    def test_adds_offset_and_keeps_the_rest(self):
        """RSSI gets the offset; tag, time and telemetry are untouched."""
        tel = Telemetry(3000, 21.5, 10, 1.0)
        r = Calibrate(2.5)(Reading("lpx:00000007", 123, -67, tel))
        assert Reading("lpx:00000007", 123, -64.5, tel) == r

    def test_zero_offset_passes_the_same_object(self):
        """With no offset there is nothing to change."""
        r = Reading("lpx:00000007", 1, -67)
        assert r is Calibrate(0.0)(r)

    def test_offset_is_updatable(self):
        """The collector's config can change the offset; later readings get the new one."""
        c = Calibrate(1.0)
        c.offset_db = -3.25
        assert -70.25 == c(Reading("lpx:00000007", 1, -67)).rssi_dbm
        assert -3.25 == c.offset_db

    @pytest.mark.parametrize("bad", [40.5, -41, math.nan, math.inf, "3", True])
    def test_rejects_bad_offsets(self, bad):
        """Offsets outside ±40 dB or not finite numbers are refused with the field named."""
        with pytest.raises(ConfigError, match="offset_db"):
            Calibrate(bad)
        c = Calibrate(1.0)
        with pytest.raises(ConfigError, match="offset_db"):
            c.offset_db = bad
        assert 1.0 == c.offset_db
