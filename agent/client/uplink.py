"""
The uplink: sealed batches from the spool to the collector, oldest first, one in flight.

Each attempt is one ``POST /v1/batches`` with a gzip'd JSON body (``agent/wire.py``) and an explicit
`aiohttp.ClientTimeout`. How the answer is handled (docs/reliability.md §2, DEVELOPERS.md):

=================================  =========================================================
200 ``stored`` / ``duplicate``     ack the batch in the spool
network error, timeout, 5xx, 429   keep the batch; retry after capped exponential backoff with
                                   full jitter, at least ``Retry-After`` — for as long as the
                                   spool has room (its byte bound is what ends a long outage)
400, 413                           move the batch to the dead-letter table, go on with the next
401, 403                           stop sending, keep spooling; try again every
                                   ``backoff_max`` to notice a re-issued credential
409                                alarm, start a new spool epoch
=================================  =========================================================

Every exchange also measures the four NTP-style timestamps (RFC 5905): t1/t4 on the board's
monotonic clock, t2/t3 from the collector's answer; the previous exchange travels with the next
request so the collector can model this board's clock.
"""

from __future__ import annotations

import asyncio
import email.utils
import enum
import gzip
import inspect
import json
import math
import random
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, Protocol

import aiohttp
import structlog

from listenpost.agent.client.net import client_session, request_timeout
from listenpost.core import wire
from listenpost.core.backoff import full_jitter
from listenpost.core.clock import Clock
from listenpost.core.timesync import Exchange

log = structlog.get_logger("listenpost.agent.client.uplink")

#: Longest ``Retry-After`` honoured, seconds: a broken proxy must not park a board for days.
MAX_RETRY_AFTER_S = 3600.0


class SealedBatchLike(Protocol):
    """What the uplink reads from a sealed batch (``listenpost.agent.spool.SealedBatch``)."""

    epoch: str
    seq: int
    digest: str
    content: bytes
    """The canonical content bytes the digest covers."""
    n_readings: int


class SpoolLike(Protocol):
    """The part of ``listenpost.agent.spool.Spool`` the uplink uses. Methods may be plain or ``async``."""

    def peek_oldest(self) -> Any: ...
    def ack(self, epoch: str, seq: int) -> Any: ...
    def dead_letter(self, epoch: str, seq: int, status: int, reason: str) -> Any: ...
    def new_epoch(self, reason: str) -> Any: ...


async def _call(value: Any) -> Any:
    """Await the result of a spool method if it is awaitable (the spool may run SQLite in a thread)."""
    return await value if inspect.isawaitable(value) else value


class UplinkState(enum.Enum):
    """What the uplink is doing now (reported in heartbeats and the service status line)."""

    IDLE = "idle"
    """Nothing to send: the spool is drained."""
    SENDING = "sending"
    """A request is in flight."""
    BACKOFF = "backoff"
    """The last attempt failed in a retryable way; waiting before the next."""
    UNAUTHORIZED = "unauthorized"
    """The collector refused the credential (401/403); spooling continues, sends are rare probes."""
    STOPPED = "stopped"
    """The loop has ended."""


class Outcome(enum.Enum):
    """How one attempt ended."""

    ACKED = "acked"
    RETRY = "retry"
    DEAD_LETTER = "dead_letter"
    UNAUTHORIZED = "unauthorized"
    CONFLICT = "conflict"


class ExchangeLog:
    """
    The last finished exchange, shared by the uplink and the heartbeat of one board.

    It stays pending until a request that carried it got a 2xx answer, so an exchange is not lost
    when the request carrying it fails.
    """

    __slots__ = ("_last", "_carried", "count", "contacts", "_contact")

    def __init__(self) -> None:
        self._last: Exchange | None = None
        self._carried: Exchange | None = None
        self.count = 0
        self.contacts = 0
        """2xx answers from the collector so far, to any request (heartbeat or batch)."""
        self._contact: asyncio.Event | None = None

    def note_contact(self) -> None:
        """The collector answered 2xx: it is reachable (wakes an uplink waiting out a network failure)."""
        self.contacts += 1
        if self._contact is not None:
            self._contact.set()
            self._contact = None

    async def wait_contact(self, since: int) -> None:
        """Return once a 2xx answer came after ``since`` (a value of `contacts`)."""
        while self.contacts == since:
            if self._contact is None:
                self._contact = asyncio.Event()
            await self._contact.wait()

    def record(self, t1: float, t4: float, answer: Mapping[str, Any]) -> Exchange | None:
        """Note an exchange from an answer carrying ``t2``/``t3``; ignored if they are missing or odd."""
        t2, t3 = answer.get("t2"), answer.get("t3")
        if not all(
            isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v) for v in (t2, t3)
        ):
            return None
        ex = Exchange(t1, float(t2), float(t3), t4)  # type: ignore[arg-type]
        self._last = ex
        self.count += 1
        return ex

    def take(self) -> dict[str, float] | None:
        """The exchange to carry on the next request (``None`` if there is none yet)."""
        self._carried = self._last
        return self._last.as_dict() if self._last is not None else None

    def delivered(self) -> None:
        """The request that carried the pending exchange was answered 2xx: don't send it again."""
        if self._carried is not None and self._carried is self._last:
            self._last = None
        self._carried = None

    @property
    def last(self) -> Exchange | None:
        return self._last


def parse_retry_after(value: str | None, now_wall: float) -> float | None:
    """
    ``Retry-After`` in seconds from now (RFC 9110 §10.2.3: delay-seconds or an HTTP-date).

    Returns ``None`` when absent or unreadable; negative results become 0.
    """
    if not value:
        return None
    value = value.strip()
    if value.isdigit():
        return min(float(value), MAX_RETRY_AFTER_S)
    try:
        when = email.utils.parsedate_to_datetime(value)
    except (TypeError, ValueError, IndexError):
        return None
    if when is None:
        return None
    return min(max(0.0, when.timestamp() - now_wall), MAX_RETRY_AFTER_S)


@dataclass(slots=True)
class UplinkCounters:
    """Running totals since the agent started (mutable on purpose: the uplink updates them in place)."""

    sent: int = 0
    """Requests sent (every attempt)."""
    acked: int = 0
    """Batches the collector confirmed (stored + duplicates)."""
    stored: int = 0
    duplicates: int = 0
    """Answers "duplicate": the collector had this batch already (an earlier answer was lost)."""
    retries: int = 0
    """Attempts that failed in a retryable way."""
    dead_letters: int = 0
    conflicts: int = 0
    unauthorized: int = 0
    readings_acked: int = 0
    bytes_sent: int = 0
    """Compressed request bytes."""
    last_error: str | None = None
    last_status: int | None = None
    last_ack_mono: float | None = None
    """Board monotonic seconds of the last ack."""


class Uplink:
    """
    Send the spool's sealed batches to ``POST {base_url}/v1/batches``, one at a time.

    Args:
        base_url: collector base URL, e.g. ``http://10.0.0.2:8470``.
        token: the board's bearer token.
        board: board name.
        clock: injected clock; t1/t4 and every backoff wait use it.
        spool: the on-board spool (`SpoolLike`).
        session: a shared `aiohttp.ClientSession`; if ``None`` the uplink opens (and closes) its own.
        timeout_s: total timeout of each request, seconds.
        backoff_initial_s, backoff_max_s: first backoff ceiling and its cap, seconds.
        idle_poll_s: how often an empty spool is looked at again, seconds.
        rng: random source for jitter (seed it in tests).
        exchanges: shared clock-exchange log (the heartbeat uses the same one).
    """

    def __init__(
        self,
        *,
        base_url: str,
        token: str,
        board: str,
        clock: Clock,
        spool: SpoolLike,
        session: aiohttp.ClientSession | None = None,
        timeout_s: float = 10.0,
        backoff_initial_s: float = 1.0,
        backoff_max_s: float = 60.0,
        idle_poll_s: float = 1.0,
        rng: random.Random | None = None,
        exchanges: ExchangeLog | None = None,
    ) -> None:
        if timeout_s <= 0 or backoff_initial_s <= 0 or backoff_max_s < backoff_initial_s or idle_poll_s <= 0:
            raise ValueError(
                "uplink: timeouts and backoff must be > 0 and backoff_max_s >= backoff_initial_s"
            )
        self.url = base_url.rstrip("/") + "/v1/batches"
        self.token = token
        self.board = board
        self.clock = clock
        self.spool = spool
        self._session = session
        self._own_session = session is None
        self.timeout = request_timeout(timeout_s)
        self.backoff_initial_s = backoff_initial_s
        self.backoff_max_s = backoff_max_s
        self.idle_poll_s = idle_poll_s
        self.rng = rng or random.Random()
        self.exchanges = exchanges or ExchangeLog()
        self.counters = UplinkCounters()
        self.state = UplinkState.IDLE
        self._attempt = 0
        self._retry_after: float | None = None
        self.parked_until: float | None = None
        """Board monotonic time the current wait ends (while parked on the clock)."""
        self._parked = asyncio.Event()
        self._contacts_at_send = 0

    # ------------------------------------------------------------------ session

    def _get_session(self) -> aiohttp.ClientSession:
        if self._session is None or self._session.closed:
            self._session = client_session()
            self._own_session = True
        return self._session

    async def close(self) -> None:
        """Close the session if the uplink opened it."""
        if self._own_session and self._session is not None and not self._session.closed:
            await self._session.close()

    # ------------------------------------------------------------------ one attempt

    def body(self, batch: SealedBatchLike, t1: float, clock_prev: dict[str, float] | None) -> bytes:
        """The request body of one attempt (docs/wire-protocol.md §6): the spooled content bytes as they are."""
        return wire.encode_batch(
            board=self.board,
            boot=self.clock.boot_id,
            epoch=batch.epoch,
            seq=batch.seq,
            digest=batch.digest,
            t1=t1,
            clock=clock_prev,
            content=batch.content,
        )

    async def send(self, batch: SealedBatchLike) -> tuple[Outcome, float | None]:
        """
        Send one batch once and classify the answer. Never raises for network trouble.

        Returns:
            the outcome and, for retryable failures, the collector's ``Retry-After`` in seconds.
        """
        clock_prev = self.exchanges.take()
        t1 = self.clock.monotonic()
        payload = gzip.compress(self.body(batch, t1, clock_prev), compresslevel=6)
        headers = {
            "Authorization": f"Bearer {self.token}",
            "Content-Type": "application/json",
            "Content-Encoding": "gzip",
        }
        self.counters.sent += 1
        self.counters.bytes_sent += len(payload)
        self.state = UplinkState.SENDING
        self._contacts_at_send = self.exchanges.contacts
        try:
            async with self._get_session().post(
                self.url, data=payload, headers=headers, timeout=self.timeout
            ) as resp:
                status = resp.status
                retry_after = parse_retry_after(resp.headers.get("Retry-After"), self.clock.time())
                text = await resp.text()
        except (TimeoutError, aiohttp.ClientError, OSError) as e:
            self.counters.retries += 1
            self.counters.last_error = f"{type(e).__name__}: {e}"[:200]
            self.counters.last_status = None
            log.warning("batch_send_failed", epoch=batch.epoch, seq=batch.seq, error=self.counters.last_error)
            return Outcome.RETRY, None
        t4 = self.clock.monotonic()
        self.counters.last_status = status
        answer = _json_object(text)
        if 200 <= status < 300:
            self.exchanges.record(t1, t4, answer)
            self.exchanges.delivered()
            self.exchanges.note_contact()
            verdict = answer.get("status")
            if verdict not in ("stored", "duplicate"):
                # A 200 we cannot read proves nothing; resending is safe (the collector dedups).
                self.counters.retries += 1
                self.counters.last_error = f"200 without a stored/duplicate status: {text[:120]!r}"
                log.warning("batch_answer_unreadable", epoch=batch.epoch, seq=batch.seq, body=text[:120])
                return Outcome.RETRY, None
            return self._acked(batch, verdict), None
        error = _error_text(answer, text)
        self.counters.last_error = f"{status}: {error}"[:200]
        if status in (400, 413):
            return Outcome.DEAD_LETTER, None
        if status in (401, 403):
            return Outcome.UNAUTHORIZED, None
        if status == 409:
            return Outcome.CONFLICT, None
        if status == 429 or status >= 500:
            self.counters.retries += 1
            log.warning(
                "batch_send_refused",
                epoch=batch.epoch,
                seq=batch.seq,
                status=status,
                retry_after=retry_after,
                error=error,
            )
            return Outcome.RETRY, retry_after
        # Anything else (404 from a proxy, 3xx, 405 ...) is a deployment fault, not this batch's:
        # keep the batch and retry rather than throwing readings away.
        self.counters.retries += 1
        log.warning("batch_unexpected_status", epoch=batch.epoch, seq=batch.seq, status=status, error=error)
        return Outcome.RETRY, retry_after

    def _acked(self, batch: SealedBatchLike, verdict: str) -> Outcome:
        self.counters.acked += 1
        self.counters.readings_acked += batch.n_readings
        self.counters.last_ack_mono = self.clock.monotonic()
        self.counters.last_error = None
        if verdict == "duplicate":
            self.counters.duplicates += 1
        else:
            self.counters.stored += 1
        log.debug("batch_acked", epoch=batch.epoch, seq=batch.seq, status=verdict, readings=batch.n_readings)
        return Outcome.ACKED

    # ------------------------------------------------------------------ the loop

    async def step(self) -> Outcome | None:
        """
        Send the oldest sealed batch once and act on the answer; ``None`` if the spool is empty.

        Returns:
            the outcome; the caller decides how long to wait after a retryable one (`run` does).
        """
        batch = await _call(self.spool.peek_oldest())
        if batch is None:
            if self.state is not UplinkState.UNAUTHORIZED:
                self.state = UplinkState.IDLE
            return None
        outcome, retry_after = await self.send(batch)
        self._retry_after = retry_after
        if outcome is Outcome.ACKED:
            await _call(self.spool.ack(batch.epoch, batch.seq))
            self._attempt = 0
            self.state = UplinkState.IDLE
        elif outcome is Outcome.DEAD_LETTER:
            self.counters.dead_letters += 1
            reason = self.counters.last_error or "rejected"
            log.error(
                "batch_dead_lettered",
                epoch=batch.epoch,
                seq=batch.seq,
                status=self.counters.last_status,
                reason=reason,
            )
            await _call(
                self.spool.dead_letter(batch.epoch, batch.seq, self.counters.last_status or 400, reason)
            )
            self._attempt = 0
            self.state = UplinkState.IDLE
        elif outcome is Outcome.UNAUTHORIZED:
            self.counters.unauthorized += 1
            if self.state is not UplinkState.UNAUTHORIZED:
                log.error(
                    "uplink_unauthorized", status=self.counters.last_status, error=self.counters.last_error
                )
            self.state = UplinkState.UNAUTHORIZED
        elif outcome is Outcome.CONFLICT:
            await self._conflict(batch)
        else:
            self.state = UplinkState.BACKOFF
        return outcome

    async def _conflict(self, batch: SealedBatchLike) -> None:
        self.counters.conflicts += 1
        log.error(
            "digest_conflict",
            epoch=batch.epoch,
            seq=batch.seq,
            digest=batch.digest,
            error=self.counters.last_error,
        )
        stats = getattr(self.spool, "stats", None)
        current = getattr(stats(), "epoch", None) if callable(stats) else None
        if current is None or current == batch.epoch:
            # Only a conflict in the epoch still being written means new seals would collide too;
            # older epochs were already left behind.
            new = await _call(self.spool.new_epoch("digest_conflict"))
            log.warning("spool_epoch_started", epoch=new, reason="digest_conflict")
        head = await _call(self.spool.peek_oldest())
        if head is not None and (head.epoch, head.seq) == (batch.epoch, batch.seq):
            # The spool kept this batch under its old key; sending it again would conflict forever.
            # Setting it aside keeps it on the board (dead-letter table) and unblocks the rest.
            self.counters.dead_letters += 1
            await _call(self.spool.dead_letter(batch.epoch, batch.seq, 409, "digest_conflict"))
        self._attempt = 0
        self.state = UplinkState.IDLE

    def next_delay(self, outcome: Outcome | None) -> float:
        """How long `run` waits after ``outcome``, seconds (0 means go on at once)."""
        if outcome is None:
            return self.idle_poll_s
        if outcome is Outcome.UNAUTHORIZED:
            return self.backoff_max_s
        if outcome is Outcome.RETRY:
            delay = full_jitter(self._attempt, self.backoff_initial_s, self.backoff_max_s, self.rng)
            self._attempt += 1
            if self._retry_after is not None:
                delay = max(delay, self._retry_after)
            return delay
        return 0.0

    def _wakes_on_contact(self, outcome: Outcome | None) -> bool:
        """
        Whether a 2xx from the collector (a heartbeat) ends the wait after ``outcome`` early: after a
        failure that got no HTTP answer (the collector was unreachable), or a 401/403 (a heartbeat 2xx
        proves the credential works). Never against ``Retry-After`` or a 5xx: the collector is up and
        asked for the pause.
        """
        if outcome is Outcome.UNAUTHORIZED:
            return True
        return outcome is Outcome.RETRY and self.counters.last_status is None and self._retry_after is None

    async def _wait(self, seconds: float, *, wake_on_contact: bool = False) -> None:
        self.parked_until = self.clock.monotonic() + seconds
        self._parked.set()
        try:
            if not wake_on_contact:
                await self.clock.sleep(seconds)
                return
            since = self._contacts_at_send
            sleep = asyncio.ensure_future(self.clock.sleep(seconds))
            contact = asyncio.ensure_future(self.exchanges.wait_contact(since))
            try:
                await asyncio.wait({sleep, contact}, return_when=asyncio.FIRST_COMPLETED)
            finally:
                sleep.cancel()
                contact.cancel()
            if contact.done() and not contact.cancelled():
                # A 2xx (a heartbeat) came after our failed attempt: the collector is back. Start the
                # backoff over and send now rather than a capped, jittered wait later.
                log.info(
                    "uplink_collector_reachable",
                    waited_s=round(self.clock.monotonic() - (self.parked_until - seconds), 3),
                )
                self._attempt = 0
        finally:
            self._parked.clear()

    async def wait_parked(self) -> None:
        """Return once the loop is waiting on the clock (tests use it to step virtual time)."""
        await self._parked.wait()

    async def run(self, *, until_empty: bool = False) -> None:
        """
        Send until cancelled (or, with ``until_empty``, until the spool has nothing left to send).

        A retryable failure repeats the same batch after `next_delay`; there is no attempt limit
        because the spool's byte bound decides what is kept during a long outage.
        """
        try:
            while True:
                outcome = await self.step()
                if outcome is None and until_empty:
                    return
                delay = self.next_delay(outcome)
                if delay > 0:
                    await self._wait(delay, wake_on_contact=self._wakes_on_contact(outcome))
                else:
                    await asyncio.sleep(0)  # let the scanner and sealer run between batches
        finally:
            self.state = UplinkState.STOPPED

    def stats(self) -> dict[str, Any]:
        """Counters and state for the heartbeat."""
        c = self.counters
        return {
            "state": self.state.value,
            "sent": c.sent,
            "acked": c.acked,
            "stored": c.stored,
            "duplicates": c.duplicates,
            "retries": c.retries,
            "dead_letters": c.dead_letters,
            "conflicts": c.conflicts,
            "unauthorized": c.unauthorized,
            "readings_acked": c.readings_acked,
            "bytes_sent": c.bytes_sent,
            "last_error": c.last_error,
            "last_status": c.last_status,
        }


def _json_object(text: str) -> dict[str, Any]:
    try:
        value = json.loads(text) if text else {}
    except ValueError:
        return {}
    return value if isinstance(value, dict) else {}


def _error_text(answer: Mapping[str, Any], text: str) -> str:
    err = answer.get("error")
    if isinstance(err, Mapping):
        parts = [str(err.get(k)) for k in ("code", "field", "message") if err.get(k)]
        if parts:
            return " ".join(parts)[:200]
    return text[:200] or "no body"
