"""
The settings reader both agent.yaml and collector.yaml go through, and what both share.

`Section` reads a YAML mapping that knows its own key path, so every error names the file, the key
path and what is wrong, e.g. ``agent.yaml: uplink.backoff_max_seconds: must be > 0, got -1``.
Decode rules live here because a board reads them from agent.yaml and from the collector's config.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TypeVar

import yaml

from listenpost.core.errors import ConfigError

BOARD_NAME = re.compile(r"^[a-z0-9][a-z0-9._-]{0,62}$")
"""A board's name: what the collector registers and a board's hostname is made from."""

T = TypeVar("T")
_MISSING: Any = object()


@dataclass(frozen=True, slots=True)
class KeyRead:
    """One key a settings parser read: what docs/configuration.md documents, row by row."""

    path: str
    """Dotted key path; list items appear as ``[]`` (``decode.rules[].name``)."""
    kinds: tuple[str, ...]
    """Accepted YAML types."""
    default: Any
    """The default, or `REQUIRED`."""


REQUIRED: Any = "(required)"
_reads: list[KeyRead] | None = None


@contextmanager
def recording() -> Iterator[list[KeyRead]]:
    """Collect every key `Section.get` reads inside the block (how the configuration reference is checked)."""
    global _reads
    _reads = []
    try:
        yield _reads
    finally:
        _reads = None


class Section:
    """A mapping read from YAML that knows its own key path, for error messages."""

    def __init__(self, data: Any, path: str, origin: str) -> None:
        if data is None:
            data = {}
        if not isinstance(data, Mapping):
            raise ConfigError(
                f"{origin}: {path or '(top level)'}: must be a mapping, got {type(data).__name__}"
            )
        self.data = data
        self.path = path
        self.origin = origin
        self._seen: set[str] = set()

    def key(self, name: str) -> str:
        return f"{self.path}.{name}" if self.path else name

    def fail(self, name: str, problem: str) -> ConfigError:
        return ConfigError(f"{self.origin}: {self.key(name)}: {problem}")

    def get(
        self,
        name: str,
        kind: type[T] | tuple[type, ...],
        default: Any = _MISSING,
        check: Callable[[Any], str | None] | None = None,
    ) -> Any:
        """Read ``name``; ``check`` returns a problem text or None."""
        self._seen.add(name)
        if _reads is not None:
            kinds_read = kind if isinstance(kind, tuple) else (kind,)
            _reads.append(
                KeyRead(
                    re.sub(r"\[\d+\]", "[]", self.key(name)),
                    tuple(k.__name__ for k in kinds_read),
                    REQUIRED if default is _MISSING else default,
                )
            )
        if name not in self.data or self.data[name] is None:
            if default is _MISSING:
                raise self.fail(name, "is required")
            return default
        value = self.data[name]
        kinds = kind if isinstance(kind, tuple) else (kind,)
        if float in kinds and isinstance(value, int) and not isinstance(value, bool):
            value = float(value)
        if isinstance(value, bool) and bool not in kinds or not isinstance(value, kinds):
            names = " or ".join(k.__name__ for k in kinds)
            raise self.fail(name, f"must be {names}, got {value!r}")
        if check is not None and (problem := check(value)):
            raise self.fail(name, f"{problem}, got {value!r}")
        return value

    def section(self, name: str) -> Section:
        self._seen.add(name)
        return Section(self.data.get(name), self.key(name), self.origin)

    def items(self, name: str) -> list[Section]:
        """A list of mappings under ``name``."""
        self._seen.add(name)
        raw = self.data.get(name) or []
        if not isinstance(raw, list):
            raise self.fail(name, f"must be a list, got {raw!r}")
        return [Section(x, f"{self.key(name)}[{i}]", self.origin) for i, x in enumerate(raw)]

    def done(self) -> None:
        """Reject keys nobody read: a typo must not silently fall back to a default."""
        unknown = sorted(set(map(str, self.data)) - self._seen)
        if unknown:
            raise self.fail(unknown[0], "unknown key")


def positive(v: float) -> str | None:
    return None if v > 0 else "must be > 0"


def non_negative(v: float) -> str | None:
    return None if v >= 0 else "must be >= 0"


def load_yaml(path: str | Path) -> Any:
    """Parse a YAML file; a syntax error names the file and the line."""
    p = Path(path)
    try:
        text = p.read_text()
    except OSError as e:
        raise ConfigError(f"{p}: cannot read: {e.strerror or e}") from e
    try:
        return yaml.safe_load(text)
    except yaml.YAMLError as e:
        mark = getattr(e, "problem_mark", None)
        where = f" line {mark.line + 1}" if mark is not None else ""
        raise ConfigError(f"{p}:{where}: not valid YAML: {getattr(e, 'problem', e)}") from e


@dataclass(frozen=True, slots=True)
class DecodeRule:
    """A configured identity rule for tag firmware that no built-in rule knows."""

    name: str
    """Prefix of the identities it makes (``lpx`` → ``lpx:00000007``)."""
    company_id: int | None = None
    """Match Manufacturer Specific Data with this company ID ..."""
    service_uuid16: int | None = None
    """... or Service Data with this 16-bit UUID (exactly one of the two)."""
    prefix: bytes = b""
    """Payload must start with these bytes (after the company ID / UUID)."""
    offset: int = 0
    """Byte offset of the ID within the payload."""
    length: int = 4
    """Length of the ID in bytes."""


def parse_rule(s: Section) -> DecodeRule:
    """Read one decode rule (``decode.rules[i]`` locally, or from the collector's config)."""
    name = s.get(
        "name",
        str,
        check=lambda v: (
            None
            if re.fullmatch(r"[a-z][a-z0-9_-]{0,31}", v)
            and v not in ("mac", "ibeacon", "altbeacon", "eddystone")
            else "must be lower-case letters/digits, not a built-in kind"
        ),
    )
    company = s.get("company_id", int, None, check=lambda v: None if 0 <= v <= 0xFFFF else "must be 0..65535")
    svc = s.get("service_uuid16", int, None, check=lambda v: None if 0 <= v <= 0xFFFF else "must be 0..65535")
    if (company is None) == (svc is None):
        raise s.fail("company_id", "give exactly one of company_id or service_uuid16")
    prefix_hex = s.get("prefix", str, "")
    try:
        prefix = bytes.fromhex(prefix_hex)
    except ValueError:
        raise s.fail("prefix", f"must be hex bytes, got {prefix_hex!r}") from None
    offset = s.get("offset", int, None, check=lambda v: None if 0 <= v <= 255 else "must be 0..255")
    if offset is None:
        offset = len(prefix)  # the ID follows the prefix unless told otherwise
    length = s.get("length", int, 4, check=lambda v: None if 1 <= v <= 32 else "must be 1..32")
    s.done()
    return DecodeRule(name, company, svc, prefix, offset, length)


def parse_rules(s: Section) -> tuple[DecodeRule, ...]:
    """
    Read ``s``'s ``rules`` list (agent.yaml's ``decode``, the collector's ``decode``, or a remote config).

    Raises:
        ConfigError: a bad rule (naming its index and key), or two rules with one name.
    """
    rules = tuple(parse_rule(r) for r in s.items("rules"))
    if len({r.name for r in rules}) != len(rules):
        raise s.fail("rules", "rule names must be unique")
    return rules


def rule_to_json(rule: DecodeRule) -> dict[str, Any]:
    """A decode rule in the shape `parse_rule` reads back (prefix as hex, absent keys left out)."""
    out: dict[str, Any] = {"name": rule.name}
    if rule.company_id is not None:
        out["company_id"] = rule.company_id
    if rule.service_uuid16 is not None:
        out["service_uuid16"] = rule.service_uuid16
    out.update(prefix=rule.prefix.hex(), offset=rule.offset, length=rule.length)
    return out
