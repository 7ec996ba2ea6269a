"""
A validated batch (``listenpost.core.wire.parse_batch``) → an `IngestBatch` with corrected collector times.

Board monotonic times become collector times through the board's clock model for the content's boot
(collector/models/clock.py);
until that model has a fit, the send time of this very request stands in: collector ≈ board + (t2 − t1),
wrong by the one-way delay (milliseconds on a venue LAN) — good enough for the first minute of a boot.

What a board says about time is checked against the collector's own clock (docs/wire-protocol.md
§9.1): corrected reading times must fall in a `TimeWindow` around it, and a clock exchange must be
plausible before it becomes a sample. Readings of identities outside the tag registry are dropped here,
before the store sees them (`drop_unregistered`).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Any

import numpy as np
import structlog

from listenpost.collector.models.clock import ClockModel
from listenpost.collector.store import ClockSample, IngestBatch, Store
from listenpost.core.wire import BatchEnvelope, WireError

log = structlog.get_logger("listenpost.collector.ingest")


@dataclass(frozen=True, slots=True)
class TimeWindow:
    """How far from the collector's clock a board may place anything (``limits`` in collector.yaml)."""

    max_age_s: float
    """Readings (and exchange stamps) older than this before the collector's clock are refused."""
    max_ahead_s: float
    """...and those more than this ahead of it."""


async def clock_model(models: dict[tuple[str, str], Any], store: Store, board: str, boot: str) -> Any:
    """The (board, boot) clock model, rebuilt from stored samples the first time this process needs it."""
    key = (board, boot)
    model = models.get(key)
    if model is None:
        model = ClockModel()
        for s in await store.clock_samples(board, boot):
            model.add(s.t1, s.t2, s.t3, s.t4)
        models[key] = model
    return model


def exchange_refusal(
    model: ClockModel,
    exchange: tuple[float, float, float, float],
    *,
    now: float,
    window: TimeWindow,
    send_t1: float | None,
) -> str | None:
    """
    Why an exchange is implausible, or None.

    ``t2``/``t3`` are this collector's stamps from an earlier answer, so they cannot be ahead of its clock
    ``now`` nor older than the window. Without a fitted line yet, the exchange's offset must agree with
    this very request's (``now − send_t1``, wrong by the one-way delay) within the model's step bound.
    """
    t1, t2, t3, t4 = exchange
    if max(t2, t3) > now + window.max_ahead_s:
        return f"collector stamps t2/t3 are {max(t2, t3) - now:.0f} s ahead of the collector's clock"
    if t2 < now - window.max_age_s:
        return f"collector stamp t2 is {now - t2:.0f} s old, older than the window"
    reason: str | None = model.implausible(t1, t2, t3, t4)
    if reason is None and model.fit() is None and send_t1 is not None:
        miss = ((t2 - t1) + (t3 - t4)) / 2 - (now - send_t1)
        if abs(miss) > model.settings.max_step_s:
            reason = f"offset is {miss:+.3f} s off this request's own send time"
    return reason


async def accept_exchange(
    models: dict[tuple[str, str], Any],
    store: Store,
    board: str,
    boot: str,
    exchange: tuple[float, float, float, float],
    *,
    now: float,
    window: TimeWindow,
    send_t1: float | None = None,
) -> tuple[ClockSample | None, Any]:
    """
    Check one four-timestamp exchange and feed it to the model, without storing it.

    Returns:
        The sample to store (`Store.add_clock_sample`, or with its batch as `IngestBatch.clock`; None for
        an implausible exchange, which is dropped and counted on the
        model: the request carrying it is still answered, since the exchange belongs to an earlier one)
        and the `ClockStep` it confirmed, if any.
    """
    model = await clock_model(models, store, board, boot)
    reason = exchange_refusal(model, exchange, now=now, window=window, send_t1=send_t1)
    if reason is not None:
        model.refuse()
        log.warning("clock_exchange_refused", board=board, boot=boot, reason=reason, refused=model.n_refused)
        return None, None
    try:
        step = model.add(*exchange)
    except ValueError as e:
        raise WireError("clock", str(e)) from e
    return ClockSample(board, boot, *exchange), step


def collector_times(env: BatchEnvelope, model: Any, *, t2: float) -> np.ndarray:
    """Corrected collector Unix seconds for every reading of ``env`` (model of ``env.content.boot``)."""
    t_ms = np.asarray(env.content.t_ms, dtype=np.int64)
    if model is not None and model.fit() is not None:
        return np.asarray(model.to_collector_time(t_ms), dtype=np.float64)
    if env.content.boot == env.boot:
        return t_ms / 1000.0 + (t2 - env.t1)
    # Sealed in an earlier boot with no samples for it: the arrival time is the best we know.
    return np.full(len(t_ms), t2, dtype=np.float64)


def check_times(t_collector: np.ndarray, *, now: float, window: TimeWindow) -> None:
    """
    Every corrected reading time within ``window`` of the collector's clock ``now``.

    Raises:
        WireError: naming the reading's time field (``content.readings.t0_ms`` or ``dt_ms[i]``).
    """
    if not len(t_collector):
        return
    for i in (int(np.argmin(t_collector)), int(np.argmax(t_collector))):
        t = float(t_collector[i])
        field = "content.readings.t0_ms" if i == 0 else f"content.readings.dt_ms[{i}]"
        if t < now - window.max_age_s:
            raise WireError(
                field,
                f"reading {i} maps to {now - t:.0f} s before the collector's clock "
                f"(at most {window.max_age_s:.0f} s, limits.max_reading_age_hours)",
            )
        if t > now + window.max_ahead_s:
            raise WireError(
                field,
                f"reading {i} maps to {t - now:.0f} s ahead of the collector's clock "
                f"(at most {window.max_ahead_s:.0f} s, limits.max_reading_ahead_seconds)",
            )


def drop_unregistered(batch: IngestBatch, registered: frozenset[str]) -> tuple[IngestBatch, int, int]:
    """
    Keep only readings (and telemetry) of registered tags.

    An empty registry keeps everything (a lab or bench collector; docs/design.md §4).

    Returns:
        The batch to store, how many readings were dropped, and of how many distinct identities.
    """
    if not registered or not batch.n:
        return batch, 0, 0
    names = batch.tags.tolist()
    unknown = set(names) - registered
    if not unknown:
        return batch, 0, 0
    keep = np.fromiter((t not in unknown for t in names), dtype=bool, count=batch.n)
    kept = dataclasses.replace(
        batch,
        tags=batch.tags[keep],
        t_board_ms=np.asarray(batch.t_board_ms)[keep],
        t_collector=np.asarray(batch.t_collector)[keep],
        rssi_dd=np.asarray(batch.rssi_dd)[keep],
        telemetry=tuple(t for t in batch.telemetry if t["tag"] not in unknown),
    )
    return kept, batch.n - kept.n, len(unknown)


def to_ingest_batch(
    env: BatchEnvelope, *, received_at: float, model: Any, clock: ClockSample | None = None
) -> IngestBatch:
    """Everything the store needs to keep this batch in one transaction (with ``clock``, the exchange the
    request carried)."""
    c = env.content
    offset_db = float(c.offset_db)
    return IngestBatch(
        board=env.board,
        boot=c.boot,
        epoch=env.epoch,
        seq=env.seq,
        digest=env.digest,
        received_at=received_at,
        offset_db=offset_db,
        tags=np.array(c.tags, dtype=object),
        t_board_ms=np.asarray(c.t_ms, dtype=np.int64),
        t_collector=collector_times(env, model, t2=received_at),
        rssi_dd=np.asarray(c.rssi_dd, dtype=np.int32),
        telemetry=tuple(c.telemetry),
        gap=dict(c.gap) if c.gap is not None else None,
        clock=clock,
    )
