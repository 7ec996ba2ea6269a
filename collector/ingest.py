"""
A validated batch (``listenpost.core.wire.parse_batch``) → an `IngestBatch` with corrected collector times.

Board monotonic times become collector times through the board's clock model for the content's boot
(collector/models/clock.py);
until that model has a fit, the send time of this very request stands in: collector ≈ board + (t2 − t1),
wrong by the one-way delay (milliseconds on a venue LAN) — good enough for the first minute of a boot.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from listenpost.collector.models.clock import ClockModel
from listenpost.collector.store import ClockSample, IngestBatch, Store
from listenpost.core.wire import BatchEnvelope, WireError


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


async def record_exchange(
    models: dict[tuple[str, str], Any],
    store: Store,
    board: str,
    boot: str,
    exchange: tuple[float, float, float, float],
) -> Any:
    """Store one four-timestamp exchange and feed it to the model; returns the `ClockStep` it confirmed, if any."""
    model = await clock_model(models, store, board, boot)
    try:
        step = model.add(*exchange)
    except ValueError as e:
        raise WireError("clock", str(e)) from e
    await store.add_clock_sample(ClockSample(board, boot, *exchange))
    return step


def collector_times(env: BatchEnvelope, model: Any, *, t2: float) -> np.ndarray:
    """Corrected collector Unix seconds for every reading of ``env`` (model of ``env.content.boot``)."""
    t_ms = np.asarray(env.content.t_ms, dtype=np.int64)
    if model is not None and model.fit() is not None:
        return np.asarray(model.to_collector_time(t_ms), dtype=np.float64)
    if env.content.boot == env.boot:
        return t_ms / 1000.0 + (t2 - env.t1)
    # Sealed in an earlier boot with no samples for it: the arrival time is the best we know.
    return np.full(len(t_ms), t2, dtype=np.float64)


def to_ingest_batch(env: BatchEnvelope, *, received_at: float, model: Any) -> IngestBatch:
    """Everything the store needs to keep this batch in one transaction."""
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
    )
