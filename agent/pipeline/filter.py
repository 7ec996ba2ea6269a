"""
The registered tag set: keep readings of registered tags, drop everything else.

Privacy rule (docs/design.md §1 and §2.1): nothing about an unregistered device — address, payload, a count per
device — is logged, stored or sent. This stage therefore keeps only two aggregate counters and never
logs per reading.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field

from listenpost.core.identity import BUILTIN_KINDS, identity_key, parse_tag_id
from listenpost.core.records import Reading


@dataclass(frozen=True, slots=True)
class Registered:
    """One immutable snapshot of the registered set (swapped whole by `TagFilter.update`)."""

    ids: frozenset[str]
    """Canonical identities of every registered tag."""
    mac_tags: Mapping[str, str]
    """Address (upper-case colon form) → ``mac:`` identity, for the tags registered by address.
    The decoder checks this first, so a registered address costs one dict lookup and no payload parsing."""
    ibeacon: Mapping[bytes, str] = field(default_factory=dict)
    """UUID + major + minor bytes as sent → ``ibeacon:`` identity."""
    altbeacon: Mapping[bytes, str] = field(default_factory=dict)
    """20-byte beacon id → ``altbeacon:`` identity."""
    eddystone: Mapping[bytes, str] = field(default_factory=dict)
    """Namespace + instance bytes → ``eddystone:`` identity."""
    rules: Mapping[str, Mapping[bytes, str]] = field(default_factory=dict)
    """Rule name → extracted bytes → identity."""


def _snapshot(tags: Iterable[str]) -> Registered:
    ids = frozenset(parse_tag_id(t) for t in tags)
    by_kind: dict[str, dict[bytes, str]] = {}
    for t in ids:
        kind, key = identity_key(t)
        by_kind.setdefault(kind, {})[key] = t
    return Registered(
        ids,
        {t[4:]: t for t in ids if t.startswith("mac:")},
        by_kind.get("ibeacon", {}),
        by_kind.get("altbeacon", {}),
        by_kind.get("eddystone", {}),
        {k: v for k, v in by_kind.items() if k not in BUILTIN_KINDS},
    )


class TagFilter:
    """
    Pipeline stage: pass a `Reading` whose tag is registered, return ``None`` otherwise.

    Args:
        registered: canonical tag identities (normalised with `parse_tag_id`, so a hand-written
            ``MAC:c4-7a-...`` still matches).

    Raises:
        DecodeError: an identity in ``registered`` is malformed (the set is left unchanged).
    """

    __slots__ = ("_reg", "kept", "dropped")

    def __init__(self, registered: Iterable[str]) -> None:
        self._reg = _snapshot(registered)
        self.kept = 0
        """Readings passed on (their tag is registered)."""
        self.dropped = 0
        """Readings dropped because their tag is not registered (aggregate only, never per device)."""

    @property
    def registered(self) -> Registered:
        """The current snapshot; read it once per use, it may be replaced at any await."""
        return self._reg

    def update(self, tags: Iterable[str]) -> None:
        """Replace the registered set. The new snapshot is built first and swapped in one assignment."""
        self._reg = _snapshot(tags)

    def __len__(self) -> int:
        return len(self._reg.ids)

    def __contains__(self, tag: object) -> bool:
        return tag in self._reg.ids

    def __call__(self, reading: Reading) -> Reading | None:
        if reading.tag in self._reg.ids:
            self.kept += 1
            return reading
        self.dropped += 1
        return None
