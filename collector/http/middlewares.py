"""
Middleware factories: request context (t2, request id, one log line per request), bearer-token
checks, and every failure turned into the one JSON error shape of DEVELOPERS.md::

    {"error": {"code": "bad_field", "field": "seq", "message": "..."}}

A request that can never succeed gets a 4xx; only a bug gives a 500.
"""

from __future__ import annotations

import itertools
from collections.abc import Awaitable, Callable
from typing import Any

import structlog
from aiohttp import web

from listenpost.collector.store import Board, StoreUnavailable
from listenpost.core.clock import Clock

log = structlog.get_logger("listenpost.collector.http")

Handler = Callable[[web.Request], Awaitable[web.StreamResponse]]
Middleware = Callable[[web.Request, Handler], Awaitable[web.StreamResponse]]

RETRY_AFTER_SECONDS = 5
"""What a board is told to wait when the store is down (it adds its own jitter)."""

T2 = web.RequestKey("t2", float)
"""Collector Unix seconds when the request arrived, before its body was read (the exchange's T2)."""
BOARD = web.RequestKey("board", Board)
"""The authenticated board of a board-API request."""
BYTES_SENT = web.RequestKey("bytes_sent", int)
"""Request body size as sent (compressed), bytes."""


class ApiError(Exception):
    """A request the collector refuses; becomes the JSON error shape with ``status``."""

    def __init__(
        self,
        status: int,
        code: str,
        message: str,
        *,
        field: str | None = None,
        headers: dict[str, str] | None = None,
    ) -> None:
        super().__init__(message)
        self.status = status
        self.code = code
        self.field = field
        self.message = message
        self.headers = headers or {}


def bad_field(field: str, message: str) -> ApiError:
    """400 naming the offending field."""
    return ApiError(400, "bad_field", f"{field}: {message}", field=field)


def error_response(
    status: int, code: str, message: str, field: str | None = None, headers: dict[str, str] | None = None
) -> web.Response:
    err: dict[str, Any] = {"code": code, "message": message}
    if field is not None:
        err["field"] = field
    return web.json_response({"error": err}, status=status, headers=headers)


def request_context_middleware(*, clock: Clock) -> Middleware:
    """Stamp t2 on arrival (before any body is read), bind a request id, log one line per request."""
    ids = itertools.count(1)

    @web.middleware
    async def impl(request: web.Request, handler: Handler) -> web.StreamResponse:
        request[T2] = clock.time()
        rid = f"{next(ids):x}"
        with structlog.contextvars.bound_contextvars(request_id=rid):
            response = await handler(request)
            board = request.get(BOARD)
            level = log.info if response.status >= 400 else log.debug
            level(
                "request_handled",
                method=request.method,
                path=request.path,
                status=response.status,
                board=board.name if board else None,
                ms=round((clock.time() - request[T2]) * 1000, 2),
            )
            return response

    return impl


def error_middleware() -> Middleware:
    """Turn `ApiError`, aiohttp's HTTP errors, `StoreUnavailable` and bugs into JSON errors."""

    @web.middleware
    async def impl(request: web.Request, handler: Handler) -> web.StreamResponse:
        try:
            return await handler(request)
        except ApiError as e:
            return error_response(e.status, e.code, e.message, e.field, e.headers)
        except StoreUnavailable as e:
            log.warning("store_unavailable", path=request.path, error=str(e))
            return error_response(
                503,
                "store_unavailable",
                "the database is not available now; retry later",
                headers={"Retry-After": str(RETRY_AFTER_SECONDS)},
            )
        except web.HTTPException as e:
            if e.status < 400:
                raise
            code = {404: "not_found", 405: "method_not_allowed", 413: "too_large"}.get(e.status, "http_error")
            headers = {k: v for k, v in e.headers.items() if k.lower() in ("allow", "retry-after")}
            return error_response(e.status, code, e.reason or e.text or "error", headers=headers)
        except Exception:
            log.exception("request_failed", path=request.path, method=request.method)
            return error_response(500, "internal", "internal error; see the collector log")

    return impl
