"""
Canonical tag identities (docs/design.md §4): one text form used by config, API, exports and logs.

| kind           | form                                                  |
|----------------|-------------------------------------------------------|
| address        | ``mac:C4:7A:10:00:2B:91`` (upper-case, colons)        |
| iBeacon format | ``ibeacon:<uuid, lower case, hyphens>:<major>:<minor>``|
| AltBeacon      | ``altbeacon:<40 lower-case hex>``                     |
| Eddystone-UID  | ``eddystone:<20 hex namespace>:<12 hex instance>``    |
| configured rule| ``<rule name>:<lower-case hex of the extracted bytes>``|

The ``*_id`` builders take values already known to be well-formed (the decoder's own slices) and only
check lengths and ranges; `parse_tag_id` is for text a person typed. This module depends on nothing
but the standard library and `listenpost.core.errors`, so the collector can import it for ``tags import``.
"""

from __future__ import annotations

import re
from pathlib import Path

from listenpost.core.errors import ConfigError, DecodeError

BUILTIN_KINDS = ("mac", "ibeacon", "altbeacon", "eddystone")
"""Identity kinds with a fixed layout; a configured rule may not take one of these names."""

_RULE_NAME = re.compile(r"[a-z][a-z0-9_-]{0,31}")
_U16 = r"(?:[0-9]|[1-9][0-9]{1,3}|[1-5][0-9]{4}|6[0-4][0-9]{3}|65[0-4][0-9]{2}|655[0-2][0-9]|6553[0-5])"
TAG_ID_PATTERN = (
    r"^(?:mac:[0-9A-F]{2}(?::[0-9A-F]{2}){5}"
    rf"|ibeacon:[0-9a-f]{{8}}-[0-9a-f]{{4}}-[0-9a-f]{{4}}-[0-9a-f]{{4}}-[0-9a-f]{{12}}:{_U16}:{_U16}"
    r"|altbeacon:[0-9a-f]{40}"
    r"|eddystone:[0-9a-f]{20}:[0-9a-f]{12}"
    r"|(?!(?:mac|ibeacon|altbeacon|eddystone):)[a-z][a-z0-9_-]{0,31}:(?:[0-9a-f]{2}){1,32})$"
)
"""
A canonical tag identity (the table above), exactly what `parse_tag_id` returns; in the common subset of
Python and ECMA-262 regular expressions, so the OpenAPI document states it as it is. Use ``re.fullmatch``.
"""
_HEX = "0-9a-fA-F"
_MAC = re.compile(
    rf"([{_HEX}]{{2}})[:-]([{_HEX}]{{2}})[:-]([{_HEX}]{{2}})[:-]([{_HEX}]{{2}})[:-]([{_HEX}]{{2}})[:-]([{_HEX}]{{2}})"
)
_UUID = re.compile(rf"([{_HEX}]{{8}})-?([{_HEX}]{{4}})-?([{_HEX}]{{4}})-?([{_HEX}]{{4}})-?([{_HEX}]{{12}})")
_DECIMAL_U16 = re.compile(r"[0-9]{1,5}")
_HEX_BYTES = re.compile(rf"(?:[{_HEX}]{{2}})+")


def mac_id(address: str) -> str:
    """
    ``mac:`` identity of a device address.

    Args:
        address: six octets separated by ``:`` or ``-``, any case.

    Raises:
        DecodeError: the address is not six hex octets.
    """
    m = _MAC.fullmatch(address)
    if m is None:
        raise DecodeError(f"address {address!r}: must be six hex octets like C4:7A:10:00:2B:91")
    return "mac:" + ":".join(m.groups()).upper()


def ibeacon_id(uuid_bytes: bytes, major: int, minor: int) -> str:
    """
    ``ibeacon:`` identity from the 16 UUID bytes as sent on air (big-endian) and major/minor (0..65535).

    Raises:
        DecodeError: wrong UUID length or a major/minor out of range.
    """
    if len(uuid_bytes) != 16:
        raise DecodeError(f"iBeacon UUID: must be 16 bytes, got {len(uuid_bytes)}")
    if not (0 <= major <= 0xFFFF and 0 <= minor <= 0xFFFF):
        raise DecodeError(f"iBeacon major/minor: must be 0..65535, got {major}/{minor}")
    h = uuid_bytes.hex()
    return f"ibeacon:{h[:8]}-{h[8:12]}-{h[12:16]}-{h[16:20]}-{h[20:]}:{major}:{minor}"


def altbeacon_id(id20: bytes) -> str:
    """``altbeacon:`` identity from the 20-byte beacon ID.

    Raises:
        DecodeError: the ID is not 20 bytes.
    """
    if len(id20) != 20:
        raise DecodeError(f"AltBeacon beacon id: must be 20 bytes, got {len(id20)}")
    return "altbeacon:" + id20.hex()


def eddystone_id(namespace10: bytes, instance6: bytes) -> str:
    """``eddystone:`` identity from a UID frame's 10-byte namespace and 6-byte instance.

    Raises:
        DecodeError: wrong namespace or instance length.
    """
    if len(namespace10) != 10 or len(instance6) != 6:
        raise DecodeError(
            f"Eddystone-UID: namespace must be 10 bytes and instance 6, got {len(namespace10)} and {len(instance6)}"
        )
    return f"eddystone:{namespace10.hex()}:{instance6.hex()}"


def rule_prefix(name: str) -> str:
    """The ``name:`` part of a configured rule's identities; checks the name once.

    Raises:
        DecodeError: the name is not lower-case letters/digits/``_``/``-`` or is a built-in kind.
    """
    if not _RULE_NAME.fullmatch(name) or name in BUILTIN_KINDS:
        raise DecodeError(
            f"rule name {name!r}: must be 1-32 lower-case letters, digits, '_' or '-', "
            f"starting with a letter, and not one of {', '.join(BUILTIN_KINDS)}"
        )
    return name + ":"


def rule_id(name: str, data: bytes) -> str:
    """Identity made by a configured rule: ``name:`` + the extracted bytes as lower-case hex.

    Raises:
        DecodeError: bad rule name, or no bytes.
    """
    if not data:
        raise DecodeError(f"rule {name!r}: extracted id is empty")
    return rule_prefix(name) + data.hex()


def parse_tag_id(text: str) -> str:
    """
    Validate a tag identity a person wrote and return its canonical form.

    Lenient where it is unambiguous: surrounding whitespace, the kind in any case, hex in any case,
    ``-`` instead of ``:`` in an address, an iBeacon UUID with or without hyphens, leading zeros in
    major/minor. ``"ibeacon:4D2A0C1E7F3B4C559E612B8F0A7D3C10:007:42"`` becomes
    ``"ibeacon:4d2a0c1e-7f3b-4c55-9e61-2b8f0a7d3c10:7:42"``.

    Raises:
        DecodeError: the message quotes the text and says what is wrong.
    """
    s = text.strip()
    kind, sep, rest = s.partition(":")
    if not sep or not kind:
        raise DecodeError(
            f"tag id {text!r}: must be KIND:VALUE, e.g. mac:C4:7A:10:00:2B:91 or ibeacon:<uuid>:<major>:<minor>"
        )
    if _MAC.fullmatch(s):
        raise DecodeError(f"tag id {text!r}: an address needs the kind, write {mac_id(s)!r}")
    kind = kind.lower()
    if kind == "mac":
        try:
            return mac_id(rest)
        except DecodeError:
            raise DecodeError(
                f"tag id {text!r}: address must be six hex octets like C4:7A:10:00:2B:91"
            ) from None
    if kind == "ibeacon":
        uuid_text, _, rest2 = rest.partition(":")
        major_text, _, minor_text = rest2.partition(":")
        m = _UUID.fullmatch(uuid_text)
        if m is None:
            raise DecodeError(f"tag id {text!r}: iBeacon UUID must be 32 hex digits (hyphens allowed)")
        for label, v in (("major", major_text), ("minor", minor_text)):
            if not _DECIMAL_U16.fullmatch(v) or int(v) > 0xFFFF:
                raise DecodeError(
                    f"tag id {text!r}: iBeacon {label} must be a decimal number 0..65535, got {v!r}"
                )
        return ibeacon_id(bytes.fromhex("".join(m.groups())), int(major_text), int(minor_text))
    if kind == "altbeacon":
        if not (len(rest) == 40 and _HEX_BYTES.fullmatch(rest)):
            raise DecodeError(f"tag id {text!r}: AltBeacon id must be 40 hex digits (20 bytes)")
        return "altbeacon:" + rest.lower()
    if kind == "eddystone":
        ns, _, inst = rest.partition(":")
        if not (
            len(ns) == 20 and _HEX_BYTES.fullmatch(ns) and len(inst) == 12 and _HEX_BYTES.fullmatch(inst)
        ):
            raise DecodeError(
                f"tag id {text!r}: Eddystone-UID must be eddystone:<20 hex namespace>:<12 hex instance>"
            )
        return f"eddystone:{ns.lower()}:{inst.lower()}"
    try:
        prefix = rule_prefix(kind)
    except DecodeError as e:
        raise DecodeError(f"tag id {text!r}: unknown kind {kind!r}: {e}") from None
    if not (_HEX_BYTES.fullmatch(rest) and len(rest) <= 64):
        raise DecodeError(f"tag id {text!r}: a configured rule's id must be 1-32 bytes of hex, got {rest!r}")
    return prefix + rest.lower()


def identity_key(tag: str) -> tuple[str, bytes]:
    """
    The kind of a canonical identity and the raw bytes an advert carries for it: the inverse of the
    builders, so a decoder can match registered tags on bytes without formatting text.

    ``mac`` → the 6 address bytes in display order; ``ibeacon`` → UUID(16) + major(2, BE) + minor(2, BE);
    ``altbeacon`` → the 20-byte id; ``eddystone`` → namespace(10) + instance(6); a rule → its bytes.

    Raises:
        DecodeError: ``tag`` is not canonical (run it through `parse_tag_id` first).
    """
    if parse_tag_id(tag) != tag:
        raise DecodeError(f"tag id {tag!r}: not in canonical form (expected {parse_tag_id(tag)!r})")
    kind, _, rest = tag.partition(":")
    if kind == "mac":
        return kind, bytes.fromhex(rest.replace(":", ""))
    if kind == "ibeacon":
        u, major, minor = rest.split(":")
        return kind, bytes.fromhex(u.replace("-", "")) + int(major).to_bytes(2, "big") + int(minor).to_bytes(
            2, "big"
        )
    return kind, bytes.fromhex(rest.replace(":", ""))


def load_tag_file(path: str | Path) -> frozenset[str]:
    """
    Read a tag file: one identity per line, ``#`` starts a comment, blank lines ignored.

    Every identity is normalised with `parse_tag_id`; duplicates collapse.

    Raises:
        ConfigError: the file cannot be read, is not UTF-8, or a line is not a tag identity; the
            message names ``file:line``.
    """
    p = Path(path)
    try:
        raw = p.read_bytes()
    except OSError as e:
        raise ConfigError(f"{p}: cannot read tag file: {e.strerror or e}") from e
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as e:
        bad_line = raw[: e.start].count(b"\n") + 1
        raise ConfigError(f"{p}:{bad_line}: not UTF-8 text") from None
    tags: set[str] = set()
    for lineno, line in enumerate(text.splitlines(), start=1):
        body = line.split("#", 1)[0].strip()
        if not body:
            continue
        try:
            tags.add(parse_tag_id(body))
        except DecodeError as e:
            raise ConfigError(f"{p}:{lineno}: {e}") from None
    return frozenset(tags)
