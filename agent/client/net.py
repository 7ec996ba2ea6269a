"""The one place the agent makes its HTTP client session (so a private CA applies to every call)."""

from __future__ import annotations

import ssl
from pathlib import Path

import aiohttp

from listenpost.core.errors import ConfigError


def client_session(ca_file: str | Path | None = None) -> aiohttp.ClientSession:
    """
    A `ClientSession` that trusts the system CAs, or only ``ca_file`` when given (a collector with a
    private or self-signed certificate). Timeouts are set per request by the callers.

    Raises:
        ConfigError: ``ca_file`` cannot be read as PEM certificates.
    """
    if ca_file is None:
        return aiohttp.ClientSession()
    try:
        ctx = ssl.create_default_context(cafile=str(ca_file))
    except (OSError, ssl.SSLError) as e:
        raise ConfigError(f"collector.ca_file: cannot load CA certificates from {str(ca_file)!r}: {e}") from e
    return aiohttp.ClientSession(connector=aiohttp.TCPConnector(ssl=ctx))


def request_timeout(seconds: float) -> aiohttp.ClientTimeout:
    """
    The per-request timeout every agent call uses: ``seconds`` in all, connecting at most 10 s of it.

    aiohttp's default total is five minutes, far too long for a board that should notice an outage
    and fall back to its spool.
    """
    return aiohttp.ClientTimeout(total=seconds, connect=min(seconds, 10.0))
