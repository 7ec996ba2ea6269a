"""
``listenpost agent run``: the board's one long-running process.

    source ─► pipeline ─► spool ─► uplink ──► collector
                            ▲         heartbeat ─► (config ETag) ─► config fetch ─► pipeline, spool

Each arrow is an asyncio task the service keeps a reference to; shutdown is structured: stop the
source, seal what is pending, stop the network tasks, close the spool (which seals once more). The
board scans and spools with or without a collector: no URL (or no credential) means spool only, and
a cached remote config lets it start with the collector unreachable.

`run_agent` holds no process-global state, so the demo runs 16 boards in one process, each with its
own clock and a shared `aiohttp.ClientSession`; signal handlers and logging set-up live only in
`run_command`.
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import enum
import random
import signal
from collections import Counter
from collections.abc import Callable
from pathlib import Path
from typing import Any

import aiohttp
import structlog

from listenpost import __version__
from listenpost.agent.client.heartbeat import Heartbeat
from listenpost.agent.client.net import client_session
from listenpost.agent.client.remote_config import ConfigCache, ConfigFetcher, RemoteConfig
from listenpost.agent.client.uplink import ExchangeLog, Uplink, UplinkState
from listenpost.agent.config import AgentConfig, load_agent_config
from listenpost.agent.pipeline import Pipeline, build_pipeline
from listenpost.agent.pipeline.tagrate import TagRates
from listenpost.agent.sources import batches_of, open_source, replay_board_clock
from listenpost.agent.spool import Spool
from listenpost.core.backoff import capped_exponential
from listenpost.core.clock import Clock, SystemClock
from listenpost.core.errors import CaptureFormatError, ConfigError, SourceUnavailable
from listenpost.core.identity import load_tag_file
from listenpost.core.logs import configure
from listenpost.core.notify import Notifier
from listenpost.core.records import Source
from listenpost.core.settings import DecodeRule

log = structlog.get_logger("listenpost.agent.service")

STATUS_EVERY_S = 10.0
"""How often the one-line systemd STATUS is refreshed, seconds."""
SOURCE_RETRY_MAX_S = 60.0
"""Cap of the doubling wait before a failed radio source is opened again, seconds."""
DRAIN_TIMEOUT_S = 300.0
"""Longest wait for the spool to drain after a replay source ended, seconds of the injected clock."""
DRAIN_POLL_S = 0.5


class SourceState(enum.Enum):
    """What the radio (or recording) is doing; reported in heartbeats."""

    STARTING = "starting"
    RUNNING = "running"
    UNAVAILABLE = "unavailable"
    """Opening or reading failed; retried with a capped backoff."""
    ENDED = "ended"
    """A recording reached its end."""
    STOPPED = "stopped"


def read_credential(path: Path) -> str | None:
    """The board token from ``path`` (written by ``agent enroll``), or ``None`` if absent or empty."""
    try:
        token = path.read_text().strip()
    except FileNotFoundError:
        return None
    return token or None


class AgentService:
    """
    One board: its pipeline, spool, uplink, heartbeat and config, on one injected clock.

    Args:
        cfg: the validated ``agent.yaml``.
        clock: the board's clock.
        source: where adverts come from; ``None`` opens ``cfg.source``.
        exit_when_source_ends: after the source ends, seal, drain the spool (at most
            ``drain_timeout_s``) and return — replay uploads and the demo.
        session: a shared `aiohttp.ClientSession`; ``None`` makes (and closes) one.
        notifier: sd_notify sender (a disabled one when ``None``).
        drain_timeout_s: bound of the drain wait, seconds of ``clock``.
        rng: jitter source for the uplink's backoff.
    """

    def __init__(
        self,
        cfg: AgentConfig,
        *,
        clock: Clock,
        source: Source | None = None,
        exit_when_source_ends: bool = False,
        session: aiohttp.ClientSession | None = None,
        notifier: Notifier | None = None,
        drain_timeout_s: float = DRAIN_TIMEOUT_S,
        rng: random.Random | None = None,
    ) -> None:
        self.cfg = cfg
        self.clock = clock
        self.source = source
        self._own_source = source is None
        self.exit_when_source_ends = exit_when_source_ends
        self._session = session
        self._own_session = False
        self.notifier = notifier or Notifier({})
        self.drain_timeout_s = drain_timeout_s
        self.rng = rng
        self.stop_event = asyncio.Event()
        self.started = asyncio.Event()
        """Set once every task is running (after the spool opened on its worker thread). Virtual-time
        drivers wait for it: advancing the clock before then shifts the sealer's phase by however much
        real time the open took."""
        self.source_state = SourceState.STARTING
        self.source_error: str | None = None
        self.spool: Spool | None = None
        self.pipeline: Pipeline | None = None
        self.uplink: Uplink | None = None
        self.heartbeat: Heartbeat | None = None
        self.config: ConfigFetcher | None = None
        self.remote: RemoteConfig | None = None
        self.exchanges = ExchangeLog()
        self.tag_rates = TagRates(clock)
        """Effective readings per second per registered tag (the heartbeat sends only its summary)."""
        self.drained: bool | None = None
        """After a drain: True if the spool emptied in time (``None`` if no drain was asked for)."""
        self._rules: tuple[DecodeRule, ...] = cfg.rules
        self._stats_base: Counter[str] = Counter()
        self._tasks: dict[str, asyncio.Task[Any]] = {}
        self._fatal: BaseException | None = None
        self._dropped_at_start = 0

    # ------------------------------------------------------------------ control

    def request_stop(self) -> None:
        """Begin a clean shutdown (SIGTERM, SIGINT, or the caller)."""
        self.stop_event.set()

    @property
    def offset_db(self) -> float:
        c = self.pipeline.calibrate if self.pipeline is not None else None
        return c.offset_db if c is not None else self.cfg.offset_db

    # ------------------------------------------------------------------ start-up

    def _initial_settings(self) -> tuple[frozenset[str], tuple[DecodeRule, ...], float, float, float]:
        """Tags, rules, offset, flush and heartbeat periods: the collector's cached config wins."""
        cfg = self.cfg
        self.remote = ConfigCache(cfg.state_dir).load() if cfg.collector.url else None
        if self.remote is not None:
            r = self.remote
            log.info("config_from_cache", etag=r.etag, tags=len(r.tags), offset_db=r.offset_db)
            return r.tags, r.rules, r.offset_db, r.flush_seconds, r.heartbeat_seconds
        tags = load_tag_file(cfg.state_path(cfg.tags_file)) if cfg.tags_file else frozenset()
        if not tags:
            log.warning("no_registered_tags", hint="nothing is kept until the collector's config arrives")
        return tags, cfg.rules, cfg.offset_db, cfg.spool.flush_seconds, cfg.heartbeat_seconds

    def _session_get(self) -> aiohttp.ClientSession:
        if self._session is None:
            ca = self.cfg.collector.ca_file
            self._session = client_session(self.cfg.state_path(ca) if ca else None)
            self._own_session = True
        return self._session

    async def run(self) -> int:
        """Run until stopped (or until the source ends and the spool drained); returns the exit code."""
        with structlog.contextvars.bound_contextvars(board=self.cfg.board):
            try:
                return await self._run()
            finally:
                if self._own_session and self._session is not None:
                    await self._session.close()

    async def _run(self) -> int:
        cfg, clock = self.cfg, self.clock
        tags, rules, offset_db, flush_s, heartbeat_s = self._initial_settings()
        self._rules = rules
        self.pipeline = build_pipeline(tags, rules, offset_db)
        self.spool = await Spool.open(
            cfg.state_path(cfg.spool.path),
            clock=clock,
            max_bytes=cfg.spool.max_bytes,
            flush_seconds=flush_s,
            max_batch_readings=cfg.uplink.max_batch_readings,
        )
        self._dropped_at_start = self.spool.stats().dropped_readings
        try:
            token = (
                read_credential(cfg.state_path(cfg.collector.credential_file)) if cfg.collector.url else None
            )
            if cfg.collector.url and token is None:
                log.error(
                    "credential_missing",
                    path=str(cfg.state_path(cfg.collector.credential_file)),
                    hint="run 'listenpost agent enroll'; spooling only until then",
                )
            if cfg.collector.url and token is not None:
                self._start_network(cfg.collector.url, token, heartbeat_s)
            self._tasks["source"] = asyncio.create_task(self._source_loop(), name=f"{cfg.board}:source")
            self._tasks["sealer"] = asyncio.create_task(
                self.spool.run_sealer(lambda: clock.boot_id, lambda: self.offset_db),
                name=f"{cfg.board}:sealer",
            )
            self._tasks["status"] = asyncio.create_task(self._status_loop(), name=f"{cfg.board}:status")
            log.info(
                "agent_started",
                version=__version__,
                source=cfg.source.kind,
                collector=cfg.collector.url,
                uploading=self.uplink is not None,
                tags=len(tags),
                offset_db=offset_db,
            )
            self.notifier.ready(self.status_line())
            self.started.set()
            await self.stop_event.wait()
            code = await self._shutdown()
            if self._fatal is not None:
                raise self._fatal
        finally:
            await self._cancel_all()
            await self.spool.close()
        return self._final_word(code)

    def _final_word(self, code: int) -> int:
        """
        A run that ends with readings neither delivered nor in the spool file says how many.

        Readings still in memory at close (a failing disk) are lost without a trace at the collector:
        the run fails. Readings dropped during the run (memory bound, full spool) were reported to the
        collector by a gap record, so they are logged but do not fail an ordinary stop, which systemd
        would otherwise show as a failed unit after every long outage.
        """
        assert self.spool is not None
        at_close = self.spool.lost_at_close
        dropped = self.spool.stats().dropped_readings - self._dropped_at_start
        if not at_close and not dropped:
            return code
        (log.error if at_close else log.warning)(
            "readings_lost",
            readings=at_close + dropped,
            lost_at_close=at_close,
            dropped_during_run=dropped,
            spool_degraded=self.spool.stats().degraded,
            hint="see docs/reliability.md §1: a full or failing disk keeps readings in memory only",
        )
        return (code or 1) if at_close else code

    def _start_network(self, url: str, token: str, heartbeat_s: float) -> None:
        cfg, clock = self.cfg, self.clock
        session = self._session_get()
        self.uplink = Uplink(
            base_url=url,
            token=token,
            board=cfg.board,
            clock=clock,
            spool=self.spool,  # type: ignore[arg-type]
            session=session,
            timeout_s=cfg.collector.timeout_seconds,
            backoff_initial_s=cfg.uplink.backoff_initial_seconds,
            backoff_max_s=cfg.uplink.backoff_max_seconds,
            rng=self.rng,
            exchanges=self.exchanges,
        )
        self.config = ConfigFetcher(
            base_url=url,
            token=token,
            board=cfg.board,
            cache=ConfigCache(cfg.state_dir),
            session=session,
            timeout_s=cfg.collector.timeout_seconds,
        )
        self.heartbeat = Heartbeat(
            base_url=url,
            token=token,
            board=cfg.board,
            clock=clock,
            session=session,
            stats_fn=self.stats,
            exchanges=self.exchanges,
            period_s=heartbeat_s,
            timeout_s=cfg.collector.timeout_seconds,
            config=self.config,
            on_config=self.apply_config,
            state_dir=cfg.state_dir,
        )
        self._tasks["uplink"] = asyncio.create_task(self.uplink.run(), name=f"{cfg.board}:uplink")
        self._tasks["heartbeat"] = asyncio.create_task(self.heartbeat.run(), name=f"{cfg.board}:heartbeat")

    # ------------------------------------------------------------------ config

    def apply_config(self, new: RemoteConfig) -> None:
        """Put a freshly fetched collector config into effect without a restart."""
        assert self.pipeline is not None and self.spool is not None
        if new.rules != self._rules:
            # The decoder is built around its rules: build a new pipeline, keep the counts.
            self._stats_base.update(self.pipeline.stats())
            self._stats_base["registered_tags"] = 0
            self.pipeline = build_pipeline(new.tags, new.rules, new.offset_db)
            self._rules = new.rules
        else:
            self.pipeline.update_tags(new.tags)
            self.pipeline.set_offset_db(new.offset_db)
        self.spool.flush_seconds = new.flush_seconds
        if self.heartbeat is not None:
            self.heartbeat.period_s = new.heartbeat_seconds
        self.remote = new
        log.info(
            "config_applied", etag=new.etag, tags=len(new.tags), rules=len(new.rules), offset_db=new.offset_db
        )

    # ------------------------------------------------------------------ tasks

    async def _source_loop(self) -> None:
        failures = 0
        while True:
            try:
                if self.source is None:
                    self.source = open_source(self.cfg.source, self.clock)
                self.source_state = SourceState.RUNNING
                self.source_error = None
                spool = self.spool
                assert spool is not None
                async for batch in batches_of(self.source):
                    # Read the attribute each time: a config with new rules swaps the pipeline.
                    readings = self.pipeline.process_batch(batch)  # type: ignore[union-attr]
                    if readings:
                        spool.add_many(readings)
                        self.tag_rates.note_readings(readings)
                    failures = 0
                self.source_state = SourceState.ENDED
                log.info("source_ended", adverts=self.pipeline.stats()["adverts_total"])  # type: ignore[union-attr]
                if self.exit_when_source_ends:
                    self.request_stop()
                return
            except SourceUnavailable as e:
                self.source_state = SourceState.UNAVAILABLE
                self.source_error = f"{e.reason.value}: {e}"
                backoff = capped_exponential(failures, 1.0, SOURCE_RETRY_MAX_S)
                failures += 1
                log.error("source_unavailable", reason=e.reason.value, error=str(e), retry_in_s=backoff)
                if self._own_source:
                    self.source = None  # open it afresh next time
            except Exception as e:  # noqa: BLE001 - a bad recording or a source bug ends the run, loudly
                self.source_state = SourceState.STOPPED
                self.source_error = f"{type(e).__name__}: {e}"
                self._fatal = e
                log.error("source_failed", error=self.source_error)
                self.request_stop()
                return
            await self.clock.sleep(backoff)

    async def _status_loop(self) -> None:
        """Watchdog keep-alives and the status line; this loop turning is what proves the process alive."""
        wd = self.notifier.watchdog_interval
        period = min(wd, STATUS_EVERY_S) if wd else STATUS_EVERY_S
        since_status = 0.0
        while True:
            await self.clock.sleep(period)
            self.notifier.watchdog()
            since_status += period
            if since_status >= STATUS_EVERY_S:
                since_status = 0.0
                self.notifier.status(self.status_line())

    # ------------------------------------------------------------------ shutdown

    async def _shutdown(self) -> int:
        assert self.spool is not None
        self.notifier.stopping()
        await self._cancel("source")
        if self.source_state is not SourceState.ENDED:
            self.source_state = SourceState.STOPPED
        await self.spool.seal(boot=self.clock.boot_id, offset_db=self.offset_db)
        code = 0
        if self.exit_when_source_ends and self.uplink is not None:
            self.drained = await self._drain()
            if not self.drained:
                left = self.spool.stats()
                log.error(
                    "drain_incomplete",
                    batches=left.batches,
                    readings_in_memory=left.readings_pending,
                    uplink_state=self.uplink.state.value,
                    last_error=self.uplink.counters.last_error,
                    hint="the batches stay in the spool and go with the next run",
                )
                code = 1
        if self.heartbeat is not None and self.exit_when_source_ends:
            await self.heartbeat.beat()  # the collector's last word about this run's figures
        log.info("agent_stopped", **self._summary())
        return code

    async def _drain(self) -> bool:
        """Wait until the uplink has nothing left to send, at most ``drain_timeout_s``."""
        assert self.spool is not None and self.uplink is not None
        deadline = self.clock.monotonic() + self.drain_timeout_s
        while True:
            if self.spool.stats().readings_pending:
                await self.spool.seal(boot=self.clock.boot_id, offset_db=self.offset_db)
            if await self.spool.peek_oldest() is None:
                st = self.spool.stats()
                # A failing file may still hold batches it cannot read back now: not drained.
                if not st.readings_pending and not (st.degraded and st.batches):
                    return True
            if self.uplink.state is UplinkState.UNAUTHORIZED or self.clock.monotonic() >= deadline:
                return False
            if self._tasks.get("uplink") is None or self._tasks["uplink"].done():
                return False
            await self.clock.sleep(DRAIN_POLL_S)

    async def _cancel(self, name: str) -> None:
        task = self._tasks.pop(name, None)
        if task is None:
            return
        task.cancel()
        with contextlib.suppress(asyncio.CancelledError):
            await task
        if not task.cancelled() and task.exception() is not None:
            log.error("task_failed", task=name, error=repr(task.exception()))

    async def _cancel_all(self) -> None:
        for name in list(self._tasks):
            await self._cancel(name)
        if self.source is not None and hasattr(self.source, "close"):
            with contextlib.suppress(Exception):
                res = self.source.close()  # type: ignore[attr-defined]
                if asyncio.iscoroutine(res):
                    await res

    # ------------------------------------------------------------------ reporting

    def stats(self) -> dict[str, Any]:
        """Everything the heartbeat reports (JSON-able)."""
        assert self.pipeline is not None and self.spool is not None
        p = Counter(self._stats_base)
        p.update(self.pipeline.stats())
        p["registered_tags"] = self.pipeline.stats()["registered_tags"]
        sp = dataclasses.asdict(self.spool.stats())
        return {
            "adverts_seen": p["adverts_total"],
            "adverts_registered": p["adverts_registered"],
            "decode_errors": p["decode_errors"],
            "readings_total": p["readings_total"],
            "pipeline": dict(p),
            "spool": sp,
            "spool_degraded": sp["degraded"],
            "drops": {
                "spool_readings": sp["dropped_readings"],
                "spool_batches": sp["dropped_batches"],
                "dead_letters": sp["dead_letters"],
            },
            "source": {
                "kind": self.cfg.source.kind,
                "state": self.source_state.value,
                "error": self.source_error,
                "radio": self._radio_stats(),
            },
            **self.tag_rates.summary().as_stats(),
            "uplink": self.uplink.stats() if self.uplink is not None else None,
            "offset_db": self.offset_db,
        }

    def _radio_stats(self) -> dict[str, Any] | None:
        """The live source's own figures (bleak: supervisor state, reason, restarts; HCI: packet counts)."""
        fn = getattr(self.source, "stats", None)
        return dict(fn()) if callable(fn) else None

    def _summary(self) -> dict[str, Any]:
        assert self.pipeline is not None and self.spool is not None
        s = self.spool.stats()
        u = self.uplink.counters if self.uplink is not None else None
        return {
            "adverts": self._stats_base["adverts_total"] + self.pipeline.stats()["adverts_total"],
            "readings": self._stats_base["readings_total"] + self.pipeline.stats()["readings_total"],
            "spool_batches": s.batches,
            "spool_degraded": s.degraded,
            "readings_in_memory": s.readings_pending,
            "acked": u.acked if u else None,
            "duplicates": u.duplicates if u else None,
            "dead_letters": u.dead_letters if u else None,
        }

    def status_line(self) -> str:
        """Short summary for ``systemctl status``."""
        readings = (
            self._stats_base["readings_total"] + self.pipeline.stats()["readings_total"]
            if self.pipeline is not None
            else 0
        )
        spool = self.spool.stats() if self.spool is not None else None
        up = self.uplink.state.value if self.uplink is not None else "off"
        return (
            f"{self.cfg.board}: source {self.source_state.value}, {readings} readings, "
            f"spool {spool.batches if spool else 0} batches, uplink {up}"
        )


async def run_agent(
    cfg: AgentConfig,
    *,
    clock: Clock,
    source: Source | None = None,
    exit_when_source_ends: bool = False,
    session: aiohttp.ClientSession | None = None,
    notifier: Notifier | None = None,
    drain_timeout_s: float = DRAIN_TIMEOUT_S,
    on_start: Callable[[AgentService], None] | None = None,
) -> int:
    """
    Run one board until cancelled, stopped, or (with ``exit_when_source_ends``) the source ends and
    the spool drained. Cancelling the task shuts down cleanly too (the spool is closed).

    Returns:
        0 on a clean stop; 1 if a drain was asked for and the spool did not empty in time.
    """
    service = AgentService(
        cfg,
        clock=clock,
        source=source,
        exit_when_source_ends=exit_when_source_ends,
        session=session,
        notifier=notifier,
        drain_timeout_s=drain_timeout_s,
    )
    if on_start is not None:
        on_start(service)
    return await service.run()


def run_command(config_path: str | Path) -> int:
    """``listenpost agent run --config FILE``: the process systemd starts."""
    cfg = load_agent_config(config_path)
    configure(cfg.log_format, cfg.log_level)  # type: ignore[arg-type]

    async def main() -> int:
        clock: Clock = SystemClock()
        if cfg.source.kind in ("replay", "btsnoop"):
            # A recording keeps its own board times: run on a board clock that fits them.
            try:
                clock = await replay_board_clock([Path(f) for f in cfg.source.files], cfg.source.speed, clock)
            except CaptureFormatError as e:
                raise ConfigError(f"{cfg.origin}: source.files: {e}") from None
        service = AgentService(cfg, clock=clock, notifier=Notifier())
        loop = asyncio.get_running_loop()
        for sig in (signal.SIGTERM, signal.SIGINT):
            loop.add_signal_handler(sig, service.request_stop)
        try:
            return await service.run()
        finally:
            for sig in (signal.SIGTERM, signal.SIGINT):
                loop.remove_signal_handler(sig)

    return asyncio.run(main())
