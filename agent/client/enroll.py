"""
``listenpost agent enroll``: trade a one-time code for this board's credential.

``POST /v1/enroll {"code", "fingerprint"}`` → 200 ``{"board", "token", "config"}``. The token goes to
``<state_dir>/credential`` (created with mode 0600, written through a temp file and renamed, so no
moment exists where it is readable by others or half-written); a complete ``<state_dir>/agent.yaml``
is written for the board the collector named, and the config that came with the answer seeds the
remote-config cache so the first ``agent run`` scans even before it reaches the collector again.

Exit codes: 0 enrolled · 1 the collector could not be reached (timeout, network, 5xx: try again) ·
2 the code was refused (404 unknown, 409 already used, 410 expired) or an argument is bad: final, no
retry can help (the enroll unit's ``RestartPreventExitStatus=2 3``); the fix is ``board reissue`` ·
3 (``--until-enrolled`` only) the collector stayed unreachable for the whole ``--give-up-after``.
"""

from __future__ import annotations

import asyncio
import enum
import json
import random
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import aiohttp
import structlog
import yaml

from listenpost.agent.boardinfo import fingerprint
from listenpost.agent.client.net import client_session
from listenpost.agent.client.remote_config import ConfigCache, parse_remote_config, write_atomic
from listenpost.agent.config import parse_agent_config
from listenpost.core.backoff import full_jitter
from listenpost.core.clock import Clock, SystemClock
from listenpost.core.errors import ConfigError

log = structlog.get_logger("listenpost.agent.client.enroll")

CREDENTIAL_FILE = "credential"
CONFIG_FILE = "agent.yaml"


class EnrollStatus(enum.Enum):
    """How an enrollment attempt ended; the value is the exit code family."""

    ENROLLED = "enrolled"
    UNKNOWN_CODE = "unknown_code"
    CODE_USED = "code_used"
    CODE_EXPIRED = "code_expired"
    REFUSED = "refused"
    """Another 4xx: the request itself is wrong."""
    UNREACHABLE = "unreachable"
    GAVE_UP = "gave_up"
    """Unreachable for the whole ``give_up_after_s`` of an unbounded run: final, like a refusal."""


REISSUE_HINT = (
    "on the collector machine run 'listenpost collector board reissue NAME --bundle DIR' for a new code "
    "(and a new bundle for the card)"
)

_MESSAGES = {
    EnrollStatus.UNKNOWN_CODE: "the collector does not know this enrollment code (404); check it against "
    f"'collector board add' output, or {REISSUE_HINT}",
    EnrollStatus.CODE_USED: f"this enrollment code was already used (409); {REISSUE_HINT}",
    EnrollStatus.CODE_EXPIRED: f"this enrollment code has expired (410); {REISSUE_HINT}",
}

EXIT_CODES = {
    EnrollStatus.ENROLLED: 0,
    EnrollStatus.UNREACHABLE: 1,
    EnrollStatus.UNKNOWN_CODE: 2,
    EnrollStatus.CODE_USED: 2,
    EnrollStatus.CODE_EXPIRED: 2,
    EnrollStatus.REFUSED: 2,
    EnrollStatus.GAVE_UP: 3,
}


@dataclass(frozen=True, slots=True)
class EnrollResult:
    status: EnrollStatus
    message: str
    board: str | None = None
    config_path: Path | None = None


GIVE_UP_AFTER_S = 80 * 3600.0
"""How long ``--until-enrolled`` keeps trying an unreachable collector: past the default code lifetime
(72 h), after which the collector answers 410 anyway; the bound is for a collector that never returns."""


async def enroll(
    collector_url: str,
    code: str,
    state_dir: str | Path,
    *,
    clock: Clock,
    session: aiohttp.ClientSession | None = None,
    timeout_s: float = 10.0,
    attempts: int | None = 4,
    backoff_s: float = 2.0,
    backoff_max_s: float = 60.0,
    give_up_after_s: float = GIVE_UP_AFTER_S,
    rng: random.Random | None = None,
    fingerprint_data: dict[str, Any] | None = None,
    ca_file: str | Path | None = None,
) -> EnrollResult:
    """
    Enroll once, retrying only an unreachable collector with capped, fully jittered backoff.

    Args:
        attempts: tries at most; None keeps trying until enrolled, refused, or ``give_up_after_s`` of
            ``clock`` time passed (the first-boot unit: the code stays valid for days).
        backoff_s, backoff_max_s: the first retry's ceiling and the cap (`listenpost.core.backoff`).

    Raises:
        ConfigError: bad URL or code, an unusable state directory, or a malformed 200 answer.
    """
    url = collector_url.rstrip("/")
    if not url.startswith(("http://", "https://")):
        raise ConfigError(f"--collector: must be an http(s) URL, got {collector_url!r}")
    code = code.strip()
    if not code or len(code) > 200:
        raise ConfigError("--code: must be 1-200 characters")
    if attempts is not None and attempts < 1:
        raise ConfigError(f"attempts: must be >= 1, got {attempts}")
    state = _prepare_state_dir(state_dir)
    body = {"code": code, "fingerprint": fingerprint_data if fingerprint_data is not None else fingerprint()}
    timeout = aiohttp.ClientTimeout(total=timeout_s, connect=min(timeout_s, 10.0))
    jitter = rng or random.Random()
    deadline = clock.monotonic() + give_up_after_s
    own = session is None
    sess = session or client_session(ca_file)
    try:
        last = ""
        attempt = 0
        while True:
            if attempt:
                wait = full_jitter(attempt - 1, backoff_s, backoff_max_s, jitter)
                if attempts is None and clock.monotonic() + wait > deadline:
                    break
                await clock.sleep(wait)
            attempt += 1
            try:
                async with sess.post(url + "/v1/enroll", json=body, timeout=timeout) as resp:
                    status, text = resp.status, await resp.text()
            except (TimeoutError, aiohttp.ClientError, OSError) as e:
                last = f"{type(e).__name__}: {e}" if str(e) else type(e).__name__
                log.warning("enroll_unreachable", url=url, attempt=attempt, error=last)
            else:
                if status == 200:
                    return _complete(url, state, text, ca_file)
                if status in (404, 409, 410):
                    st = {
                        404: EnrollStatus.UNKNOWN_CODE,
                        409: EnrollStatus.CODE_USED,
                        410: EnrollStatus.CODE_EXPIRED,
                    }[status]
                    log.error("enroll_refused", url=url, status=status, reason=_MESSAGES[st])
                    return EnrollResult(st, _MESSAGES[st])
                if status < 500 and status != 429:
                    return EnrollResult(
                        EnrollStatus.REFUSED, f"the collector refused the enrollment ({status}): {text[:200]}"
                    )
                last = f"collector answered {status}"
                log.warning("enroll_unreachable", url=url, attempt=attempt, status=status)
            if attempts is not None and attempt >= attempts:
                break
        if attempts is None:
            return EnrollResult(
                EnrollStatus.GAVE_UP,
                f"cannot reach the collector at {url}: gave up after {give_up_after_s / 3600:g} h and "
                f"{attempt} attempts ({last}); the code has likely expired, so {REISSUE_HINT}",
            )
        return EnrollResult(
            EnrollStatus.UNREACHABLE,
            f"cannot reach the collector at {url} after {attempt} attempts ({last}); check the "
            "URL (the one 'collector board add' printed), that the collector runs and listens "
            "on an address this board can reach, then run the same command again: the code "
            "is still unused",
        )
    finally:
        if own:
            await sess.close()


def _prepare_state_dir(state_dir: str | Path) -> Path:
    state = Path(state_dir).resolve()
    try:
        state.mkdir(parents=True, exist_ok=True, mode=0o700)
    except OSError as e:
        raise ConfigError(f"--state-dir: {state}: cannot create: {e.strerror or e}") from e
    return state


def _complete(url: str, state: Path, text: str, ca_file: str | Path | None = None) -> EnrollResult:
    try:
        answer = json.loads(text)
    except ValueError:
        raise ConfigError(f"collector enroll answer: not JSON: {text[:120]!r}") from None
    if not isinstance(answer, dict):
        raise ConfigError("collector enroll answer: must be a JSON object")
    token = answer.get("token")
    if not isinstance(token, str) or not 16 <= len(token) <= 512 or any(c.isspace() for c in token):
        raise ConfigError("collector enroll answer: token: must be a string of 16-512 non-space characters")
    board = answer.get("board")
    remote = answer.get("config")
    data = agent_yaml(board, url, state, remote if isinstance(remote, dict) else None)
    if ca_file is not None:
        data["collector"]["ca_file"] = str(Path(ca_file).resolve())
    config_path = state / CONFIG_FILE
    # Validate exactly what will be written before touching anything on disk.
    parse_agent_config(data, origin=f"collector enroll answer -> {config_path}", base_dir=state)
    cache = ConfigCache(state)
    if isinstance(remote, dict):
        parse_remote_config(remote, origin="collector enroll answer: config")
    write_atomic(state / CREDENTIAL_FILE, token.encode() + b"\n", mode=0o600)
    if isinstance(remote, dict):
        cache.save(remote, None)
    write_atomic(config_path, _yaml_text(data).encode(), mode=0o644)
    log.info("board_enrolled", board=board, config=str(config_path))
    return EnrollResult(
        EnrollStatus.ENROLLED, f"enrolled as {board}; config written to {config_path}", board, config_path
    )


def agent_yaml(board: Any, url: str, state: Path, remote: dict[str, Any] | None) -> dict[str, Any]:
    """The complete ``agent.yaml`` for an enrolled board (validated by the caller)."""
    remote = remote or {}
    data: dict[str, Any] = {
        "board": board,
        "state_dir": str(state),
        "collector": {"url": url, "credential_file": CREDENTIAL_FILE, "timeout_seconds": 10.0},
        "source": {"kind": "bleak"},
        "spool": {
            "path": "spool.sqlite",
            "max_bytes": 64 * 1024 * 1024,
            "flush_seconds": _number(remote.get("flush_seconds"), 5.0),
        },
        "uplink": {"backoff_initial_seconds": 1.0, "backoff_max_seconds": 60.0},
        "heartbeat": {"period_seconds": _number(remote.get("heartbeat_seconds"), 10.0)},
        "calibration": {"offset_db": _number(remote.get("offset_db"), 0.0)},
        "log": {"format": "auto", "level": "info"},
    }
    return data


def _number(v: Any, default: float) -> float:
    return float(v) if isinstance(v, int | float) and not isinstance(v, bool) else default


def _yaml_text(data: dict[str, Any]) -> str:
    head = (
        "# Written by 'listenpost agent enroll'. The collector's config (tags, decode rules, offset)\n"
        "# is fetched at run time and wins over the values here; these are the offline defaults.\n"
    )
    return head + yaml.safe_dump(data, sort_keys=False, default_flow_style=False)


def read_code_file(path: str | Path) -> str:
    """The enrollment code from a file (the first-boot unit's credential), so it is never in argv."""
    try:
        text = Path(path).read_text().strip()
    except (OSError, UnicodeDecodeError) as e:
        raise ConfigError(f"--code-file: {path}: cannot read: {getattr(e, 'strerror', None) or e}") from e
    if not text or "\n" in text:
        raise ConfigError(f"--code-file: {path}: must hold the code on one line")
    return text


def enroll_command(
    collector_url: str,
    code: str,
    state_dir: str | Path,
    *,
    clock: Clock | None = None,
    attempts: int | None = 4,
    timeout_s: float = 10.0,
    give_up_after_s: float = GIVE_UP_AFTER_S,
    ca_file: str | Path | None = None,
) -> int:
    """``listenpost agent enroll``: print the outcome, return the exit code (0, 1 or 2)."""
    result = asyncio.run(
        enroll(
            collector_url,
            code,
            state_dir,
            clock=clock or SystemClock(),
            attempts=attempts,
            timeout_s=timeout_s,
            give_up_after_s=give_up_after_s,
            ca_file=ca_file,
        )
    )
    if result.status is EnrollStatus.ENROLLED:
        print(result.message)
    else:
        print(f"listenpost: enroll: {result.message}", file=sys.stderr)
    return EXIT_CODES[result.status]
