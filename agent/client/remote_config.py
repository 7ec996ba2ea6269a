"""
The collector's config for this board: fetched with ``If-None-Match``, validated whole, cached on disk.

``GET /v1/config`` answers 200 with an ``ETag`` and ``{"board", "tags", "rules", "offset_db",
"flush_seconds", "heartbeat_seconds"}``, or 304 when the board's copy is current. The last good
config is written to ``<state_dir>/remote-config.json`` atomically (temp file, fsync, rename), so a
board that reboots while the collector is unreachable still knows its tags and offset and scans.

A config that fails validation is rejected whole (logged with the field); the last good one stays.
"""

from __future__ import annotations

import asyncio
import enum
import json
import os
import time
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import aiohttp
import structlog

from listenpost.agent.client.net import request_timeout
from listenpost.core.errors import ConfigError, DecodeError
from listenpost.core.identity import parse_tag_id
from listenpost.core.settings import DecodeRule, Section, parse_rules, positive

log = structlog.get_logger("listenpost.agent.client.remote_config")

CACHE_FILE = "remote-config.json"


@dataclass(frozen=True, slots=True)
class RemoteConfig:
    """What the collector decides for a board."""

    board: str
    tags: frozenset[str]
    """Registered tag identities, canonical form."""
    rules: tuple[DecodeRule, ...]
    offset_db: float
    """RSSI offset added to every reading, dB."""
    flush_seconds: float
    """Longest time readings wait in memory before they are sealed, seconds."""
    heartbeat_seconds: float
    """Heartbeat period, seconds."""
    etag: str | None = None
    """The collector's ``ETag`` for this version (``None`` for the copy handed out at enrollment)."""


def parse_remote_config(data: Any, origin: str = "collector config", etag: str | None = None) -> RemoteConfig:
    """
    Validate the collector's config body.

    Raises:
        ConfigError: naming the origin and the field, e.g. ``collector config: tags[3]: ...``.
    """
    top = Section(data, "", origin)
    board = top.get("board", str)
    raw_tags = top.get("tags", list)
    tags: set[str] = set()
    for i, t in enumerate(raw_tags):
        if not isinstance(t, str):
            raise top.fail(f"tags[{i}]", f"must be a tag identity string, got {t!r}")
        try:
            tags.add(parse_tag_id(t))
        except DecodeError as e:
            raise top.fail(f"tags[{i}]", str(e)) from None
    rules = parse_rules(top)
    offset_db = top.get(
        "offset_db", float, 0.0, check=lambda v: None if -40 <= v <= 40 else "must be within ±40 dB"
    )
    flush = top.get(
        "flush_seconds", float, 5.0, check=lambda v: None if 0 < v <= 3600 else "must be in (0, 3600]"
    )
    heartbeat = top.get("heartbeat_seconds", float, 10.0, check=positive)
    # Unknown top-level keys are tolerated (unlike agent.yaml): a newer collector may add fields,
    # and an older board must keep working with the ones it knows.
    return RemoteConfig(board, frozenset(tags), rules, offset_db, flush, heartbeat, etag)


class ConfigCache:
    """The last good remote config, on disk, as the collector sent it (re-validated on load)."""

    def __init__(self, state_dir: str | Path) -> None:
        self.path = Path(state_dir) / CACHE_FILE

    def load(self) -> RemoteConfig | None:
        """The cached config, or ``None`` if there is none or it is unreadable (logged, never raised)."""
        try:
            raw = json.loads(self.path.read_text())
        except FileNotFoundError:
            return None
        except (OSError, ValueError) as e:
            log.warning("config_cache_unreadable", path=str(self.path), error=str(e))
            return None
        if not isinstance(raw, dict):
            log.warning("config_cache_unreadable", path=str(self.path), error="not a JSON object")
            return None
        try:
            etag = raw.get("etag")
            return parse_remote_config(
                raw.get("config"), origin=f"{self.path}: config", etag=etag if isinstance(etag, str) else None
            )
        except ConfigError as e:
            log.warning("config_cache_invalid", path=str(self.path), error=str(e))
            return None

    def save(self, body: Mapping[str, Any], etag: str | None) -> None:
        """Replace the cache atomically: a crash leaves the old file or the new one, never half of one."""
        self.path.parent.mkdir(parents=True, exist_ok=True)
        data = json.dumps(
            {"etag": etag, "saved_at": time.time(), "config": body}, indent=1, sort_keys=True
        ).encode()
        write_atomic(self.path, data, mode=0o644)


def write_atomic(path: Path, data: bytes, mode: int = 0o644) -> None:
    """Write ``data`` to ``path`` via a temp file in the same directory, fsync, rename, fsync the directory."""
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    tmp.unlink(missing_ok=True)  # O_EXCL below: the mode must come from this open, not a leftover file
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, mode)
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    try:
        dfd = os.open(path.parent, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(dfd)  # the rename itself must survive a power cut
    except OSError:
        pass
    finally:
        os.close(dfd)


class FetchResult(enum.Enum):
    """How one config fetch ended."""

    UPDATED = "updated"
    NOT_MODIFIED = "not_modified"
    REJECTED = "rejected"
    """The collector's config failed validation; the last good one stays."""
    UNAUTHORIZED = "unauthorized"
    FAILED = "failed"
    """Unreachable, timeout, or an unexpected status; try again later."""


class ConfigFetcher:
    """
    Keep this board's remote config current.

    Args:
        base_url: collector base URL.
        token: bearer token.
        board: this board's name (a config for another board is rejected).
        cache: where the last good config lives.
        session: `aiohttp.ClientSession` to use (owned by the caller).
        timeout_s: total timeout of each request.
    """

    def __init__(
        self,
        *,
        base_url: str,
        token: str,
        board: str,
        cache: ConfigCache,
        session: aiohttp.ClientSession,
        timeout_s: float = 10.0,
    ) -> None:
        self.url = base_url.rstrip("/") + "/v1/config"
        self.token = token
        self.board = board
        self.cache = cache
        self.session = session
        self.timeout = request_timeout(timeout_s)
        self.current: RemoteConfig | None = cache.load()
        self.fetches = 0
        self.rejected = 0
        self.last_error: str | None = None

    @property
    def etag(self) -> str | None:
        return self.current.etag if self.current is not None else None

    async def fetch(self) -> FetchResult:
        """Ask the collector once; on a valid new config, cache it and make it `current`."""
        headers = {"Authorization": f"Bearer {self.token}", "Accept": "application/json"}
        if self.etag:
            headers["If-None-Match"] = self.etag
        self.fetches += 1
        try:
            async with self.session.get(self.url, headers=headers, timeout=self.timeout) as resp:
                status = resp.status
                etag = resp.headers.get("ETag")
                text = await resp.text()
        except (TimeoutError, aiohttp.ClientError, OSError) as e:
            self.last_error = f"{type(e).__name__}: {e}"[:200]
            log.warning("config_fetch_failed", error=self.last_error)
            return FetchResult.FAILED
        if status == 304:
            self.last_error = None
            return FetchResult.NOT_MODIFIED
        if status in (401, 403):
            self.last_error = f"{status}"
            log.error("config_fetch_unauthorized", status=status)
            return FetchResult.UNAUTHORIZED
        if status != 200:
            self.last_error = f"{status}: {text[:120]}"
            log.warning("config_fetch_failed", status=status, body=text[:120])
            return FetchResult.FAILED
        try:
            body = json.loads(text)
        except ValueError:
            body = None
        try:
            cfg = parse_remote_config(body, origin="collector config", etag=etag)
            if cfg.board != self.board:
                raise ConfigError(f"collector config: board: is {cfg.board!r}, this board is {self.board!r}")
        except ConfigError as e:
            self.rejected += 1
            self.last_error = str(e)[:200]
            log.error("config_rejected", error=str(e), etag=etag, kept_etag=self.etag)
            return FetchResult.REJECTED
        await asyncio.to_thread(self.cache.save, body, etag)  # fsync: keep it off the event loop
        self.current = cfg
        self.last_error = None
        log.info(
            "config_updated", etag=etag, tags=len(cfg.tags), rules=len(cfg.rules), offset_db=cfg.offset_db
        )
        return FetchResult.UPDATED
