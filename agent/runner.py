"""
``listenpost agent replay``: recordings and btsnoop captures through the agent.

With ``--dry-run`` nothing is uploaded: every reading the board would send is printed on stdout as
one JSON object per line, ``{"tag": ID, "rssi": dBm after offset, "t": board seconds}`` (plus a
``"telemetry"`` object for Eddystone-TLM frames), and a summary goes to stderr. Tags, decode rules and
offset are the board's: for an enrolled board (``--config`` with a collector) the collector's cached
config, as ``agent run`` uses it; else the config's own; ``--tags`` and ``--offset-db`` override both.

Without ``--dry-run`` the recording is uploaded as the board of ``--config`` by the agent service, on a
board clock of its own (`replay_board_clock`): the collector places the recording so that it ends when
its replay ends, whatever the uptime of the machine replaying it.
"""

from __future__ import annotations

import asyncio
import json
import os
import statistics
import sys
from collections import Counter
from collections.abc import Sequence
from pathlib import Path
from typing import IO, TYPE_CHECKING, Any

from listenpost.agent.client.remote_config import ConfigCache
from listenpost.agent.config import AgentConfig, SourceConfig, load_agent_config
from listenpost.agent.pipeline import Pipeline, build_pipeline
from listenpost.agent.pipeline.calibrate import Calibrate
from listenpost.agent.service import run_agent
from listenpost.agent.sources import open_replay, replay_board_clock
from listenpost.core.clock import Clock, SystemClock
from listenpost.core.errors import CaptureFormatError, ConfigError
from listenpost.core.identity import BUILTIN_KINDS, load_tag_file
from listenpost.core.logs import configure
from listenpost.core.records import Reading
from listenpost.core.settings import DecodeRule

if TYPE_CHECKING:
    import aiohttp

_PER_TAG_LINES = 40
"""Tags listed one by one in the summary; the rest are summed up."""


def _tags_path(tags: Path | None, cfg: AgentConfig | None) -> Path:
    if tags is not None:
        return tags
    if cfg is not None and cfg.tags_file:
        return cfg.state_path(cfg.tags_file)
    where = f" ({cfg.origin} has no tags.file)" if cfg is not None else ""
    raise ConfigError(
        f"no registered tags: give --tags TAGFILE, or --config agent.yaml with tags.file{where}"
    )


def _board_settings(
    cfg: AgentConfig | None, tags: Path | None, offset_db: float | None
) -> tuple[frozenset[str], tuple[DecodeRule, ...], float]:
    """Registered tags, decode rules and offset the board of ``cfg`` would use, as `AgentService` picks them."""

    cached = ConfigCache(cfg.state_dir).load() if cfg is not None and cfg.collector.url else None
    if cached is not None:
        registered, rules, offset = cached.tags, cached.rules, cached.offset_db
    else:
        registered = frozenset() if tags is not None else load_tag_file(_tags_path(None, cfg))
        rules = cfg.rules if cfg is not None else ()
        offset = cfg.offset_db if cfg is not None else 0.0
    if tags is not None:
        registered = load_tag_file(tags)
    return registered, rules, offset_db if offset_db is not None else offset


def _rule_hint(registered: frozenset[str], rules: Sequence[DecodeRule]) -> str | None:
    """Why some registered tags can never be heard: their decode rule is not configured."""
    known = set(BUILTIN_KINDS) | {r.name for r in rules}
    missing = Counter(t.split(":", 1)[0] for t in registered if t.split(":", 1)[0] not in known)
    if not missing:
        return None
    names = ", ".join(f"{n!r} ({k} tags)" for n, k in sorted(missing.items()))
    return (
        f"note: no decode rule for {names}: these tags cannot be heard; give --config with "
        "decode.rules (DEVELOPERS.md, 'How to add a decode rule')"
    )


def reading_json(r: Reading) -> dict[str, Any]:
    """The dry-run line for one reading (RSSI in 0.1 dB steps, as the wire carries it)."""
    out: dict[str, Any] = {"tag": r.tag, "rssi": round(r.rssi_dbm, 1), "t": r.t_mono_ns / 1e9}
    tel = r.telemetry
    if tel is not None:
        out["telemetry"] = {
            k: v
            for k, v in (
                ("battery_mv", tel.battery_mv),
                ("temperature_c", tel.temperature_c),
                ("adv_count", tel.adv_count),
                ("uptime_s", tel.uptime_s),
            )
            if v is not None
        }
    return out


def _summary(pipeline: Pipeline, per_tag: Counter[str], elapsed_s: float, files: Sequence[Path]) -> str:
    s = pipeline.stats()
    lines = [
        f"replayed {len(files)} file(s) in {elapsed_s:.2f} s",
        f"  adverts read        {s['adverts_total']}",
        f"  decoded             {s['adverts_decoded']}",
        f"  registered          {s['adverts_registered']}",
        f"  dropped             {s['dropped_unregistered'] + s['no_identity']} "
        f"(unregistered identity {s['dropped_unregistered']}, no identity {s['no_identity']})",
        f"  decode errors       {s['decode_errors']}",
        f"  TLM unmatched       {s['tlm_unmatched']}",
        f"  readings            {s['readings_total']} from {len(per_tag)} of {s['registered_tags']} registered tags",
    ]
    if per_tag:
        counts = sorted(per_tag.values())
        lines.append(
            f"  readings per tag    min {counts[0]}, median {statistics.median(counts):g}, max {counts[-1]}"
        )
        for tag, n in sorted(per_tag.items())[:_PER_TAG_LINES]:
            lines.append(f"    {n:8d}  {tag}")
        if len(per_tag) > _PER_TAG_LINES:
            rest = sorted(per_tag.items())[_PER_TAG_LINES:]
            lines.append(f"    {sum(n for _, n in rest):8d}  ({len(rest)} more tags)")
    return "\n".join(lines)


async def _dry_run(files: Sequence[Path], pipeline: Pipeline, speed: float, out: IO[str]) -> Counter[str]:

    clock = SystemClock()
    source = open_replay(list(files), clock, speed)
    per_tag: Counter[str] = Counter()
    write = out.write
    dumps = json.JSONEncoder(separators=(", ", ": ")).encode

    def sink(r: Reading) -> None:
        per_tag[r.tag] += 1
        write(dumps(reading_json(r)) + "\n")

    await pipeline.run(source, sink)
    return per_tag


def replay_command(
    files: Sequence[Path],
    *,
    dry_run: bool,
    config: Path | None,
    tags: Path | None,
    offset_db: float | None,
    speed: float,
) -> int:
    """
    Run ``listenpost agent replay``.

    Args:
        files: recorded logs or btsnoop captures, replayed in order.
        dry_run: print readings instead of uploading.
        config: agent.yaml (decode rules, tags file, offset; required without ``dry_run``).
        tags: tag file; overrides the config's ``tags.file``.
        offset_db: board RSSI offset in dB; overrides the config's ``calibration.offset_db``.
        speed: replay speed factor; 0 means as fast as possible.

    Returns:
        0 on success, 2 for a bad file (message on stderr names ``file:line``).

    Raises:
        ConfigError: missing tags, bad tag file, bad config or offset (the CLI exits 2).
    """

    cfg = load_agent_config(config) if config is not None else None
    if not dry_run:
        return _upload(files, cfg, tags, offset_db, speed)
    # stdout carries the readings; log lines (a capture with losses, say) go to stderr.
    configure(cfg.log_format if cfg is not None else "auto", "warning", stream=sys.stderr)  # type: ignore[arg-type]

    registered, rules, offset = _board_settings(cfg, tags, offset_db)
    pipeline = build_pipeline(registered, rules, offset)

    clock = SystemClock()
    t0 = clock.monotonic()
    try:
        per_tag = asyncio.run(_dry_run(files, pipeline, speed, sys.stdout))
        sys.stdout.flush()
    except CaptureFormatError as e:
        sys.stdout.flush()
        print(f"listenpost: {e}", file=sys.stderr)
        return 2
    except BrokenPipeError:
        # The reader went away (``| head``): stop quietly. Python's docs (signal, "Note on SIGPIPE")
        # point stdout at devnull so the flush at exit does not fail a second time.
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0
    print(_summary(pipeline, per_tag, clock.monotonic() - t0, files), file=sys.stderr)
    hint = _rule_hint(registered, rules)
    if hint:
        print(hint, file=sys.stderr)
    return 0


async def upload_replay(
    cfg: AgentConfig,
    files: Sequence[Path],
    speed: float,
    base: Clock,
    *,
    session: aiohttp.ClientSession | None = None,
) -> int:
    """
    Upload ``files`` as the board of ``cfg`` through the agent service, on `replay_board_clock`.

    Returns:
        The service's exit code: 0 once the spool drained, 1 if it did not in time.
    """

    clock = await replay_board_clock(files, speed, base)
    # The service reports this kind in its logs and heartbeats: say what is really feeding it.
    cfg = cfg.replace(source=SourceConfig(kind="replay", files=tuple(str(f) for f in files), speed=speed))
    source = open_replay(list(files), clock, speed)
    return await run_agent(cfg, clock=clock, source=source, exit_when_source_ends=True, session=session)


def _upload(
    files: Sequence[Path], cfg: AgentConfig | None, tags: Path | None, offset_db: float | None, speed: float
) -> int:
    if cfg is None:
        raise ConfigError("--config: required without --dry-run (the recording is uploaded as that board)")
    if tags is not None:
        load_tag_file(tags)  # fail now, with file:line, rather than inside the service
        cfg = cfg.replace(tags_file=str(tags.resolve()))
    if offset_db is not None:
        cfg = cfg.replace(offset_db=Calibrate(offset_db).offset_db)  # same range check as the config

    configure(cfg.log_format, cfg.log_level)  # type: ignore[arg-type]
    try:
        return int(asyncio.run(upload_replay(cfg, files, speed, SystemClock())) or 0)
    except CaptureFormatError as e:
        print(f"listenpost: {e}", file=sys.stderr)
        return 2
