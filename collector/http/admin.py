"""
Admin API (``/v1/admin/...``, bearer admin token): boards, tags, calibration, walk test, export, events.

The ``listenpost collector ...`` admin commands are thin clients of these routes (collector/cli.py).
"""

from __future__ import annotations

import asyncio
import contextlib
import dataclasses
import math
import re
import secrets
import tempfile
from pathlib import Path
from typing import Any

import numpy as np
import structlog
from aiohttp import web

from listenpost.collector.http.api import forget_tags, forget_tokens, read_json
from listenpost.collector.http.auth import (
    bearer_token,
    code_hash,
    hash_secret,
    new_enrollment_code,
    same_secret,
)
from listenpost.collector.http.middlewares import ApiError, bad_field
from listenpost.collector.provision import FLOOR_MAX, ROOM_MAX, BadLabel, check_board_name, check_label
from listenpost.collector.state import CLOCK, RUNTIME, SETTINGS, STORE
from listenpost.collector.store import (
    SCAN_CHUNK_ROWS,
    Board,
    Calibration,
    Enrollment,
    Event,
    ReadingChunk,
    StoreUnavailable,
)
from listenpost.core.errors import DecodeError
from listenpost.core.identity import BUILTIN_KINDS, parse_tag_id
from listenpost.core.settings import BOARD_NAME

log = structlog.get_logger("listenpost.collector.http.admin")

MAX_TAGS_PER_REQUEST = 100_000
MAX_EXPORT_SECONDS = 31 * 86400
MAX_EVENTS = 10_000
"""Most events one ``GET /v1/admin/events`` returns."""
MAX_EVENT_ID = 2**63 - 1
"""Event ids are 64-bit signed integers in both stores."""
MAX_UNIX_S = 1e11
"""Upper bound of a time an admin gives (year 5138): past it, no reading can exist."""


def require_admin(request: web.Request) -> None:
    """401 unless the request carries the admin token."""
    token = bearer_token(request.headers.get("Authorization"))
    if token is None or not same_secret(hash_secret(token), request.app[RUNTIME].admin_token_hash):
        raise ApiError(
            401, "unauthorized", "admin token missing or wrong", headers={"WWW-Authenticate": "Bearer"}
        )


async def _json_object(request: web.Request) -> dict[str, Any]:
    body = await read_json(request, request.app[SETTINGS].limits)
    if not isinstance(body, dict):
        raise bad_field("body", "must be a JSON object")
    return body


def _str_field(
    body: dict[str, Any], name: str, *, required: bool = True, max_len: int = 100, field: str | None = None
) -> str | None:
    """``body[name]`` through `check_label` (the CLI's check too); ``field`` names it in the error."""
    try:
        return check_label(field or name, body.get(name), max_len=max_len, required=required)
    except BadLabel as e:
        raise bad_field(e.field, e.reason) from e


def _query_int(request: web.Request, name: str, default: int, lo: int, hi: int) -> int:
    """An integer query parameter in ``lo..hi``: plain decimal digits only, so no 500 from a store overflow."""
    raw = request.query.get(name)
    if raw is None:
        return default
    if not re.fullmatch(r"-?[0-9]{1,20}", raw) or not lo <= int(raw) <= hi:
        raise bad_field(name, f"must be an integer in {lo}..{hi}, got {raw[:40]!r}")
    return int(raw)


def _query_flag(request: web.Request, name: str, default: bool) -> bool:
    raw = request.query.get(name)
    if raw is None:
        return default
    if raw not in ("0", "1"):
        raise bad_field(name, f"must be 0 or 1, got {raw[:40]!r}")
    return raw == "1"


def _query_board(request: web.Request, raw: str, name: str = "board") -> str:
    try:
        return check_board_name(name, raw)
    except BadLabel as e:
        raise bad_field(e.field, e.reason) from e


def _number_field(
    body: dict[str, Any],
    name: str,
    lo: float,
    hi: float,
    default: float | None = None,
    *,
    field: str | None = None,
) -> float:
    v = body.get(name, default)
    if not isinstance(v, int | float) or isinstance(v, bool) or not math.isfinite(v) or not lo <= v <= hi:
        raise bad_field(field or name, f"must be a number in {lo:g}..{hi:g}, got {v!r}")
    return float(v)


def board_json(b: Board) -> dict[str, Any]:
    return {
        "name": b.name,
        "room": b.room,
        "floor": b.floor,
        "created_at": b.created_at,
        "enrolled_at": b.enrolled_at,
        "offset_db": b.offset_db,
        "retired_at": b.retired_at,
        "fingerprint": b.fingerprint,
    }


async def _board_or_404(request: web.Request) -> Board:
    name = request.match_info["name"]
    # A name outside the grammar cannot exist; it never reaches the store (NUL is not valid SQL text).
    board = await request.app[STORE].get_board(name) if BOARD_NAME.fullmatch(name) else None
    if board is None:
        raise ApiError(404, "unknown_board", f"no board named {name!r}", field="name")
    return board


async def _issue_code(request: web.Request, board: str) -> tuple[str, float]:
    code = new_enrollment_code()
    expires = request.app[CLOCK].time() + request.app[SETTINGS].code_lifetime_seconds
    return code, expires


async def add_board(request: web.Request) -> web.Response:
    """``POST /v1/admin/boards`` ``{name, room, floor?}`` → 201 with the one-time enrollment code."""
    require_admin(request)
    body = await _json_object(request)
    try:
        name = check_board_name("name", body.get("name"))
    except BadLabel as e:
        raise bad_field(e.field, e.reason) from e
    room = _str_field(body, "room", max_len=ROOM_MAX)
    floor = _str_field(body, "floor", required=False, max_len=FLOOR_MAX)
    store, now = request.app[STORE], request.app[CLOCK].time()
    if await store.get_board(name) is not None:
        raise ApiError(
            409,
            "board_exists",
            f"board {name!r} already exists; use 'board reissue' for a new code",
            field="name",
        )
    code, expires = await _issue_code(request, name)
    board = Board(name=name, room=room or "", floor=floor, created_at=now)
    try:
        await store.add_board(board, Enrollment(name, code_hash(code), expires))
    except ValueError as e:
        raise ApiError(409, "board_exists", str(e), field="name") from e
    forget_tokens(request.app)
    log.info("board_added", board=name, room=room, floor=floor)
    return web.json_response(
        {
            **board_json(board),
            "code": code,
            "code_expires_at": expires,
            "collector_url": request.app[SETTINGS].public_url,
        },
        status=201,
    )


async def list_boards(request: web.Request) -> web.Response:
    require_admin(request)
    boards = await request.app[STORE].list_boards(include_retired=_query_flag(request, "retired", True))
    return web.json_response({"boards": [board_json(b) for b in boards]})


async def show_board(request: web.Request) -> web.Response:
    """``GET /v1/admin/boards/{name}``: record, calibration history, counts, latest heartbeat, state."""
    require_admin(request)
    board = await _board_or_404(request)
    store = request.app[STORE]
    counts = {c.board: c for c in await store.board_counts()}.get(board.name)
    hb = (await store.latest_heartbeats()).get(board.name)
    cals = await store.calibrations(board.name)
    state = request.app[RUNTIME].states.get(board.name, {})
    return web.json_response(
        {
            **board_json(board),
            "state": state.get("state"),
            "state_reason": state.get("reason"),
            "readings_total": counts.readings_total if counts else 0,
            "batches_total": counts.batches_total if counts else 0,
            "last_batch_at": counts.last_batch_at if counts else None,
            "last_heartbeat": {"at": hb.at, "boot": hb.boot, "stats": hb.stats} if hb else None,
            "calibrations": [_calibration_json(c) for c in cals],
            "recalibrate": bool(cals)
            and cals[-1].fingerprint is not None
            and cals[-1].fingerprint != board.fingerprint,
        }
    )


async def retire_board(request: web.Request) -> web.Response:
    require_admin(request)
    board = await _board_or_404(request)
    now = request.app[CLOCK].time()
    await request.app[STORE].retire_board(board.name, now)
    forget_tokens(request.app)  # the token must stop working here at once
    await request.app[STORE].add_event(Event(now, board.name, "retired", {}))
    log.info("board_retired", board=board.name)
    return web.json_response({"name": board.name, "retired_at": now})


async def reissue_board(request: web.Request) -> web.Response:
    """``POST /v1/admin/boards/{name}/reissue``: a new one-time code (re-flashed card); older codes stop working."""
    require_admin(request)
    board = await _board_or_404(request)
    if board.retired_at is not None:
        raise ApiError(409, "board_retired", f"board {board.name!r} is retired", field="name")
    code, expires = await _issue_code(request, board.name)
    await request.app[STORE].new_enrollment(Enrollment(board.name, code_hash(code), expires))
    forget_tokens(request.app)
    log.info("enrollment_reissued", board=board.name)
    return web.json_response(
        {
            **board_json(board),
            "code": code,
            "code_expires_at": expires,
            "collector_url": request.app[SETTINGS].public_url,
        }
    )


def _tag_list(body: dict[str, Any]) -> list[str]:
    ids = body.get("ids")
    if not isinstance(ids, list) or len(ids) > MAX_TAGS_PER_REQUEST:
        raise bad_field("ids", f"must be a list of at most {MAX_TAGS_PER_REQUEST} tag identities")
    out = []
    for i, text in enumerate(ids):
        if not isinstance(text, str):
            raise bad_field(f"ids[{i}]", "must be a string")
        try:
            out.append(parse_tag_id(text))
        except DecodeError as e:
            raise bad_field(f"ids[{i}]", str(e)) from e
    return out


async def import_tags(request: web.Request) -> web.Response:
    """``POST /v1/admin/tags`` ``{ids: [...]}``: all valid or nothing stored."""
    require_admin(request)
    ids = _tag_list(await _json_object(request))
    store = request.app[STORE]
    added = await store.add_tags(ids, request.app[CLOCK].time())
    forget_tags(request.app)
    return web.json_response(
        {
            "added": added,
            "given": len(ids),
            "total": len(await store.list_tags()),
            "without_rule": _without_rule(ids, request.app[SETTINGS].rules),
        }
    )


def _without_rule(ids: list[str], rules: Any) -> dict[str, int]:
    """
    Tag count per configured-rule name that this collector's ``decode.rules`` does not define.

    Such tags are stored, but no board can ever name them: their identity only exists once a rule
    extracts it (DEVELOPERS.md, "How to add a decode rule").
    """
    known = set(BUILTIN_KINDS) | {r.name for r in rules}
    out: dict[str, int] = {}
    for t in ids:
        kind = t.split(":", 1)[0]
        if kind not in known:
            out[kind] = out.get(kind, 0) + 1
    return out


async def list_tags(request: web.Request) -> web.Response:
    require_admin(request)
    tags = await request.app[STORE].list_tags(include_retired=_query_flag(request, "retired", False))
    return web.json_response({"tags": sorted(tags)})


async def retire_tags(request: web.Request) -> web.Response:
    require_admin(request)
    ids = _tag_list(await _json_object(request))
    n = await request.app[STORE].retire_tags(ids, request.app[CLOCK].time())
    forget_tags(request.app)
    return web.json_response({"retired": n, "given": len(ids)})


async def events(request: web.Request) -> web.Response:
    """``GET /v1/admin/events?since=ID&limit=N&board=NAME``: events after ``since``, oldest first."""
    require_admin(request)
    since = _query_int(request, "since", 0, 0, MAX_EVENT_ID)
    limit = _query_int(request, "limit", 1000, 1, MAX_EVENTS)
    board = request.query.get("board")
    if board is not None and await request.app[STORE].get_board(_query_board(request, board)) is None:
        raise ApiError(404, "unknown_board", f"no board named {board!r}", field="board")
    evs = await request.app[STORE].events(since_id=since, limit=limit, board=board)
    return web.json_response({"events": [event_json(e) for e in evs]})


def event_json(e: Event) -> dict[str, Any]:
    return {"id": e.id, "at": e.at, "board": e.board, "kind": e.kind, "detail": e.detail}


def _query_time(request: web.Request, name: str) -> float:
    raw = request.query.get(name)
    if raw is None:
        raise bad_field(name, "is required (Unix seconds)")
    try:
        v = float(raw)
    except ValueError as e:
        raise bad_field(name, f"must be Unix seconds, got {raw[:40]!r}") from e
    if not 0 <= v <= MAX_UNIX_S:  # also refuses nan and inf
        raise bad_field(name, f"must be Unix seconds in 0..{MAX_UNIX_S:.0f}, got {raw[:40]!r}")
    return v


@dataclasses.dataclass
class ExportRequest:
    """A checked export request."""

    t_from: float
    t_to: float
    bin_s: float
    fmt: str
    boards: list[str] | None
    tags: list[str] | None
    calibration: str = "applied"


def _export_request(request: web.Request) -> ExportRequest:
    t_from, t_to = _query_time(request, "from"), _query_time(request, "to")
    if t_to <= t_from:
        raise bad_field("to", "must be after from")
    if t_to - t_from > MAX_EXPORT_SECONDS:
        raise bad_field("to", f"the range may span at most {MAX_EXPORT_SECONDS // 86400} days")
    try:
        bin_s = float(request.query.get("bin", "1"))
    except ValueError as e:
        raise bad_field("bin", "must be seconds") from e
    if not math.isfinite(bin_s) or bin_s <= 0 or (t_to - t_from) / bin_s > 10_000_000:
        raise bad_field("bin", "must be > 0 seconds and give at most 10 million bins")
    fmt = request.query.get("format", "csv")
    if fmt not in EXPORT_FORMATS:
        raise bad_field("format", f"must be one of {', '.join(EXPORT_FORMATS)}, got {fmt[:40]!r}")
    calibration = request.query.get("calibration", "applied")
    if calibration not in EXPORT_CALIBRATIONS:
        raise bad_field(
            "calibration", f"must be one of {', '.join(EXPORT_CALIBRATIONS)}, got {calibration[:40]!r}"
        )
    boards = [_query_board(request, b) for b in request.query.getall("board", [])] or None
    tags = []
    for text in request.query.getall("tag", []):
        try:
            tags.append(parse_tag_id(text))
        except DecodeError as e:
            raise bad_field("tag", str(e)) from e
    return ExportRequest(t_from, t_to, bin_s, fmt, boards, tags or None, calibration)


EXPORT_FORMATS = ("csv", "npz", "parquet")
EXPORT_CALIBRATIONS = ("applied", "history", "latest")
"""`CalibrationChoice` values (collector/models/export.py), spelled here so a bad request costs no import."""
_EXPORT_TYPES = {
    "csv": "text/csv",
    "npz": "application/octet-stream",
    "parquet": "application/vnd.apache.parquet",
}


MAX_RUNNING_EXPORTS = 2
"""Exports binning at once; each holds its table (up to `max_cells`) in memory."""
KEEP_FINISHED_EXPORTS = 8
"""Finished exports whose files are kept for download; the oldest goes first."""
MAX_EXPORT_WAIT_S = 30.0
"""Longest one ``GET /v1/admin/exports/{job}?wait=`` holds its answer."""
EXPORT_CHUNK_ROWS = SCAN_CHUNK_ROWS
"""Rows binned per step: the export holds its table plus one chunk of this many rows."""
_JOB_ID = re.compile(r"[A-Za-z0-9_-]{22}")


@dataclasses.dataclass(eq=False)
class ExportJob:
    """One export binning in a worker thread; its file goes to ``folder`` when done."""

    id: str
    ask: ExportRequest
    folder: tempfile.TemporaryDirectory[str]
    state: str = "running"
    """``running``, ``done`` or ``failed``."""
    rows_seen: int = 0
    readings: int = 0
    progress: float | None = None
    error: dict[str, Any] | None = None
    summary: dict[str, Any] | None = None
    """Cells, readings, boards, tags, time span and calibration of the finished table."""
    path: Path | None = None
    finished: asyncio.Event = dataclasses.field(default_factory=asyncio.Event)
    task: asyncio.Task[None] | None = None

    def as_json(self) -> dict[str, Any]:
        return {
            "job": self.id,
            "state": self.state,
            "format": self.ask.fmt,
            "rows_scanned": self.rows_seen,
            "readings": self.readings,
            "progress": self.progress,
            "error": self.error,
            "calibration": self.ask.calibration,
            "summary": self.summary,
        }


class ExportJobs:
    """The collector's export jobs: started by a request, run as tasks, kept until pruned or shutdown."""

    def __init__(self) -> None:
        self.jobs: dict[str, ExportJob] = {}

    def running(self) -> int:
        return sum(1 for j in self.jobs.values() if j.state == "running")

    def prune(self) -> None:
        done = [j for j in self.jobs.values() if j.state != "running"]
        for job in done[: max(0, len(done) - KEEP_FINISHED_EXPORTS + 1)]:
            del self.jobs[job.id]
            job.folder.cleanup()

    async def close(self) -> None:
        tasks = [j.task for j in self.jobs.values() if j.task is not None and not j.task.done()]
        for t in tasks:
            t.cancel()
        await asyncio.gather(*tasks, return_exceptions=True)
        for job in self.jobs.values():
            job.folder.cleanup()
        self.jobs.clear()


EXPORT_JOBS = web.AppKey("export_jobs", ExportJobs)


async def _run_export(app: web.Application, job: ExportJob) -> None:
    """Scan, bin and write in worker threads; the event loop only starts them and records progress."""
    from listenpost.collector.models.export import WRITERS, BoardInfo, TableBuilder

    ask, store = job.ask, app[STORE]
    try:
        registry = {b.name: b for b in await store.list_boards()}
        boards = ask.boards or sorted(registry)
        history = {}
        if ask.calibration != "applied":
            for name in boards:
                history[name] = [(c.at, c.offset_db) for c in await store.calibrations(name)]
        builder = TableBuilder(
            ask.t_from,
            ask.t_to,
            ask.bin_s,
            boards,
            tags=ask.tags,
            base_tags=() if ask.tags else await store.list_tags(),
            calibration=ask.calibration,
            history=history,
            board_info={n: BoardInfo(b.room, b.floor) for n, b in registry.items()},
        )

        def sink(chunk: ReadingChunk) -> None:
            builder.add(chunk)  # in the store's worker thread, one chunk at a time
            job.rows_seen, job.readings, job.progress = builder.rows_seen, builder.readings, chunk.progress

        await store.scan_readings(
            ask.t_from, ask.t_to, sink, boards=ask.boards, tags=ask.tags, chunk_rows=EXPORT_CHUNK_ROWS
        )

        def render() -> Path:
            table = builder.table()
            job.summary = table.summary()
            path = Path(job.folder.name) / f"listenpost-export.{ask.fmt}"
            WRITERS[ask.fmt](table, path)
            return path

        job.path = await asyncio.to_thread(render)
        job.readings, job.progress, job.state = builder.readings, 1.0, "done"
        log.info("export_done", job=job.id, readings=job.readings, rows_scanned=job.rows_seen, format=ask.fmt)
    except asyncio.CancelledError:
        job.state, job.error = "failed", {"code": "cancelled", "message": "the collector is shutting down"}
        raise
    except StoreUnavailable as e:
        log.warning("export_failed", job=job.id, error=str(e))
        job.state = "failed"
        job.error = {"code": "store_unavailable", "message": "the database is not available now; retry later"}
    except Exception as e:
        job.state = "failed"
        if isinstance(e, ValueError) and str(e).startswith("max_cells"):
            # Tags turning up pushed the table past max_cells: a request to narrow, not a fault.
            job.error = {"code": "bad_field", "field": "bin", "message": f"bin: {e}"}
        else:
            log.exception("export_failed", job=job.id)
            job.error = {"code": "internal", "message": "internal error; see the collector log"}
    finally:
        if job.state == "running":  # whatever ended the task, a poll must not see it running forever
            job.state = "failed"
        job.finished.set()


async def _start_export(request: web.Request) -> ExportJob:
    require_admin(request)
    ask = _export_request(request)
    from listenpost.collector.models.export import check_table

    jobs = request.app[EXPORT_JOBS]
    if jobs.running() >= MAX_RUNNING_EXPORTS:
        raise ApiError(
            503,
            "busy",
            f"{MAX_RUNNING_EXPORTS} exports are running; retry later",
            headers={"Retry-After": "10"},
        )
    store = request.app[STORE]
    boards = ask.boards or sorted(b.name for b in await store.list_boards())
    try:  # name and size checks are cheap: do them here so a refusal is a 400, not a failed job
        check_table(ask.t_from, ask.t_to, ask.bin_s, boards, ask.tags or await store.list_tags())
    except ValueError as e:
        raise bad_field("bin", str(e)) from e
    jobs.prune()
    job = ExportJob(secrets.token_urlsafe(16), ask, tempfile.TemporaryDirectory(prefix="listenpost-export-"))
    jobs.jobs[job.id] = job
    job.task = asyncio.create_task(_run_export(request.app, job), name=f"export-{job.id}")
    log.info("export_started", job=job.id, t_from=ask.t_from, t_to=ask.t_to, bin_s=ask.bin_s, format=ask.fmt)
    return job


def _job(request: web.Request) -> ExportJob:
    require_admin(request)
    job_id = request.match_info["job"]
    job = request.app[EXPORT_JOBS].jobs.get(job_id) if _JOB_ID.fullmatch(job_id) else None
    if job is None:
        raise ApiError(
            404, "unknown_export", f"no export job {job_id[:40]!r} (finished ones are kept a while)"
        )
    return job


def _export_file(job: ExportJob) -> web.StreamResponse:
    assert job.path is not None
    return web.FileResponse(
        job.path,
        headers={
            "Content-Type": _EXPORT_TYPES[job.ask.fmt],
            "Content-Disposition": f'attachment; filename="listenpost-export.{job.ask.fmt}"',
            "X-Readings": str(job.readings),
        },
    )


def _failed(job: ExportJob) -> ApiError:
    err = job.error or {}
    status = {"bad_field": 400, "store_unavailable": 503}.get(err.get("code", ""), 500)
    return ApiError(
        status, err.get("code", "internal"), err.get("message", "export failed"), field=err.get("field")
    )


async def export(request: web.Request) -> web.StreamResponse:
    """``GET /v1/admin/export?from=&to=&bin=&format=csv|npz|parquet[&calibration=applied|history|latest]
    [&board=..][&tag=..]``: binned RSSI with the chosen calibration (docs/export.md).

    Runs as an export job and answers when it is done: a client with a total timeout shorter than the
    export gives up; ``POST /v1/admin/exports`` plus polling does not."""
    job = await _start_export(request)
    await job.finished.wait()
    if job.state != "done":
        raise _failed(job)
    return _export_file(job)


async def start_export(request: web.Request) -> web.Response:
    """``POST /v1/admin/exports?<the export's query>``: start an export job; 202 with its id and state."""
    job = await _start_export(request)
    return web.json_response(job.as_json(), status=202)


async def export_status(request: web.Request) -> web.Response:
    """``GET /v1/admin/exports/{job}[?wait=S]``: the job's state; with ``wait``, answers when the job ends or
    after S seconds (at most `MAX_EXPORT_WAIT_S`), whichever comes first (a long poll)."""
    job = _job(request)
    raw = request.query.get("wait", "0")
    try:
        wait = float(raw)
    except ValueError:
        raise bad_field("wait", f"must be seconds, got {raw[:40]!r}") from None
    if not 0 <= wait <= MAX_EXPORT_WAIT_S:  # also refuses nan
        raise bad_field("wait", f"must be 0..{MAX_EXPORT_WAIT_S:g} seconds")
    if wait and job.state == "running":
        # A bound on holding a connection, like the client's own timeouts: loop time, not the service clock.
        with contextlib.suppress(TimeoutError):
            await asyncio.wait_for(job.finished.wait(), wait)
    return web.json_response(job.as_json())


async def export_result(request: web.Request) -> web.StreamResponse:
    """``GET /v1/admin/exports/{job}/file``: the finished export's file (409 while it runs)."""
    job = _job(request)
    if job.state == "running":
        raise ApiError(409, "export_running", "the export is still running; poll its state first")
    if job.state != "done":
        raise _failed(job)
    return _export_file(job)


def _calibration_json(c: Calibration) -> dict[str, Any]:
    return {
        "at": c.at,
        "offset_db": c.offset_db,
        "spread_db": c.spread_db,
        "samples": c.samples,
        "reference_tag": c.reference_tag,
        "distance_m": c.distance_m,
    }


async def calibrate(request: web.Request) -> web.Response:
    """
    ``POST /v1/admin/boards/{name}/calibrate`` ``{tag, distance_m, minutes?, power_1m_dbm?, exponent?}``.

    The offset comes from the reference tag's readings of the last ``minutes`` (collector/calibration.py);
    the result goes into the board's history and becomes its current offset.
    """
    require_admin(request)
    from listenpost.collector.models.calibration import calibrate_offset

    board = await _board_or_404(request)
    body = await _json_object(request)
    try:
        tag = parse_tag_id(_str_field(body, "tag", max_len=200) or "")
    except DecodeError as e:
        raise bad_field("tag", str(e)) from e
    distance = _number_field(body, "distance_m", 0.1, 100.0)
    minutes = _number_field(body, "minutes", 0.5, 240.0, default=5.0)
    power = _number_field(body, "power_1m_dbm", -120.0, 20.0, default=-59.0)
    exponent = _number_field(body, "exponent", 1.0, 6.0, default=2.0)
    store, now = request.app[STORE], request.app[CLOCK].time()
    rows = await store.readings(now - minutes * 60, now, boards=[board.name], tags=[tag])
    # The board's current offset is already in the stored RSSI; calibrate against the raw values.
    raw_dbm = (rows.rssi_dd - rows.offset_dd) / 10.0
    if len(raw_dbm) == 0:
        raise ApiError(
            409,
            "no_readings",
            f"board {board.name!r} has no readings of {tag} in the last {minutes:g} minutes",
            field="tag",
        )
    try:
        result = calibrate_offset(
            np.asarray(raw_dbm, dtype=float), distance_m=distance, p1_dbm=power, exponent=exponent
        )
    except ValueError as e:
        raise bad_field("distance_m", str(e)) from e
    cal = Calibration(
        board.name,
        now,
        float(result.offset_db),
        float(result.spread_db),
        int(result.samples),
        tag,
        distance,
        board.fingerprint,
    )
    await store.set_offset(cal)
    forget_tokens(request.app)  # cached Board records carry the old offset
    await store.add_event(
        Event(
            now,
            board.name,
            "calibrated",
            {**_calibration_json(cal), "warnings": [str(w) for w in result.warnings]},
        )
    )
    log.info(
        "board_calibrated",
        board=board.name,
        offset_db=cal.offset_db,
        spread_db=cal.spread_db,
        samples=cal.samples,
    )
    return web.json_response(
        {
            **_calibration_json(cal),
            "board": board.name,
            "warnings": [str(w) for w in result.warnings],
            "median_dbm": result.median_dbm,
            "previous_offset_db": board.offset_db,
        }
    )


async def calibrate_fleet(request: web.Request) -> web.Response:
    """
    ``POST /v1/admin/calibrate/fleet`` ``{minutes?, apply?, wall_db?, floor_db?, min_level_dbm?}``.

    One solve over every board and every reference tag of the venue plan it heard in the last ``minutes``
    (collector/models/calibration_fleet.py). With ``apply`` each fitted offset goes into its board's
    history and becomes current, as a single-board calibration does; boards with no usable pair are
    listed in ``unheard`` and keep their offset.
    """
    require_admin(request)
    from listenpost.collector.models.calibration_fleet import (
        FALLBACK_LOSSES_DB,
        fit_json,
        pair_medians,
        plan_geometry,
        solve_fleet,
    )
    from listenpost.collector.web.plan import read_plan

    body = await _json_object(request)
    minutes = _number_field(body, "minutes", 1.0, 240.0, default=30.0)
    apply = body.get("apply", False)
    if not isinstance(apply, bool):
        raise bad_field("apply", f"must be true or false, got {apply!r}")
    losses = {
        k: None if body.get(k) is None else _number_field(body, k, 0.0, 60.0) for k in ("wall_db", "floor_db")
    }
    min_level = _number_field(body, "min_level_dbm", -127.0, 0.0, default=-105.0)
    plan = await asyncio.to_thread(read_plan, request.app[SETTINGS].state_dir)
    if plan is None or not plan.reference_tags:
        raise ApiError(
            409, "no_plan", "import a venue plan with reference tags first (collector plan import)"
        )
    store, now = request.app[STORE], request.app[CLOCK].time()
    rows = await store.readings(now - minutes * 60, now, tags=[t.id for t in plan.reference_tags])
    raw = (np.asarray(rows.rssi_dd, dtype=float) - np.asarray(rows.offset_dd, dtype=float)) / 10.0
    known = {b.id for b in plan.boards}
    keep = np.array([b in known for b in rows.board], dtype=bool)
    b, t, raw = rows.board[keep], rows.tag[keep], raw[keep]
    if raw.size == 0:
        raise ApiError(
            409, "no_readings", f"no board of the plan heard a reference tag in the last {minutes:g} minutes"
        )
    # The weakest report a board delivered stands for its sensitivity (whole dBm: the cut is half a dB lower).
    floors = {name: float(raw[b == name].min()) - 0.5 for name in set(b.tolist())}
    try:
        medians = pair_medians(b, t, raw, floor_dbm=floors)
        fit = await asyncio.to_thread(
            solve_fleet,
            medians,
            plan_geometry(plan),
            all_boards=sorted(known),
            min_level_dbm=min_level,
            fallback_losses=FALLBACK_LOSSES_DB,
            **losses,
        )
    except ValueError as e:
        raise ApiError(409, "cannot_solve", str(e)) from e
    answer = fit_json(fit)
    applied = []
    if apply:
        for bf in fit.boards:
            board = await store.get_board(bf.board)
            if board is None or board.retired_at is not None:
                continue
            cal = Calibration(
                board.name,
                now,
                float(bf.offset_db),
                float(bf.residual_db),
                sum(p.samples for p in fit.pairs if p.board == bf.board),
                "fleet",
                0.0,
                board.fingerprint,
            )
            await store.set_offset(cal)
            await store.add_event(
                Event(
                    now,
                    board.name,
                    "calibrated",
                    {**_calibration_json(cal), "fleet": True, "stderr_db": bf.stderr_db},
                )
            )
            applied.append(board.name)
        forget_tokens(request.app)  # cached Board records carry the old offsets
        log.info("fleet_calibrated", boards=len(applied), exponent=fit.exponent)
    return web.json_response({**answer, "applied": applied, "minutes": minutes})


async def walktest(request: web.Request) -> web.Response:
    """
    ``POST /v1/admin/walktest`` ``{tag, marks: [{room, from, to}]}`` → per room, the board that heard the
    reference tag strongest and by how many dB over the runner-up (collector/calibration.py ``walk_report``).
    """
    require_admin(request)
    from listenpost.collector.models.calibration import walk_report

    body = await _json_object(request)
    try:
        tag = parse_tag_id(_str_field(body, "tag", max_len=200) or "")
    except DecodeError as e:
        raise bad_field("tag", str(e)) from e
    raw_marks = body.get("marks")
    if not isinstance(raw_marks, list) or not raw_marks or len(raw_marks) > 1000:
        raise bad_field("marks", "must be a list of 1-1000 {room, from, to} objects")
    marks = []
    for i, m in enumerate(raw_marks):
        if not isinstance(m, dict):
            raise bad_field(f"marks[{i}]", "must be an object")
        room = _str_field(m, "room", max_len=ROOM_MAX, field=f"marks[{i}].room")
        t0 = _number_field(m, "from", 0, MAX_UNIX_S, field=f"marks[{i}].from")
        t1 = _number_field(m, "to", 0, MAX_UNIX_S, field=f"marks[{i}].to")
        if t1 <= t0:
            raise bad_field(f"marks[{i}].to", "must be after from")
        marks.append((room, t0, t1))
    store = request.app[STORE]
    rows = await store.readings(min(m[1] for m in marks), max(m[2] for m in marks), tags=[tag])
    boards = await store.list_boards()
    room_of = {b.name: b.room for b in boards}
    floors = {b.room: b.floor for b in boards if b.floor is not None}
    rssi_dbm = rows.rssi_dd / 10.0
    walk_rows = [
        (b, room_of.get(b, "?"), float(t), float(r))
        for b, t, r in zip(rows.board.tolist(), rows.t_collector.tolist(), rssi_dbm.tolist(), strict=True)
    ]
    try:
        report = walk_report(marks, walk_rows, floors=floors)
    except ValueError as e:
        raise bad_field("marks", str(e)) from e
    return web.json_response(
        {"tag": tag, "readings": len(walk_rows), "rooms": [dataclasses.asdict(r) for r in report]}
    )


def add_routes(app: web.Application) -> None:
    r = app.router
    r.add_post("/v1/admin/boards", add_board)
    r.add_get("/v1/admin/boards", list_boards, allow_head=False)
    r.add_get("/v1/admin/boards/{name}", show_board, allow_head=False)
    r.add_post("/v1/admin/boards/{name}/retire", retire_board)
    r.add_post("/v1/admin/boards/{name}/reissue", reissue_board)
    r.add_post("/v1/admin/boards/{name}/calibrate", calibrate)
    r.add_post("/v1/admin/calibrate/fleet", calibrate_fleet)
    r.add_post("/v1/admin/tags", import_tags)
    r.add_get("/v1/admin/tags", list_tags, allow_head=False)
    r.add_post("/v1/admin/tags/retire", retire_tags)
    r.add_get("/v1/admin/events", events, allow_head=False)
    r.add_get("/v1/admin/export", export, allow_head=False)
    r.add_post("/v1/admin/exports", start_export)
    r.add_get("/v1/admin/exports/{job}", export_status, allow_head=False)
    r.add_get("/v1/admin/exports/{job}/file", export_result, allow_head=False)
    app[EXPORT_JOBS] = ExportJobs()

    async def stop_exports(app: web.Application) -> None:
        await app[EXPORT_JOBS].close()

    app.on_shutdown.append(stop_exports)  # before the store closes (cleanup_ctx)
    r.add_post("/v1/admin/walktest", walktest)
