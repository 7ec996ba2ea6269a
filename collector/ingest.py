"""
A batch request body → a validated `IngestBatch` with corrected collector times.

The content is validated by ``agent.wire.decode_content`` and its digest recomputed with
``agent.wire.digest`` (one definition of the format, shared with the agent). Board monotonic times
become collector times through the board's clock model for the content's boot (collector/clock.py);
until that model has a fit, the send time of this very request stands in: collector ≈ board + (t2 − t1),
wrong by the one-way delay (milliseconds on a venue LAN) — good enough for the first minute of a boot.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Any

import numpy as np

from agent import wire
from agent.wire import DecodedContent, WireError
from collector.store import ClockSample, IngestBatch, Store

_EPOCH = re.compile(r"^[0-9a-f]{8,32}$")
_DIGEST = re.compile(r"^[0-9a-f]{64}$")


@dataclass(frozen=True, slots=True)
class BatchEnvelope:
    """The outer fields of ``POST /v1/batches`` plus the validated content."""

    board: str
    boot: str
    """The board's boot at send time (content.boot is the boot at seal time; they differ after a reboot)."""
    epoch: str
    seq: int
    digest: str
    t1: float
    """Board monotonic seconds at send, in ``boot``."""
    clock: tuple[float, float, float, float] | None
    """The previous exchange's t1..t4, or ``None`` on the first request of a boot."""
    content: DecodedContent


def _number(obj: dict[str, Any], key: str, field: str) -> float:
    v = obj.get(key)
    if not isinstance(v, int | float) or isinstance(v, bool) or not math.isfinite(v):
        raise WireError(field, f"must be a finite number, got {v!r}")
    return float(v)


def parse_clock(obj: Any, field: str = "clock") -> tuple[float, float, float, float] | None:
    """Validate a ``{"t1".."t4"}`` exchange (or null): board send ≤ board receive, collector receive ≤ reply."""
    if obj is None:
        return None
    if not isinstance(obj, dict):
        raise WireError(field, "must be an object with t1..t4, or null")
    t1, t2, t3, t4 = (_number(obj, k, f"{field}.{k}") for k in ("t1", "t2", "t3", "t4"))
    if t4 < t1:
        raise WireError(f"{field}.t4", "must be >= t1 (board receive after board send)")
    if t3 < t2:
        raise WireError(f"{field}.t3", "must be >= t2 (collector reply after collector receive)")
    return t1, t2, t3, t4


def parse_batch(body: Any, *, max_readings: int) -> BatchEnvelope:
    """Validate a batch body; raises `WireError` whose ``field`` names the first bad field."""
    if not isinstance(body, dict):
        raise WireError("body", "must be a JSON object")
    if body.get("v") != wire.VERSION:
        raise WireError("v", f"must be {wire.VERSION}, got {body.get('v')!r}")
    board = body.get("board")
    if not isinstance(board, str) or not board:
        raise WireError("board", "must be the board name")
    boot = body.get("boot")
    if not isinstance(boot, str) or not 1 <= len(boot) <= 64:
        raise WireError("boot", "must be a string of 1-64 characters")
    epoch = body.get("epoch")
    if not isinstance(epoch, str) or not _EPOCH.match(epoch):
        raise WireError("epoch", f"must be 8-32 lower-case hex characters, got {epoch!r}")
    seq = body.get("seq")
    if not isinstance(seq, int) or isinstance(seq, bool) or not 0 <= seq < 2**62:
        raise WireError("seq", f"must be a non-negative integer, got {seq!r}")
    dig = body.get("digest")
    if not isinstance(dig, str) or not _DIGEST.match(dig):
        raise WireError("digest", "must be 64 lower-case hex characters (sha256)")
    t1 = _number(body, "t1", "t1")
    clock = parse_clock(body.get("clock"))
    raw = body.get("content")
    content = wire.decode_content(raw, max_readings=max_readings)
    if wire.digest(raw) != dig:
        raise WireError("digest", "does not match the content")
    return BatchEnvelope(board, boot, epoch, seq, dig, t1, clock, content)


async def clock_model(models: dict[tuple[str, str], Any], store: Store, board: str, boot: str) -> Any:
    """The (board, boot) clock model, rebuilt from stored samples the first time this process needs it."""
    key = (board, boot)
    model = models.get(key)
    if model is None:
        from collector.clock import ClockModel
        model = ClockModel()
        for s in await store.clock_samples(board, boot):
            model.add(s.t1, s.t2, s.t3, s.t4)
        models[key] = model
    return model


async def record_exchange(models: dict[tuple[str, str], Any], store: Store, board: str, boot: str,
                          exchange: tuple[float, float, float, float]) -> Any:
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
        board=env.board, boot=c.boot, epoch=env.epoch, seq=env.seq, digest=env.digest,
        received_at=received_at, offset_db=offset_db,
        tags=np.array(c.tags, dtype=object),
        t_board_ms=np.asarray(c.t_ms, dtype=np.int64),
        t_collector=collector_times(env, model, t2=received_at),
        rssi_dd=np.asarray(c.rssi_dd, dtype=np.int32),
        telemetry=tuple(c.telemetry),
        gap=dict(c.gap) if c.gap is not None else None,
    )
