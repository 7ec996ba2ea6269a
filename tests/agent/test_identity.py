"""Canonical tag identities: builders, parsing of hand-written IDs, tag files."""

from __future__ import annotations

import uuid

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from listenpost.core.errors import ConfigError, DecodeError
from listenpost.core.identity import (
    altbeacon_id,
    eddystone_id,
    ibeacon_id,
    identity_key,
    load_tag_file,
    mac_id,
    parse_tag_id,
    rule_id,
)

VENUE_UUID = "4d2a0c1e-7f3b-4c55-9e61-2b8f0a7d3c10"


class TestBuilders:
    def test_mac_upper_case_colon_form(self):
        """An address in any case and with dashes becomes the upper-case colon form."""
        assert "mac:C4:7A:10:00:2B:91" == mac_id("c4-7a-10-00-2b:91")

    def test_ibeacon_uuid_text_agrees_with_stdlib(self):
        """The UUID text is the standard 8-4-4-4-12 form; Python's uuid module (RFC 4122 text form) is the reference."""
        raw = bytes.fromhex(VENUE_UUID.replace("-", ""))
        assert f"ibeacon:{uuid.UUID(bytes=raw)}:7:42" == ibeacon_id(raw, 7, 42)

    @settings(max_examples=200, deadline=None)
    @given(st.binary(min_size=16, max_size=16), st.integers(0, 0xFFFF), st.integers(0, 0xFFFF))
    def test_ibeacon_round_trips_through_parse(self, raw, major, minor):
        """Every built iBeacon identity is already canonical, and the stdlib reads back the same UUID bytes."""
        tag = ibeacon_id(raw, major, minor)
        assert tag == parse_tag_id(tag)
        assert raw == uuid.UUID(tag.split(":")[1]).bytes

    def test_other_builders(self):
        """AltBeacon, Eddystone and rule identities use lower-case hex of the bytes."""
        assert "altbeacon:" + "0102030405060708090a0b0c0d0e0f1011121314" == altbeacon_id(bytes(range(1, 21)))
        assert "eddystone:8b0ca750e7a74e14bd99:00000000001e" == eddystone_id(
            bytes.fromhex("8B0CA750E7A74E14BD99"), bytes.fromhex("00000000001E")
        )
        assert "lpx:00000007" == rule_id("lpx", b"\x00\x00\x00\x07")

    @pytest.mark.parametrize(
        "call",
        [
            lambda: ibeacon_id(b"\x00" * 15, 1, 1),
            lambda: ibeacon_id(b"\x00" * 16, 65536, 1),
            lambda: altbeacon_id(b"\x00" * 19),
            lambda: eddystone_id(b"\x00" * 10, b"\x00" * 5),
            lambda: rule_id("ibeacon", b"\x01"),
            lambda: rule_id("Bad", b"\x01"),
            lambda: rule_id("lpx", b""),
            lambda: mac_id("C4:7A:10:00:2B"),
        ],
    )
    def test_builders_reject_bad_values(self, call):
        """Wrong lengths, ranges or names raise DecodeError."""
        with pytest.raises(DecodeError):
            call()


class TestParse:
    @pytest.mark.parametrize(
        ("given_text", "canonical"),
        [
            ("mac:c4:7a:10:00:2b:91", "mac:C4:7A:10:00:2B:91"),
            ("  MAC:C4-7A-10-00-2B-91 ", "mac:C4:7A:10:00:2B:91"),
            (f"ibeacon:{VENUE_UUID.upper()}:7:42", f"ibeacon:{VENUE_UUID}:7:42"),
            (f"iBeacon:{VENUE_UUID.replace('-', '')}:007:0042", f"ibeacon:{VENUE_UUID}:7:42"),
            ("altbeacon:" + "AB" * 20, "altbeacon:" + "ab" * 20),
            ("eddystone:8B0CA750E7A74E14BD99:00000000001E", "eddystone:8b0ca750e7a74e14bd99:00000000001e"),
            ("lpx:0000000A", "lpx:0000000a"),
            ("LPX:0000000a", "lpx:0000000a"),
        ],
    )
    def test_normalises(self, given_text, canonical):
        """Hand-written identities come back in the one canonical form."""
        assert canonical == parse_tag_id(given_text)

    @pytest.mark.parametrize(
        ("bad", "says"),
        [
            ("", "KIND:VALUE"),
            ("C4:7A:10:00:2B:91", "write 'mac:C4:7A:10:00:2B:91'"),
            ("mac:C4:7A:10:00:2B", "six hex octets"),
            ("mac:G4:7A:10:00:2B:91", "six hex octets"),
            (f"ibeacon:{VENUE_UUID}:7", "minor"),
            (f"ibeacon:{VENUE_UUID}:65536:1", "major"),
            (f"ibeacon:{VENUE_UUID}:-1:1", "major"),
            (f"ibeacon:{VENUE_UUID[:-1]}:7:1", "UUID"),
            ("altbeacon:" + "ab" * 19, "40 hex"),
            ("eddystone:8b0ca750e7a74e14bd99", "namespace"),
            ("lpx:123", "hex"),
            ("lpx:", "hex"),
            ("lpx:" + "00" * 33, "1-32 bytes"),
            ("eddy stone:00", "unknown kind"),
        ],
    )
    def test_rejects_with_reason(self, bad, says):
        """A malformed identity raises DecodeError quoting the text and saying what is wrong."""
        with pytest.raises(DecodeError) as e:
            parse_tag_id(bad)
        assert repr(bad) in str(e.value) or bad.strip() == ""
        assert says in str(e.value)


class TestTagFile:
    def test_reads_ids_comments_and_blanks(self, tmp_path):
        """Comments (whole-line and trailing), blank lines and duplicates are handled; IDs are normalised."""
        f = tmp_path / "tags.txt"
        f.write_text(
            "# Brackenford visitor tags\n"
            "\n"
            f"ibeacon:{VENUE_UUID.upper()}:7:1   # first visitor tag\n"
            f"ibeacon:{VENUE_UUID}:7:1\n"
            "   mac:c4:7a:10:00:2b:91\n"
            "lpx:00000007\n"
        )
        assert frozenset(
            {f"ibeacon:{VENUE_UUID}:7:1", "mac:C4:7A:10:00:2B:91", "lpx:00000007"}
        ) == load_tag_file(f)

    def test_bad_line_names_file_and_line(self, tmp_path):
        """The error names file:line of the first bad identity."""
        f = tmp_path / "tags.txt"
        f.write_text("# header\nmac:C4:7A:10:00:2B:91\n\nibeacon:nope:1:2\n")
        with pytest.raises(ConfigError, match=rf"^{f}:4: tag id 'ibeacon:nope:1:2': iBeacon UUID"):
            load_tag_file(f)

    def test_not_utf8_names_the_line(self, tmp_path):
        """Bytes that are not UTF-8 are reported with their line number."""
        f = tmp_path / "tags.txt"
        f.write_bytes(b"mac:C4:7A:10:00:2B:91\n\xff\xfe\n")
        with pytest.raises(ConfigError, match=rf"^{f}:2: not UTF-8"):
            load_tag_file(f)

    def test_missing_file(self, tmp_path):
        """A missing file is a ConfigError naming it."""
        with pytest.raises(ConfigError, match="cannot read tag file"):
            load_tag_file(tmp_path / "absent.txt")


class TestIdentityKey:
    @settings(max_examples=100, deadline=None)
    @given(
        st.binary(min_size=16, max_size=16),
        st.integers(0, 0xFFFF),
        st.integers(0, 0xFFFF),
        st.binary(min_size=20, max_size=20),
        st.binary(min_size=1, max_size=32),
    )
    def test_inverse_of_the_builders(self, u, major, minor, id20, data):
        """identity_key gives back exactly the bytes each builder was given."""
        assert ("ibeacon", u + major.to_bytes(2, "big") + minor.to_bytes(2, "big")) == identity_key(
            ibeacon_id(u, major, minor)
        )
        assert ("altbeacon", id20) == identity_key(altbeacon_id(id20))
        assert ("eddystone", id20[:16]) == identity_key(eddystone_id(id20[:10], id20[10:16]))
        assert ("lpx", data) == identity_key(rule_id("lpx", data))
        assert ("mac", id20[:6]) == identity_key(mac_id(":".join(f"{b:02x}" for b in id20[:6])))

    def test_rejects_non_canonical(self):
        """A non-canonical identity is refused, with its canonical form in the message."""
        with pytest.raises(DecodeError, match="mac:C4:7A:10:00:2B:91"):
            identity_key("mac:c4:7a:10:00:2b:91")
