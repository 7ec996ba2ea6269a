"""
The collector's background round, every ``monitor.interval_seconds`` on the injected clock.

Under ``store.exclusive("monitor")`` (a PostgreSQL advisory lock when several collectors share one
database, so each board is evaluated once per round fleet-wide):

1. liveness: every board's state from its contact history, heartbeat stats and clock fit
   (collector/liveness.py); each change is stored as a ``state_changed`` event, logged as
   ``board_state_changed`` and queued for the webhook;
2. loss: seq holes (not covered by a batch or a gap record) that persist past a grace period
   become ``loss`` events, once each;
3. retention: raw readings older than ``retention.days`` go, then heartbeats, clock samples and batch
   keys past their own ages (`history_cuts`), all in bounded chunks;
4. calibration watch, every ``WATCH_EVERY_SECONDS``: each board's raw level of the venue plan's reference
   tags against its level at calibration (collector/models/calibration.py `CalibrationWatch`); a
   sustained shift is stored as a ``calibration_shift`` event with its size, once. A collector that
   takes the lead starts its baselines afresh.

A collector that does not hold the lock follows the stored ``state_changed`` events instead, so every
collector's page and ``/metrics`` show the same states.

Leadership cannot split. Before each round the leader proves it still holds the lock (`Store.holds`
asks the lock's own database session), and every event it stores is fenced: the store checks, inside
the insert's transaction, that the lock's term is still the one this collector took (a takeover bumps
it). The round check makes a leader whose lock session died stand down before its next round; the fence
covers the gap between that check and the writes, so a leader deposed in the middle of a round stores
nothing more (`LeadershipLost`) and stands down. Events carry an idempotency key (state changes: board,
transition and time; losses: the seq range), unique in the store, and only an event that was actually
inserted is logged and queued for the webhook. Retention is left unfenced: deleting old rows twice
deletes nothing more.

Stopping never waits on the database for long: releasing the lock is bounded (a session that cannot
release it is closed, which frees the lock on the server), and a cancellation is never caught as a
store error.

Webhook (``webhook.url`` in collector.yaml): every ``state_changed`` and ``loss`` event this process
stores is POSTed as JSON::

    {"id": 17, "at": 1800000123.5, "board": "g2-a", "kind": "state_changed",
     "detail": {"old": "live", "new": "deaf", "reason": "..."}}

with ``Idempotency-Key: listenpost-event-<id>``: a receiver that answered but whose answer was lost gets
the same event again and can drop it by that key. A 2xx is success; a 5xx, a 429, a timeout
(``webhook.timeout_seconds`` on the injected clock) or a network error is retried after
``webhook.backoff_seconds``, doubling, for at most ``webhook.attempts`` attempts; any other 4xx stops at
once. The POSTs run in their own task behind a bounded queue, so a stalled receiver never holds up a
round; an event given up on is logged (``webhook_failed``) and stays in the store.
"""

from __future__ import annotations

import asyncio
from collections import deque
from dataclasses import dataclass, field
from typing import Any

import structlog
from aiohttp import web

from listenpost.collector.config import CollectorSettings
from listenpost.collector.ingest import clock_model
from listenpost.collector.state import Runtime
from listenpost.collector.status import note_total, stat
from listenpost.collector.store import BoardCounts, Event, LeadershipLost, SeqHole, Store, StoreError
from listenpost.core.clock import Clock, with_timeout
from listenpost.core.errors import ConfigError

log = structlog.get_logger("listenpost.collector.monitor")

LOSS_GRACE_SECONDS = 60.0
"""A seq hole must persist this long before it is a loss (one batch in flight may be just arriving)."""
RETENTION_EVERY_SECONDS = 600.0
"""How often a retention pass starts; a pass that has more to delete goes on in the next round."""
RETENTION_CHUNKS_PER_ROUND = 2
"""Chunks of ``retention.chunk`` rows deleted per round, so a large backlog never makes one round long."""
WEBHOOK_QUEUE_MAX = 1000
LOCK = "monitor"
"""The run-once lock the leader holds (`Store.exclusive`)."""
HISTORY_SECONDS = 900.0
"""Heartbeat history handed to the liveness evaluator."""
WATCH_EVERY_SECONDS = 60.0
"""How often the calibration watch compares levels (each comparison reads a 5-minute window)."""


@dataclass(slots=True)
class RoundReport:
    """What one round did (tests and logs read it)."""

    held_lock: bool = False
    evaluated: list[str] = field(default_factory=list)
    changes: list[Event] = field(default_factory=list)
    losses: list[Event] = field(default_factory=list)
    deleted: int = 0
    history_deleted: dict[str, int] = field(default_factory=dict)
    """Heartbeats, clock samples and batch keys deleted this round, by table."""
    shifts: list[Event] = field(default_factory=list)
    """``calibration_shift`` events stored this round."""


class Monitor:
    """Liveness, loss detection, retention and the webhook for one collector process."""

    def __init__(self, store: Store, *, clock: Clock, settings: CollectorSettings, runtime: Runtime) -> None:
        self.store = store
        self.clock = clock
        self.settings = settings
        self.runtime = runtime
        self.tracker: Any = None
        """listenpost.collector.models.liveness tracker, made at the first round this process holds the lock."""
        self._seeded = False
        self._hole_first_seen: dict[tuple[str, str, int, int], float] = {}
        self._reported_holes: set[tuple[str, str, int, int]] = set()
        self._last_retention = float("-inf")
        self._retention_more = False
        """The last retention round hit its chunk budget: go on next round instead of waiting."""
        self._state_cursor = 0
        self._totals: deque[tuple[float, dict[str, int]]] = deque()
        self._batch_contacts: dict[str, deque[float]] = {}
        self._task: asyncio.Task[None] | None = None
        self._webhook_task: asyncio.Task[None] | None = None
        self._webhook_queue: asyncio.Queue[Event] = asyncio.Queue(maxsize=WEBHOOK_QUEUE_MAX)
        self.webhook_sent = 0
        self.rounds_led = 0
        """Rounds this process ran as the lock holder."""
        self.leading = False
        """This process proved it held the lock at its latest round and has not stood down since."""
        self.webhook_failed = 0
        self._last_watch = float("-inf")

    # ------------------------------------------------------------ life cycle

    def start(self) -> None:
        """Start the rounds and, when a webhook is configured, its sender."""
        self._task = asyncio.create_task(self._loop(), name="collector-monitor")
        self.start_webhook()

    def start_webhook(self) -> None:
        """Start only the webhook sender (tests that drive rounds by hand with `run_once` use it)."""
        if self.settings.webhook.url and self._webhook_task is None:
            self._webhook_task = asyncio.create_task(self._webhook_loop(), name="collector-webhook")

    async def stop(self) -> None:
        """Cancel the rounds and the webhook sender and wait for both to end (they never ignore it)."""
        tasks = [t for t in (self._task, self._webhook_task) if t is not None]
        for task in tasks:
            task.cancel()
        if tasks:
            # asyncio.wait, not `await task` under suppress(CancelledError): a cancellation of stop()
            # itself must reach its caller, not be taken for the task's.
            await asyncio.wait(tasks)

    async def _loop(self) -> None:
        """
        Leader or follower. The collector that gets the lock keeps it and runs every round while it still
        holds it (so rounds never run twice fleet-wide, even when they do not overlap in time); the others
        follow the stored states and try again each interval. A failed round gives the lock up.
        """
        interval = self.settings.monitor_interval_seconds
        while True:
            try:
                async with self.store.exclusive(LOCK) as held:
                    if held:
                        await self._lead(interval)
                    else:
                        await self._round(RoundReport(held_lock=False))
            except LeadershipLost as e:
                log.warning("monitor_standing_down", reason=str(e))
            except (StoreError, OSError) as e:
                log.warning("monitor_round_failed", error=str(e))
            except Exception:
                log.exception("monitor_round_failed")
            self.leading = False
            # A store error raised while a cancellation unwound the block (releasing the lock on a dead
            # session, say) replaces the CancelledError; the task still knows it is being cancelled.
            task = asyncio.current_task()
            if task is not None and task.cancelling():
                raise asyncio.CancelledError
            await self.clock.sleep(interval)

    async def _lead(self, interval: float) -> None:
        """Rounds as leader while the lock is provably still ours; return (stand down) once it is not."""
        self._seeded = False  # states may have moved on while another collector led
        log.info("monitor_leading")
        while await self.store.holds(LOCK):
            self.leading = True
            await self._round(RoundReport(held_lock=True))
            await self.clock.sleep(interval)
        log.warning("monitor_standing_down", reason="the lock is no longer held")

    # ------------------------------------------------------------ one round

    async def run_once(self) -> RoundReport:
        """One round now, taking the lock just for it (tests and tools; the service runs `start`)."""
        async with self.store.exclusive(LOCK) as held:
            return await self._round(RoundReport(held_lock=held))

    async def _round(self, report: RoundReport) -> RoundReport:
        counts = await self._sample_rates()
        if report.held_lock:
            await self._seed()
            await self._liveness(report, counts)
            await self._losses(report)
            await self._retention(report)
            await self._calibration_watch(report)
        else:
            await self._follow_states()
        self.runtime.monitor_rounds += 1
        self.rounds_led += report.held_lock
        return report

    async def _sample_rates(self) -> dict[str, BoardCounts]:
        """Every board's stored-readings total now, for the readings-per-second figure (collector/status.py);
        the counts, which the liveness step reads too."""
        now = self.clock.time()
        counts = {c.board: c for c in await self.store.board_counts()}
        for c in counts.values():
            note_total(self.runtime.rates.setdefault(c.board, deque(maxlen=256)), now, c.readings_total)
        return counts

    async def _seed(self) -> None:
        """Start the tracker from the stored states, so a restart does not announce every board again."""
        if self._seeded:
            return
        from listenpost.collector.models.liveness import BoardState, LivenessSettings, LivenessTracker

        await self._follow_states()
        known = {
            b: BoardState(s["state"])
            for b, s in self.runtime.states.items()
            if s.get("state") in BoardState._value2member_map_
        }
        overrides = {"heartbeat_s": self.settings.heartbeat_seconds, **self.settings.liveness}
        self.tracker = LivenessTracker(LivenessSettings(**overrides), initial=known)
        for e in await self._all_events("loss"):
            d = e.detail
            self._reported_holes.add(
                (e.board or "", d.get("epoch", ""), d.get("first_seq", -1), d.get("last_seq", -1))
            )
        self._seeded = True

    async def _all_events(self, kind: str) -> list[Event]:
        out, cursor = [], 0
        while True:
            page = await self.store.events(since_id=cursor, limit=1000)
            out += [e for e in page if e.kind == kind]
            if len(page) < 1000:
                return out
            cursor = max(e.id or 0 for e in page)

    async def _follow_states(self) -> None:
        while True:
            page = await self.store.events(since_id=self._state_cursor, limit=1000)
            for e in page:
                if e.kind == "state_changed" and e.board:
                    self.runtime.states[e.board] = {
                        "state": e.detail.get("new"),
                        "since": e.at,
                        "reason": e.detail.get("reason"),
                    }
            if page:
                self._state_cursor = max(e.id or 0 for e in page)
            if len(page) < 1000:
                return

    async def _liveness(self, report: RoundReport, counts: dict[str, BoardCounts]) -> None:
        from listenpost.collector.models.liveness import BoardInputs, HeartbeatSample

        now = self.clock.time()
        boards = await self.store.list_boards()
        latest = await self.store.latest_heartbeats()
        window = max(self.tracker.settings.deaf_window_s, self.tracker.settings.backlog_window_s)
        # Every board's window of heartbeats in one query, not one per board.
        recent = await self.store.recent_heartbeats(now - window - 2 * self.settings.heartbeat_seconds)
        # Readings per board a deaf-window ago, to tell whether the others heard tags meanwhile.
        self._totals.append((now, {n: c.readings_total for n, c in counts.items()}))
        while len(self._totals) > 1 and now - self._totals[1][0] >= self.tracker.settings.deaf_window_s:
            self._totals.popleft()
        then = self._totals[0][1]
        # The fleet's new readings once; a board's "others" is that minus its own (not a sum per board).
        gained = {n: c.readings_total - then.get(n, 0) for n, c in counts.items()}
        fleet_gained = sum(gained.values())
        for b in boards:
            if b.enrolled_at is None and b.retired_at is None:
                continue  # not on the network yet: nothing to judge
            c = counts.get(b.name)
            if c is not None and c.last_batch_at is not None:
                seen = self._batch_contacts.setdefault(b.name, deque(maxlen=256))
                if not seen or seen[-1] != c.last_batch_at:
                    seen.append(c.last_batch_at)
            hbs = recent.get(b.name, [])
            contacts = sorted({h.at for h in hbs} | set(self._batch_contacts.get(b.name, ())))
            hb = latest.get(b.name)
            if hb is not None and hb.at not in contacts:
                contacts = sorted([*contacts, hb.at])
            if (
                not contacts
                and b.retired_at is None
                and b.enrolled_at is not None
                and now - b.enrolled_at < self.tracker.settings.silent_after_s
            ):
                # Enrolled moments ago: its first request is on the way. A verdict of silent now would
                # be a false alarm at every fleet's start; it stays "not yet seen" until it speaks or
                # until `silent_after_s` have passed since its enrolment.
                continue
            fit = None
            if hb is not None:
                fit = (await clock_model(self.runtime.clock_models, self.store, b.name, hb.boot)).fit()
            samples = [
                HeartbeatSample(
                    h.at,
                    int(stat(h.stats, "adverts_total", "pipeline.adverts_total") or 0),
                    int(stat(h.stats, "spool_batches", "spool.batches") or 0),
                )
                for h in hbs
            ]
            others = fleet_gained - gained.get(b.name, 0)
            inputs = BoardInputs(
                board=b.name,
                contacts=contacts,
                heartbeats=samples,
                clock=fit,
                retired=b.retired_at is not None,
                others_readings=others,
            )
            change = self.tracker.update(inputs, now)
            report.evaluated.append(b.name)
            verdict = self.tracker.verdict(b.name)
            prev = self.runtime.states.get(b.name, {})
            st = _value(verdict.state)
            self.runtime.states[b.name] = {
                "state": st,
                "reason": verdict.reason,
                "since": prev.get("since") if prev.get("state") == st else now,
            }
            if change is None:
                continue
            detail = {"old": _value(change.old), "new": _value(change.new), "reason": change.reason}
            key = f"state_changed/{change.board}/{detail['old']}>{detail['new']}@{change.at!r}"
            event = await self._store_event(Event(change.at, change.board, "state_changed", detail, key=key))
            if event is None:
                continue  # stored already by another writer, which also sent it
            report.changes.append(event)
            (log.warning if detail["new"] in ("silent", "deaf", "drifting") else log.info)(
                "board_state_changed",
                board=change.board,
                old=detail["old"],
                new=detail["new"],
                reason=change.reason,
            )
            self._queue_webhook(event)

    async def _losses(self, report: RoundReport) -> None:
        now = self.clock.time()
        # Only the holes not marked reported: every loss ever stays a hole, and reading them all each round
        # made the round grow with the history.
        holes = await self.store.seq_holes(unreported=True)
        current = {(h.board, h.epoch, h.first_seq, h.last_seq) for h in holes}
        tails = {(h.board, h.epoch, h.first_seq, h.last_seq) for h in holes if h.tail}
        for key in list(self._hole_first_seen):
            if key not in current:
                del self._hole_first_seen[key]  # filled in after all (a late batch, not a loss), or marked
        done: list[SeqHole] = []
        for key in sorted(current):
            # Reported already (its mark was not stored, or it was reported before the marks existed),
            # or what is left of a reported hole after a late batch split it: only the mark is missing.
            if key not in self._reported_holes and not self._inside_reported(key):
                first = self._hole_first_seen.setdefault(key, now)
                if now - first < LOSS_GRACE_SECONDS:
                    continue
                board, epoch, lo, hi = key
                detail = {"epoch": epoch, "first_seq": lo, "last_seq": hi, "batches": hi - lo + 1}
                if key in tails:
                    detail["tail"] = True  # sealed on the board, never sent before it moved to a new epoch
                event = await self._store_event(
                    Event(now, board, "loss", detail, key=f"loss/{board}/{epoch}/{lo}-{hi}")
                )
                self._reported_holes.add(key)
                if event is not None:
                    report.losses.append(event)
                    log.warning("batches_lost", board=board, **detail)
                    self._queue_webhook(event)
            if key not in tails:  # a tail is computed, not stored: nothing to mark
                done.append(SeqHole(*key))
        # Marked after their events: a round cut short leaves marks out, and the next round adds them.
        if done:
            await self.store.mark_holes_reported(done)

    async def _calibration_watch(self, report: RoundReport) -> None:
        now = self.clock.time()
        if now - self._last_watch < WATCH_EVERY_SECONDS:
            return
        self._last_watch = now
        from listenpost.collector.models.calibration import CalibrationWatch
        from listenpost.collector.models.calibration_fleet import pair_medians
        from listenpost.collector.web.plan import read_plan

        try:
            plan = await asyncio.to_thread(read_plan, self.settings.state_dir)
        except ConfigError as e:
            log.warning("calibration_watch_skipped", error=str(e))
            return
        if plan is None or not plan.reference_tags:
            return
        # The watch's memory is the store's, read every step (one row per board): a restarted collector,
        # a new leader, or this one leading again after another did, goes on from what was stored last,
        # never from a level learned now that might already carry a shift.
        watch = CalibrationWatch(saved=await self.store.watch_baselines())
        rows = await self.store.readings(now - watch.window_s, now, tags=[t.id for t in plan.reference_tags])
        raw = (rows.rssi_dd.astype(float) - rows.offset_dd.astype(float)) / 10.0
        levels = pair_medians(rows.board, rows.tag, raw)
        markers = {b.name: b.offset_db for b in await self.store.list_boards(include_retired=False)}
        for shift in watch.update(now, levels, markers):
            detail = {
                "shift_db": round(shift.shift_db, 1),
                "tags": shift.tags,
                "since": shift.since,
                "threshold_db": watch.threshold_db,
                "window_s": watch.window_s,
            }
            event = await self._store_event(
                Event(
                    now,
                    shift.board,
                    "calibration_shift",
                    detail,
                    key=f"calibration_shift/{shift.board}/{shift.since:.0f}",
                )
            )
            if event is None:
                continue
            report.shifts.append(event)
            log.warning("calibration_shift", board=shift.board, **detail)
        # Kept after the events: if this write fails, the next round (or leader) raises the same shift
        # again from the stored start of it, under the same event key, so it is stored once.
        if changed := watch.changed():
            await self.store.set_watch_baselines(changed)

    async def _store_event(self, event: Event) -> Event | None:
        """Store a leader's event, fenced by the lock; the stored event with its id, or None if its key was
        stored already. Raises `LeadershipLost` when another collector leads now."""
        id_ = await self.store.add_event(event, lead=LOCK)
        return None if id_ is None else Event(event.at, event.board, event.kind, event.detail, id_, event.key)

    def _inside_reported(self, key: tuple[str, str, int, int]) -> bool:
        board, epoch, lo, hi = key
        return any(
            b == board and e == epoch and rlo <= lo and hi <= rhi for b, e, rlo, rhi in self._reported_holes
        )

    async def _retention(self, report: RoundReport) -> None:
        now = self.clock.time()
        if not self._retention_more and now - self._last_retention < RETENTION_EVERY_SECONDS:
            return
        if not self._retention_more:
            self._last_retention = now
        s, chunk = self.settings, self.settings.retention_chunk
        # Today's and tomorrow's day partitions (PostgreSQL), made here a day ahead so ingest finds them.
        await self.store.ensure_reading_days(now, now + 86400.0)
        more = False
        if s.retention_days > 0:
            report.deleted = await self.store.delete_readings_before(
                now - s.retention_days * 86400.0, chunk=chunk, max_chunks=RETENTION_CHUNKS_PER_ROUND
            )
            more = report.deleted >= chunk * RETENTION_CHUNKS_PER_ROUND
        cuts = history_cuts(s, now, readings_backlog=more)
        if any(c is not None for c in cuts.values()):
            report.history_deleted = await self.store.delete_history_before(
                **cuts, chunk=chunk, max_chunks=RETENTION_CHUNKS_PER_ROUND
            )
            more = more or any(
                n >= chunk * RETENTION_CHUNKS_PER_ROUND for n in report.history_deleted.values()
            )
        self._retention_more = more

    # ------------------------------------------------------------ webhook

    def _queue_webhook(self, event: Event) -> None:
        if not self.settings.webhook.url:
            return
        try:
            self._webhook_queue.put_nowait(event)
        except asyncio.QueueFull:
            self.webhook_failed += 1
            log.warning("webhook_dropped", kind=event.kind, board=event.board, reason="queue_full")

    async def _webhook_loop(self) -> None:
        import aiohttp

        wh = self.settings.webhook
        # The deadline that counts runs on the injected clock (`_post_once`); aiohttp's own total
        # timeout is only a backstop in real time, should that clock stop moving.
        timeout = aiohttp.ClientTimeout(total=2 * wh.timeout_seconds + 5.0)
        async with aiohttp.ClientSession(timeout=timeout) as session:
            while True:
                event = await self._webhook_queue.get()
                await self.post_event(session, event)

    async def _post_once(self, session: Any, body: dict[str, Any], headers: dict[str, str]) -> int:
        """One POST; its status, or `TimeoutError` once ``timeout_seconds`` of clock time have passed."""
        wh = self.settings.webhook

        async def post() -> int:
            async with session.post(wh.url, json=body, headers=headers) as resp:
                await resp.read()
                return int(resp.status)

        return await with_timeout(self.clock, post(), wh.timeout_seconds, "webhook POST")

    async def post_event(self, session: Any, event: Event) -> bool:
        """
        POST one event with bounded retries and doubling backoff on the injected clock.

        Returns:
            True once a 2xx came back; False when the attempts ran out or the receiver refused the
            body with a 4xx other than 429 (logged as ``webhook_failed``).
        """
        import aiohttp

        wh = self.settings.webhook
        assert wh.url is not None
        body = {
            "id": event.id,
            "at": event.at,
            "board": event.board,
            "kind": event.kind,
            "detail": event.detail,
        }
        headers = {"Idempotency-Key": f"listenpost-event-{event.id}"}
        delay = wh.backoff_seconds
        error = "not sent"
        attempt = 0
        for attempt in range(1, wh.attempts + 1):
            try:
                status = await self._post_once(session, body, headers)
                if 200 <= status < 300:
                    self.webhook_sent += 1
                    log.info(
                        "webhook_sent",
                        kind=event.kind,
                        board=event.board,
                        event_id=event.id,
                        attempts=attempt,
                    )
                    return True
                error = f"HTTP {status}"
                if 400 <= status < 500 and status != 429:
                    break  # the receiver will never accept this body
            except (aiohttp.ClientError, OSError, TimeoutError) as e:
                error = f"{type(e).__name__}: {e}"
            if attempt < wh.attempts:
                log.info(
                    "webhook_retry",
                    attempt=attempt,
                    error=error,
                    kind=event.kind,
                    board=event.board,
                    retry_in_s=delay,
                )
                await self.clock.sleep(delay)
                delay *= 2
        self.webhook_failed += 1
        log.warning(
            "webhook_failed",
            error=error,
            kind=event.kind,
            board=event.board,
            event_id=event.id,
            attempts=attempt,
        )
        return False


def history_cuts(
    settings: CollectorSettings, now: float, *, readings_backlog: bool
) -> dict[str, float | None]:
    """
    The `Store.delete_history_before` cuts the retention settings give at ``now`` (``None``: keep).

    Batch keys go only a day past their readings' cut, and not while old readings are still being
    deleted: the export joins a reading to its batch, and telemetry rows point at theirs.
    """

    def cut(days: float) -> float | None:
        return now - days * 86400.0 if days > 0 else None

    batches = cut(settings.retention_batch_key_days)
    if batches is not None:
        if settings.retention_days <= 0 or readings_backlog:
            batches = None
        else:
            batches = min(batches, now - (settings.retention_days + 1.0) * 86400.0)
    return {
        "heartbeats": cut(settings.retention_heartbeat_days),
        "clock_samples": cut(settings.retention_clock_sample_days),
        "batches": batches,
    }


def _value(state: Any) -> Any:
    return getattr(state, "value", state)


MONITOR = web.AppKey("monitor", Monitor)
