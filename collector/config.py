"""
``collector.yaml`` → `CollectorSettings`, validated at load with the shared `listenpost.core.settings.Section` reader.

Every error names the file and the key path, e.g. ``collector.yaml: limits.max_body_bytes: must be > 0, got -1``.
Every key is optional; an absent file means all defaults::

    listen: {host: 0.0.0.0, port: 8470}
    tls: {cert: /etc/listenpost/cert.pem, key: /etc/listenpost/key.pem}   # HTTPS when both are given
    public_url: http://10.20.0.2:8470          # what boards are told to use (provisioning bundles)
    webhook: {url: https://ops.example/hook, timeout_seconds: 5, attempts: 4}
    retention: {days: 90, chunk: 10000}
    liveness: {...}                            # any field of listenpost.collector.models.liveness.LivenessSettings
    enrollment: {code_lifetime_hours: 72}
    limits: {max_body_bytes: 4194304, max_decompressed_bytes: 33554432, max_readings: 200000,
             max_inflight_batches: 128, busy_retry_after_seconds: 2,   # past the 128th batch at once: 429
             max_reading_age_hours: 8760, max_reading_ahead_seconds: 600}
    agent: {flush_seconds: 5, heartbeat_seconds: 10}
    decode:
      rules:
        - {name: lpx, company_id: 0xFFFF, prefix: "4c50", offset: 2, length: 4}
    monitor: {interval_seconds: 5}
    database: {url: "postgresql://listenpost@db.internal/listenpost"}   # default: SQLite in the state dir

The database URL may carry a password, so it can also come from outside the file (`database_url_from`):
``$CREDENTIALS_DIRECTORY/db_url`` (systemd ``LoadCredential=db_url:...``) wins, then ``$LISTENPOST_DB_URL``
(e.g. from the unit's ``EnvironmentFile=``), then ``database.url``; ``serve --db`` beats all three.
"""

from __future__ import annotations

import dataclasses
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from listenpost.core.errors import ConfigError
from listenpost.core.settings import (
    DecodeRule,
    Section,
    load_yaml,
    non_negative,
    parse_rules,
    positive,
    rule_to_json,
)

__all__ = ["rule_to_json"]  # board API answers carry the rules in the form agent.yaml reads

DEFAULT_PORT = 8470
DB_URL_ENV = "LISTENPOST_DB_URL"
DB_URL_CREDENTIAL = "db_url"
"""The name of the systemd credential holding the database URL (``$CREDENTIALS_DIRECTORY/db_url``)."""


@dataclass(frozen=True, slots=True)
class Limits:
    """Request size limits of the board API."""

    max_body_bytes: int = 4 * 1024 * 1024
    """Largest request body as sent (possibly gzip'd), bytes; larger → 413."""
    max_decompressed_bytes: int = 32 * 1024 * 1024
    """Largest body after gunzip, bytes; a gzip bomb stops here → 413."""
    max_readings: int = 200_000
    """Most readings in one batch."""
    max_inflight_batches: int = 128
    """Batch requests read and stored at once by this process; one more is answered 429 with
    ``Retry-After`` instead of queueing, so memory stays below about this × ``max_decompressed_bytes``.
    The default lets every board of a venue-sized fleet (about 100, docs/design.md §7) have its one batch
    in flight, which group commit needs to batch well."""
    busy_retry_after_seconds: int = 2
    """``Retry-After`` of that 429, seconds (boards wait at least this, plus their own jitter)."""
    max_reading_age_hours: float = 8760.0
    """A batch with a reading (after the board's clock model) older than this before the collector's
    clock is refused (400), and so is a clock exchange stamped earlier. A year: far past any outage a
    spool bridges (retention deletes old readings anyway); what it stops is a time no clock could give."""
    max_reading_ahead_seconds: float = 600.0
    """...and one more than this ahead of the collector's clock (a clock exchange too)."""


@dataclass(frozen=True, slots=True)
class WebhookSettings:
    url: str | None = None
    """POST state-change events here (JSON); ``None`` disables the webhook."""
    timeout_seconds: float = 5.0
    """Total timeout of each POST."""
    attempts: int = 4
    """Tries per event before it is given up (the event stays in the store)."""
    backoff_seconds: float = 1.0
    """First retry delay; doubles per attempt."""


@dataclass(frozen=True, slots=True)
class CollectorSettings:
    """Everything the collector service reads from its config file and command line."""

    state_dir: str = "."
    """Directory of the admin token and the default SQLite database."""
    db_url: str | None = None
    """``postgresql://…`` or ``sqlite:///…``; ``None`` means ``state_dir/collector.sqlite``."""
    host: str = "127.0.0.1"
    port: int = DEFAULT_PORT
    tls_cert: str | None = None
    tls_key: str | None = None
    public_url: str | None = None
    """Base URL boards use to reach this collector; bundles fall back to the admin's ``--collector`` URL."""
    webhook: WebhookSettings = field(default_factory=WebhookSettings)
    retention_days: float = 90.0
    """Raw readings older than this are deleted by the monitor (0 keeps them forever)."""
    retention_chunk: int = 10_000
    """Rows deleted per statement, so retention never holds a long lock."""
    retention_heartbeat_days: float = 7.0
    """Heartbeats older than this go (each board's newest stays); 0 keeps them."""
    retention_clock_sample_days: float = 7.0
    """Clock samples older than this go (each boot's newest stays); 0 keeps them."""
    retention_batch_key_days: float = 120.0
    """Batch keys (dedup) older than this go, never before a day past the readings; 0 keeps them."""
    liveness: dict[str, Any] = field(default_factory=dict)
    """Overrides of `listenpost.collector.models.liveness.LivenessSettings` fields."""
    code_lifetime_seconds: float = 72 * 3600.0
    """How long an enrollment code stays valid."""
    limits: Limits = field(default_factory=Limits)
    flush_seconds: float = 5.0
    """Told to boards: longest wait before readings are sealed."""
    heartbeat_seconds: float = 10.0
    """Told to boards: heartbeat period."""
    rules: tuple[DecodeRule, ...] = ()
    """Decode rules for tag firmware no built-in rule knows; sent to every board."""
    monitor_interval_seconds: float = 5.0
    """Period of the liveness/retention round."""
    origin: str = "collector.yaml"

    def resolved_db_url(self) -> str:
        return self.db_url or f"sqlite:///{Path(self.state_dir) / 'collector.sqlite'}"

    def replace(self, **changes: Any) -> CollectorSettings:
        return dataclasses.replace(self, **changes)


def _liveness_overrides(s: Section) -> dict[str, Any]:
    if not s.data:
        return {}
    # The field list belongs to collector/liveness.py; reading it here keeps one definition.
    from listenpost.collector.models.liveness import LivenessSettings

    fields = {f.name: f for f in dataclasses.fields(LivenessSettings)}
    out: dict[str, Any] = {}
    for key in list(s.data):
        if key not in fields:
            raise s.fail(str(key), f"unknown key (known: {', '.join(sorted(fields))})")
        default = getattr(LivenessSettings(), key)
        # An integer setting stays an integer (Section.get widens ints only where a float is wanted).
        kind = type(default)
        out[key] = s.get(key, kind, default, check=non_negative if kind in (int, float) else None)
    s.done()
    try:
        LivenessSettings(**out)
    except (TypeError, ValueError) as e:
        raise ConfigError(f"{s.origin}: {s.path}: {e}") from e
    return out


def parse_settings(data: Any, origin: str = "collector.yaml", **overrides: Any) -> CollectorSettings:
    """Validate a parsed ``collector.yaml``; ``overrides`` (command-line values) win over the file."""
    top = Section(data, "", origin)
    lis = top.section("listen")
    host = lis.get("host", str, "127.0.0.1")
    port = lis.get("port", int, DEFAULT_PORT, check=lambda v: None if 0 <= v <= 65535 else "must be 0..65535")
    lis.done()

    tls = top.section("tls")
    cert = tls.get("cert", str, None)
    key = tls.get("key", str, None)
    if (cert is None) != (key is None):
        raise tls.fail("key" if key is None else "cert", "give both cert and key, or neither")
    tls.done()

    url_check = lambda v: None if re.match(r"^https?://[^/\s]+", v) else "must be an http(s) URL"  # noqa: E731
    public_url = top.get("public_url", str, None, url_check)

    wh = top.section("webhook")
    webhook = WebhookSettings(
        url=wh.get("url", str, None, url_check),
        timeout_seconds=wh.get("timeout_seconds", float, 5.0, positive),
        attempts=wh.get("attempts", int, 4, check=lambda v: None if 1 <= v <= 20 else "must be 1..20"),
        backoff_seconds=wh.get("backoff_seconds", float, 1.0, positive),
    )
    wh.done()

    ret = top.section("retention")
    retention_days = ret.get("days", float, 90.0, non_negative)
    retention_chunk = ret.get("chunk", int, 10_000, positive)
    retention_heartbeat_days = ret.get("heartbeat_days", float, 7.0, non_negative)
    retention_clock_sample_days = ret.get("clock_sample_days", float, 7.0, non_negative)
    retention_batch_key_days = ret.get("batch_key_days", float, 120.0, non_negative)
    ret.done()

    liveness = _liveness_overrides(top.section("liveness"))

    en = top.section("enrollment")
    code_hours = en.get("code_lifetime_hours", float, 72.0, positive)
    en.done()

    lim = top.section("limits")
    d = Limits()
    limits = Limits(
        max_body_bytes=lim.get("max_body_bytes", int, d.max_body_bytes, positive),
        max_decompressed_bytes=lim.get("max_decompressed_bytes", int, d.max_decompressed_bytes, positive),
        max_readings=lim.get("max_readings", int, d.max_readings, positive),
        max_inflight_batches=lim.get("max_inflight_batches", int, d.max_inflight_batches, positive),
        busy_retry_after_seconds=lim.get(
            "busy_retry_after_seconds",
            int,
            d.busy_retry_after_seconds,
            check=lambda v: None if 1 <= v <= 3600 else "must be 1..3600",
        ),
        max_reading_age_hours=lim.get("max_reading_age_hours", float, d.max_reading_age_hours, positive),
        max_reading_ahead_seconds=lim.get(
            "max_reading_ahead_seconds", float, d.max_reading_ahead_seconds, positive
        ),
    )
    lim.done()
    if limits.max_decompressed_bytes < limits.max_body_bytes:
        raise lim.fail("max_decompressed_bytes", "must be >= max_body_bytes")

    ag = top.section("agent")
    flush = ag.get("flush_seconds", float, 5.0, positive)
    heartbeat = ag.get("heartbeat_seconds", float, 10.0, positive)
    ag.done()

    dec = top.section("decode")
    rules = parse_rules(dec)
    dec.done()

    mon = top.section("monitor")
    interval = mon.get("interval_seconds", float, 5.0, positive)
    mon.done()

    db = top.section("database")
    db_url = db.get("url", str, None, check_db_url)
    db.done()
    top.done()

    settings = CollectorSettings(
        db_url=db_url,
        host=host,
        port=port,
        tls_cert=cert,
        tls_key=key,
        public_url=public_url.rstrip("/") if public_url else None,
        webhook=webhook,
        retention_days=retention_days,
        retention_chunk=retention_chunk,
        retention_heartbeat_days=retention_heartbeat_days,
        retention_clock_sample_days=retention_clock_sample_days,
        retention_batch_key_days=retention_batch_key_days,
        liveness=liveness,
        code_lifetime_seconds=code_hours * 3600.0,
        limits=limits,
        flush_seconds=flush,
        heartbeat_seconds=heartbeat,
        rules=rules,
        monitor_interval_seconds=interval,
        origin=origin,
    )
    return settings.replace(**{k: v for k, v in overrides.items() if v is not None})


def check_db_url(v: str) -> str | None:
    """`Section.get` check of a database URL: the schemes `listenpost.collector.store.open_store` knows."""
    if re.match(r"^(postgres(ql)?://\S+|sqlite:///\S+)$", v.strip()):
        return None
    return "must be postgresql://... or sqlite:///PATH"


def database_url_from(environ: Mapping[str, str]) -> tuple[str, str] | None:
    """
    The database URL given outside collector.yaml, and where it came from: the systemd credential
    ``db_url`` first, then ``$LISTENPOST_DB_URL``; None when neither is set.

    Raises:
        ConfigError: the credential cannot be read, or either value is not a database URL.
    """
    found: tuple[str, str] | None = None
    creds = environ.get("CREDENTIALS_DIRECTORY")
    if creds and (Path(creds) / DB_URL_CREDENTIAL).exists():
        path = Path(creds) / DB_URL_CREDENTIAL
        try:
            found = (path.read_text().strip(), f"credential {DB_URL_CREDENTIAL} ({path})")
        except (OSError, UnicodeDecodeError) as e:
            raise ConfigError(f"credential {DB_URL_CREDENTIAL}: {path}: cannot read: {e}") from e
    elif environ.get(DB_URL_ENV, "").strip():
        found = (environ[DB_URL_ENV].strip(), f"${DB_URL_ENV}")
    if found is not None and (problem := check_db_url(found[0])):
        # The value itself may hold a password: name where it came from, not what it is.
        raise ConfigError(f"{found[1]}: {problem}")
    return found


def load_settings(
    path: str | Path | None, environ: Mapping[str, str] | None = None, **overrides: Any
) -> CollectorSettings:
    """
    Load ``collector.yaml`` (or defaults when ``path`` is None) and apply command-line overrides;
    with ``environ``, a database URL from the environment (`database_url_from`) beats the file's.
    """
    if environ is not None and overrides.get("db_url") is None and (env := database_url_from(environ)):
        overrides["db_url"] = env[0]
    if path is None:
        return parse_settings({}, "(defaults)", **overrides)
    return parse_settings(load_yaml(path), str(path), **overrides)
