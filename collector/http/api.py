"""
Board API v1 (DEVELOPERS.md "Wire protocol v1"): enroll, config, batches, heartbeat.

Every board call but enroll carries ``Authorization: Bearer <board token>``. Bodies are JSON, optionally
gzip'd; the body as sent and the body after gunzip are both bounded (413), and `read_json` inflates the
stream in bounded steps, so a gzip bomb stops at the limit instead of filling memory.
"""

from __future__ import annotations

import hashlib
import math
import zlib
from typing import Any

import structlog
from aiohttp import web

from listenpost.collector.config import Limits, rule_to_json
from listenpost.collector.http.auth import bearer_token, code_hash, hash_secret, new_token
from listenpost.collector.http.middlewares import BOARD, BYTES_SENT, T2, ApiError, bad_field
from listenpost.collector.ingest import (
    TimeWindow,
    accept_exchange,
    check_times,
    clock_model,
    drop_unregistered,
    to_ingest_batch,
)
from listenpost.collector.models.clock import wall_error_s
from listenpost.collector.state import CLOCK, RUNTIME, SETTINGS, STORE
from listenpost.collector.store import (
    BadBatch,
    Board,
    ClockSample,
    EnrollmentReason,
    EnrollmentRefused,
    Event,
    Heartbeat,
    IngestStatus,
    StoreUnavailable,
)
from listenpost.core import jsonload, wire
from listenpost.core.wire import WireError, parse_batch_body, parse_clock

log = structlog.get_logger("listenpost.collector.http.api")

_READ_CHUNK = 64 * 1024


async def read_json(request: web.Request, limits: Limits) -> Any:
    """
    Read a JSON body within the limits (`read_body`).

    Raises `ApiError` as `read_body` does, and 400 for bad JSON: the strict reader
    (`listenpost.core.jsonload`) also refuses NaN/Infinity, deep nesting, NUL and lone surrogates, which
    nothing downstream could store.
    """
    try:
        return jsonload.loads(await read_body(request, limits))
    except jsonload.JsonError as e:
        raise ApiError(400, "bad_json", f"body: {e}", field="body") from e


async def read_body(request: web.Request, limits: Limits) -> bytes:
    """
    Read a body within the limits: ``max_body_bytes`` as sent, ``max_decompressed_bytes`` inflated.

    Raises `ApiError` 413 past a limit, 415 for an encoding other than gzip, 400 for a body that cannot be
    inflated.
    """
    encoding = request.headers.get("Content-Encoding", "identity").strip().lower()
    if encoding not in ("identity", "gzip", ""):
        raise ApiError(
            415, "unsupported_encoding", f"Content-Encoding {encoding!r} is not supported; use gzip"
        )
    sent = request.content_length
    if sent is not None and sent > limits.max_body_bytes:
        raise ApiError(
            413, "too_large", f"body of {sent} bytes is over the {limits.max_body_bytes}-byte limit"
        )
    cap = limits.max_decompressed_bytes if encoding == "gzip" else limits.max_body_bytes
    # aiohttp hands the body over undecoded (create_app turns its auto_decompress off, so an encoding it
    # cannot decode reaches this 415 instead of its plain-text 400); gzip is inflated here, never more
    # than the limit + 1 bytes at a time.
    inflate = zlib.decompressobj(wbits=16 + zlib.MAX_WBITS) if encoding == "gzip" else None
    parts: list[bytes] = []
    total = received = 0
    try:
        while chunk := await request.content.read(_READ_CHUNK):
            received += len(chunk)
            if received > limits.max_body_bytes:
                raise ApiError(413, "too_large", f"body is over the {limits.max_body_bytes}-byte limit")
            if inflate is not None:
                if inflate.eof:
                    raise zlib.error("data after the end of the gzip stream")
                chunk = inflate.decompress(chunk, cap + 1 - total)
                if inflate.unconsumed_tail:
                    total = cap  # more output than the limit allows is waiting
            total += len(chunk)
            if total > cap:
                raise ApiError(
                    413,
                    "too_large",
                    f"body is over the {cap}-byte limit"
                    + (" after decompression" if encoding == "gzip" else ""),
                )
            parts.append(chunk)
        if inflate is not None and not inflate.eof:
            raise zlib.error("the gzip stream is truncated")
    except ApiError:
        raise
    except Exception as e:  # zlib.error for a corrupt gzip stream; a connection lost mid-body
        raise ApiError(
            400, "bad_encoding", f"body could not be decoded as {encoding}: {e}", field="body"
        ) from e
    request[BYTES_SENT] = sent if sent is not None else received
    return b"".join(parts)


TOKEN_CACHE_SECONDS = 10.0
"""How long a token lookup is reused. Retiring, re-enrolling or reissuing a board here drops the cache at
once (`forget_tokens`); another collector on the same database notices within this time."""
TOKEN_CACHE_MAX = 10_000
REGISTRY_CACHE_SECONDS = 10.0
"""How long the tag registry read for batch checks and board configs is reused: a tag imported or retired
through this collector applies at once (`forget_tags`), through another collector sharing the database
within this time."""


def time_window(limits: Limits) -> TimeWindow:
    return TimeWindow(limits.max_reading_age_hours * 3600.0, limits.max_reading_ahead_seconds)


async def registered_tags(app: web.Application) -> frozenset[str]:
    """The registered (active) tags, re-read from the store at most every ``REGISTRY_CACHE_SECONDS``."""
    runtime, now = app[RUNTIME], app[CLOCK].time()
    hit = runtime.tag_registry
    if hit is None or not 0 <= now - hit[1] < REGISTRY_CACHE_SECONDS:
        hit = runtime.tag_registry = (frozenset(await app[STORE].list_tags()), now)
    return hit[0]


def forget_tags(app: web.Application) -> None:
    """Drop the cached tag registry (and the configs built from it): after a tag import or retirement."""
    app[RUNTIME].tag_registry = None
    app[RUNTIME].board_configs.clear()


def forget_tokens(app: web.Application) -> None:
    """Drop every cached token lookup: after any credential or board change, the next request asks the store."""
    app[RUNTIME].token_cache.clear()


async def _board_for_token(app: web.Application, token_hash: str) -> Board | None:
    cache, now = app[RUNTIME].token_cache, app[CLOCK].time()
    hit = cache.get(token_hash)
    if hit is not None and 0 <= now - hit[1] < TOKEN_CACHE_SECONDS:
        return hit[0]
    board = await app[STORE].board_for_token(token_hash)
    if board is not None:
        if len(cache) >= TOKEN_CACHE_MAX:
            cache.clear()  # a flood of distinct tokens must not grow memory
        cache[token_hash] = (board, now)
    return board


async def require_board(request: web.Request) -> Board:
    """The board whose token is on the request: 401 without a valid one, 403 when retired."""
    token = bearer_token(request.headers.get("Authorization"))
    if token is None:
        raise ApiError(
            401,
            "unauthorized",
            "missing 'Authorization: Bearer <board token>'",
            headers={"WWW-Authenticate": "Bearer"},
        )
    # The store looks the board up by the token's sha256; a timing difference reveals nothing usable,
    # because a guess would need a sha256 preimage to get closer.
    board = await _board_for_token(request.app, hash_secret(token))
    if board is None:
        raise ApiError(401, "unauthorized", "unknown board token", headers={"WWW-Authenticate": "Bearer"})
    if board.retired_at is not None:
        raise ApiError(403, "board_retired", f"board {board.name!r} is retired")
    request[BOARD] = board
    structlog.contextvars.bind_contextvars(board=board.name)
    return board


async def board_config(app: web.Application, board: Board) -> tuple[dict[str, Any], str]:
    """
    The config a board runs with, and its ETag (sha256 of the canonical JSON, quoted).

    Every heartbeat answers with the ETag: the document is built and hashed once per board and registry
    snapshot (`registered_tags`), not per request, since the registry holds hundreds of tags.
    """
    settings, cache = app[SETTINGS], app[RUNTIME].board_configs
    tags = await registered_tags(app)
    hit = cache.get(board.name)
    if hit is not None and hit[0] is tags and hit[1] == board.offset_db:
        return hit[2], hit[3]
    doc = {
        "board": board.name,
        "tags": sorted(tags),
        "rules": [rule_to_json(r) for r in settings.rules],
        "offset_db": board.offset_db,
        "flush_seconds": settings.flush_seconds,
        "heartbeat_seconds": settings.heartbeat_seconds,
    }
    etag = '"' + hashlib.sha256(wire.canonical_json(doc)).hexdigest()[:32] + '"'
    if len(cache) >= TOKEN_CACHE_MAX:
        cache.clear()
    cache[board.name] = (tags, board.offset_db, doc, etag)
    return doc, etag


async def enroll(request: web.Request) -> web.Response:
    """``POST /v1/enroll``: one-time code + hardware fingerprint → board token and config."""
    app = request.app
    store, now = app[STORE], app[CLOCK].time()
    body = await read_json(request, app[SETTINGS].limits)
    if not isinstance(body, dict):
        raise bad_field("body", "must be a JSON object")
    code = body.get("code")
    if not isinstance(code, str) or not 4 <= len(code) <= 64:
        raise bad_field("code", "must be the enrollment code text")
    fingerprint = body.get("fingerprint", {})
    if not isinstance(fingerprint, dict) or len(wire.canonical_json(fingerprint)) > 8192:
        raise bad_field("fingerprint", "must be an object of at most 8 KiB")
    h = code_hash(code)
    enr = await store.get_enrollment(h)
    if enr is None:
        raise ApiError(404, "unknown_code", "no such enrollment code", field="code")
    if enr.used_at is not None:
        raise ApiError(
            409,
            "code_used",
            "this enrollment code was already used; ask for a new one with 'collector board reissue'",
            field="code",
        )
    if enr.expires_at <= now:
        raise ApiError(
            410,
            "code_expired",
            "this enrollment code has expired; ask for a new one with 'collector board reissue'",
            field="code",
        )
    before = await store.get_board(enr.board)
    if before is None or before.retired_at is not None:
        raise ApiError(410, "board_retired", f"board {enr.board!r} is retired", field="code")
    token = new_token()
    try:
        board = await store.complete_enrollment(h, hash_secret(token), fingerprint, now)
    except EnrollmentRefused as e:  # checked again atomically: a racing enrollment may have won
        status = {EnrollmentReason.UNKNOWN: 404, EnrollmentReason.USED: 409, EnrollmentReason.EXPIRED: 410}[
            e.reason
        ]
        raise ApiError(status, f"code_{e.reason.value}", str(e), field="code") from e
    forget_tokens(app)  # the board's previous token stops working with this very request
    await _flag_fingerprint_change(app, board, before.fingerprint, fingerprint, now)
    log.info("board_enrolled", board=board.name, room=board.room)
    doc, _ = await board_config(app, board)
    return web.json_response({"board": board.name, "token": token, "config": doc})


async def _flag_fingerprint_change(
    app: web.Application,
    board: Board,
    previous: dict[str, Any] | None,
    fingerprint: dict[str, Any],
    now: float,
) -> None:
    """A board whose hardware changed since it was calibrated needs a new calibration: say so."""
    cals = await app[STORE].calibrations(board.name)
    reference = cals[-1].fingerprint if cals else previous
    if reference is not None and reference != fingerprint:
        changed = sorted(
            k for k in set(reference) | set(fingerprint) if reference.get(k) != fingerprint.get(k)
        )
        await app[STORE].add_event(
            Event(now, board.name, "fingerprint_changed", {"keys": changed, "calibrated": bool(cals)})
        )
        log.warning("fingerprint_changed", board=board.name, keys=changed, calibrated=bool(cals))


async def get_config(request: web.Request) -> web.Response:
    """``GET /v1/config``: tags, rules, offset and periods; 304 when ``If-None-Match`` matches."""
    board = await require_board(request)
    doc, etag = await board_config(request.app, board)
    if etag in [t.strip() for t in request.headers.get("If-None-Match", "").split(",")]:
        return web.Response(status=304, headers={"ETag": etag})
    return web.json_response(doc, headers={"ETag": etag})


async def post_batch(request: web.Request) -> web.Response:
    """
    ``POST /v1/batches``: validate, store atomically, answer only after the durable commit.

    At most ``limits.max_inflight_batches`` are read and stored at once; one more gets 429 with
    ``Retry-After`` before its body is read, so a burst (a fleet back after an outage) waits on the
    boards, whose spools are made for waiting, rather than in this process's memory.
    """
    app = request.app
    runtime, limits = app[RUNTIME], app[SETTINGS].limits
    board = await require_board(request)
    if runtime.batches_inflight >= limits.max_inflight_batches:
        runtime.counters.overloaded += 1
        raise ApiError(
            429,
            "busy",
            f"{runtime.batches_inflight} batches are being stored now; "
            f"retry after {limits.busy_retry_after_seconds} s",
            headers={"Retry-After": str(limits.busy_retry_after_seconds)},
        )
    runtime.batches_inflight += 1
    try:
        return await _store_batch(request, board)
    finally:
        runtime.batches_inflight -= 1


async def _store_batch(request: web.Request, board: Board) -> web.Response:
    app = request.app
    store, runtime, t2 = app[STORE], app[RUNTIME], request[T2]
    body = await read_body(request, app[SETTINGS].limits)
    try:
        env = parse_batch_body(body, max_readings=app[SETTINGS].limits.max_readings)
    except jsonload.JsonError as e:
        raise ApiError(400, "bad_json", f"body: {e}", field="body") from e
    except WireError as e:
        runtime.counters.rejected += 1
        raise bad_field(e.field, str(e).removeprefix(f"{e.field}: ")) from e
    if env.board != board.name:
        runtime.counters.rejected += 1
        raise ApiError(
            403, "wrong_board", f"token of board {board.name!r} cannot post for {env.board!r}", field="board"
        )
    sample = None
    if env.clock is not None:
        # Stored with the batch, in its transaction: one commit per batch, not two.
        sample = await _exchange(request, board, env.boot, env.clock, send_t1=env.t1, keep=False)
    model = await clock_model(runtime.clock_models, store, board.name, env.content.boot)
    batch = to_ingest_batch(env, received_at=t2, model=model, clock=sample)
    try:
        check_times(batch.t_collector, now=t2, window=time_window(app[SETTINGS].limits))
    except WireError as e:
        runtime.counters.rejected += 1
        raise bad_field(e.field, str(e).removeprefix(f"{e.field}: ")) from e
    # The collector, not the board, decides which identities are kept: unregistered ones are dropped
    # and counted (the batch itself is stored, so its seq is accounted for).
    batch, unregistered, unregistered_ids = drop_unregistered(batch, await registered_tags(app))
    try:
        result = await store.ingest(batch)
    except BadBatch as e:
        runtime.counters.rejected += 1
        raise bad_field(e.field, str(e).removeprefix(f"{e.field}: ")) from e
    except StoreUnavailable:
        runtime.counters.unavailable += 1
        raise
    runtime.counters.bytes_received += request.get(BYTES_SENT, 0)
    if result.status is IngestStatus.CONFLICT:
        runtime.counters.conflict += 1
        detail = {
            "epoch": env.epoch,
            "seq": env.seq,
            "digest": env.digest,
            "stored_digest": result.stored_digest,
        }
        await store.add_event(Event(t2, board.name, "digest_conflict", detail))
        log.warning("digest_conflict", **detail)
        raise ApiError(
            409,
            "digest_conflict",
            f"batch ({env.epoch}, {env.seq}) was stored with another digest; start a new epoch",
            field="digest",
        )
    if result.status is IngestStatus.STORED:
        runtime.counters.stored += 1
        runtime.counters.readings_stored += batch.n
        if unregistered:
            # Counts only: no identity of an unregistered device is stored or logged (docs/design.md §2).
            detail = {"readings": unregistered, "ids": unregistered_ids, "epoch": env.epoch, "seq": env.seq}
            await store.add_event(Event(t2, board.name, "unregistered_ids", detail))
            log.warning("unregistered_ids", **detail)
    else:
        runtime.counters.duplicate += 1
    return web.json_response(
        {
            "status": result.status.value,
            "t2": t2,
            "t3": app[CLOCK].time(),
            "unregistered_readings": unregistered,
        }
    )


async def _exchange(
    request: web.Request,
    board: Board,
    boot: str,
    exchange: tuple[float, float, float, float],
    *,
    send_t1: float | None,
    keep: bool = True,
) -> ClockSample | None:
    """Check a clock exchange (an implausible one is dropped and counted) and, with ``keep``, store it; a
    confirmed step becomes an event. Returns the sample for the caller to store when not ``keep``."""
    app = request.app
    try:
        sample, step = await accept_exchange(
            app[RUNTIME].clock_models,
            app[STORE],
            board.name,
            boot,
            exchange,
            now=request[T2],
            window=time_window(app[SETTINGS].limits),
            send_t1=send_t1,
        )
    except WireError as e:
        raise bad_field(e.field, str(e).removeprefix(f"{e.field}: ")) from e
    if keep and sample is not None:
        await app[STORE].add_clock_sample(sample)
    if step is not None:
        detail = {"boot": boot, "size_s": step.size_s, "at_board_s": step.at_board_s}
        await app[STORE].add_event(Event(step.at_collector_s, board.name, "clock_step", detail))
        log.warning("clock_step", board=board.name, **detail)
    return None if keep else sample


async def heartbeat(request: web.Request) -> web.Response:
    """``POST /v1/heartbeat``: keep the board's stats and clock sample; answer t2, t3 and the config ETag."""
    app = request.app
    store, runtime, t2 = app[STORE], app[RUNTIME], request[T2]
    board = await require_board(request)
    body = await read_json(request, app[SETTINGS].limits)
    if not isinstance(body, dict):
        raise bad_field("body", "must be a JSON object")
    if body.get("board", board.name) != board.name:
        raise ApiError(
            403,
            "wrong_board",
            f"token of board {board.name!r} cannot speak for {body.get('board')!r}",
            field="board",
        )
    stats = body.get("stats", {})
    if not isinstance(stats, dict):
        raise bad_field("stats", "must be an object")
    extra: dict[str, Any] = {"t1": None}
    wall = body.get("wall")
    if wall is not None and (
        not isinstance(wall, int | float) or isinstance(wall, bool) or not math.isfinite(wall)
    ):
        raise bad_field("wall", f"must be a finite number, got {wall!r}")
    extra["wall"] = wall
    try:
        boot = wire.check_boot(body.get("boot"), "boot")
        if body.get("t1") is not None:
            extra["t1"] = wire.board_seconds(body["t1"], "t1")
        exchange = parse_clock(body.get("clock"))
    except WireError as e:
        raise bad_field(e.field, str(e).removeprefix(f"{e.field}: ")) from e
    sample = None
    if exchange is not None:
        sample = await _exchange(request, board, boot, exchange, send_t1=extra["t1"], keep=False)
    if extra["wall"] is not None:
        # The board read its wall clock at t1 (board monotonic); the model says what time that was here.
        model = await clock_model(runtime.clock_models, store, board.name, boot)
        at = t2
        if extra["t1"] is not None and model.fit() is not None:
            at = float(model.to_collector_time([round(extra["t1"] * 1000)])[0])
        extra["wall_error_s"] = wall_error_s(extra["wall"], at)
    await store.add_heartbeat(Heartbeat(board.name, t2, boot, {**stats, **extra}), clock=sample)
    _, etag = await board_config(app, board)
    return web.json_response({"t2": t2, "t3": app[CLOCK].time(), "config_etag": etag})


def add_routes(app: web.Application) -> None:
    app.router.add_post("/v1/enroll", enroll)
    app.router.add_get("/v1/config", get_config, allow_head=False)
    app.router.add_post("/v1/batches", post_batch)
    app.router.add_post("/v1/heartbeat", heartbeat)
