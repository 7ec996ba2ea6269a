"""
``agent.yaml`` → frozen dataclasses, validated at load.

Every error names the file, the key path and what is wrong, e.g.
``agent.yaml: uplink.backoff_max_seconds: must be > 0, got -1``.
The collector's config loader uses the same `Section` reader.
"""

from __future__ import annotations

import dataclasses
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from listenpost.core.settings import (
    BOARD_NAME,
    DecodeRule,
    Section,
    load_yaml,
    non_negative,
    parse_rules,
    positive,
)

# ---------------------------------------------------------------- agent config

SOURCE_KINDS = ("bleak", "hci", "replay", "btsnoop")


@dataclass(frozen=True, slots=True)
class CollectorConfig:
    url: str | None = None
    """Collector base URL; ``None`` runs offline (spool only)."""
    credential_file: str = "credential"
    """Board token file, relative to ``state_dir``; written by ``agent enroll`` with mode 0600."""
    timeout_seconds: float = 10.0
    """Total timeout of every request to the collector."""
    ca_file: str | None = None
    """CA bundle for a collector with a private certificate."""


@dataclass(frozen=True, slots=True)
class SourceConfig:
    kind: str = "bleak"
    adapter: str | None = None
    """``hci0``...; pin it on boards with more than one adapter."""
    files: tuple[str, ...] = ()
    """Recordings or captures for ``replay`` / ``btsnoop``."""
    speed: float = 1.0
    """Replay speed factor; 0 means as fast as possible."""
    stall_seconds: float = 60.0
    """Rebuild the scanner when it delivers nothing for this long."""


@dataclass(frozen=True, slots=True)
class SpoolConfig:
    path: str = "spool.sqlite"
    max_bytes: int = 64 * 1024 * 1024
    flush_seconds: float = 5.0
    """Readings wait in memory at most this long before they are sealed durably."""


@dataclass(frozen=True, slots=True)
class UplinkConfig:
    max_batch_readings: int = 5000
    backoff_initial_seconds: float = 1.0
    backoff_max_seconds: float = 60.0


@dataclass(frozen=True, slots=True)
class AgentConfig:
    board: str
    state_dir: str
    collector: CollectorConfig = field(default_factory=CollectorConfig)
    source: SourceConfig = field(default_factory=SourceConfig)
    tags_file: str | None = None
    """Local tag list (one canonical ID per line) for offline use; the collector's set wins when known."""
    rules: tuple[DecodeRule, ...] = ()
    offset_db: float = 0.0
    spool: SpoolConfig = field(default_factory=SpoolConfig)
    uplink: UplinkConfig = field(default_factory=UplinkConfig)
    heartbeat_seconds: float = 10.0
    log_format: str = "auto"
    log_level: str = "info"
    origin: str = "agent.yaml"

    def state_path(self, relative: str) -> Path:
        """Resolve a path from the config against ``state_dir``."""
        p = Path(relative)
        return p if p.is_absolute() else Path(self.state_dir) / p

    def replace(self, **changes: Any) -> AgentConfig:
        return dataclasses.replace(self, **changes)


def parse_agent_config(data: Any, origin: str = "agent.yaml", base_dir: Path | None = None) -> AgentConfig:
    """Validate a parsed ``agent.yaml``. Relative ``state_dir`` is taken from ``base_dir``."""
    top = Section(data, "", origin)
    board = top.get(
        "board",
        str,
        check=lambda v: (
            None if BOARD_NAME.fullmatch(v) else "must be 1-63 lower-case letters, digits, '.', '_' or '-'"
        ),
    )
    state_dir = top.get("state_dir", str, ".")
    if base_dir is not None and not Path(state_dir).is_absolute():
        state_dir = str((base_dir / state_dir).resolve())

    c = top.section("collector")
    url = c.get(
        "url",
        str,
        None,
        check=lambda v: None if re.match(r"^https?://[^/\s]+", v) else "must be an http(s) URL",
    )
    collector = CollectorConfig(
        url=url.rstrip("/") if url else None,
        credential_file=c.get("credential_file", str, "credential"),
        timeout_seconds=c.get("timeout_seconds", float, 10.0, positive),
        ca_file=c.get("ca_file", str, None),
    )
    c.done()

    s = top.section("source")
    source = SourceConfig(
        kind=s.get(
            "kind",
            str,
            "bleak",
            check=lambda v: None if v in SOURCE_KINDS else f"must be one of {', '.join(SOURCE_KINDS)}",
        ),
        adapter=s.get(
            "adapter",
            str,
            None,
            check=lambda v: None if re.fullmatch(r"hci\d+", v) else "must look like hci0",
        ),
        files=tuple(s.get("files", list, [])),
        speed=s.get("speed", float, 1.0, non_negative),
        stall_seconds=s.get("stall_seconds", float, 60.0, positive),
    )
    s.done()
    if source.kind in ("replay", "btsnoop") and not source.files:
        raise s.fail("files", f"source.kind {source.kind!r} needs at least one file")

    t = top.section("tags")
    tags_file = t.get("file", str, None)
    t.done()

    d = top.section("decode")
    rules = parse_rules(d)
    d.done()

    cal = top.section("calibration")
    offset_db = cal.get(
        "offset_db", float, 0.0, check=lambda v: None if -40 <= v <= 40 else "must be within ±40 dB"
    )
    cal.done()

    sp = top.section("spool")
    spool = SpoolConfig(
        path=sp.get("path", str, "spool.sqlite"),
        max_bytes=sp.get(
            "max_bytes", int, 64 * 1024 * 1024, check=lambda v: None if v >= 65536 else "must be >= 65536"
        ),
        flush_seconds=sp.get("flush_seconds", float, 5.0, positive),
    )
    sp.done()

    u = top.section("uplink")
    uplink = UplinkConfig(
        max_batch_readings=u.get("max_batch_readings", int, 5000, positive),
        backoff_initial_seconds=u.get("backoff_initial_seconds", float, 1.0, positive),
        backoff_max_seconds=u.get("backoff_max_seconds", float, 60.0, positive),
    )
    u.done()
    if uplink.backoff_max_seconds < uplink.backoff_initial_seconds:
        raise u.fail("backoff_max_seconds", "must be >= backoff_initial_seconds")

    h = top.section("heartbeat")
    heartbeat = h.get("period_seconds", float, 10.0, positive)
    h.done()

    lg = top.section("log")
    log_format = lg.get(
        "format",
        str,
        "auto",
        check=lambda v: None if v in ("auto", "json", "console") else "must be auto, json or console",
    )
    log_level = lg.get(
        "level",
        str,
        "info",
        check=lambda v: (
            None if v in ("debug", "info", "warning", "error") else "must be debug, info, warning or error"
        ),
    )
    lg.done()
    top.done()
    return AgentConfig(
        board,
        state_dir,
        collector,
        source,
        tags_file,
        rules,
        offset_db,
        spool,
        uplink,
        heartbeat,
        log_format,
        log_level,
        origin,
    )


def load_agent_config(path: str | Path) -> AgentConfig:
    """Load and validate ``agent.yaml``; relative ``state_dir`` is relative to the file."""
    p = Path(path)
    return parse_agent_config(load_yaml(p), origin=str(p), base_dir=p.resolve().parent)
