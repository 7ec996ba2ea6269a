"""``listenpost agent ...``: argument parsing only; the work lives in the modules it calls."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any

from listenpost.core.errors import ConfigError

if TYPE_CHECKING:
    from listenpost.agent.config import AgentConfig


def register(sub: argparse._SubParsersAction, name: str, help_text: str) -> None:  # type: ignore[type-arg]
    p = sub.add_parser(name, help=help_text, description=help_text)
    cmds = p.add_subparsers(dest="command", metavar="{run,replay,enroll,record,check-config}", required=True)

    run = cmds.add_parser(
        "run",
        help="scan and upload until stopped (what the systemd unit runs)",
        description="Scan with the configured source, spool durably and upload to the collector.",
    )
    run.add_argument(
        "--config", required=True, type=Path, metavar="FILE", help="agent.yaml (written by 'agent enroll')"
    )
    run.set_defaults(func=_run)

    rp = cmds.add_parser(
        "replay",
        help="replay recordings or btsnoop captures through the agent",
        description="Replay recorded logs (.jsonl, .jsonl.gz) or btsnoop captures (detected by content) "
        "through decode, filter and calibrate. With --dry-run, print one JSON object per reading "
        "on stdout and a summary on stderr; without it, upload as the board of --config "
        "(the collector places the recording so that it ends when the replay ends).",
    )
    rp.add_argument(
        "files", nargs="+", type=Path, metavar="FILE", help="recorded log or btsnoop capture (gzip'd or not)"
    )
    rp.add_argument("--dry-run", action="store_true", help="upload nothing; print what the board would send")
    rp.add_argument(
        "--config",
        type=Path,
        metavar="FILE",
        help="agent.yaml: board, decode rules, tags, offset, collector (an enrolled board's "
        "cached collector config counts)",
    )
    rp.add_argument(
        "--tags",
        type=Path,
        metavar="TAGFILE",
        help="registered tags: one canonical ID per line, '#' comments",
    )
    rp.add_argument(
        "--offset-db", type=float, metavar="DB", help="board RSSI offset in dB (overrides the config)"
    )
    speed = rp.add_mutually_exclusive_group()
    speed.add_argument(
        "--speed", type=float, metavar="S", help="replay S times faster than recorded (default 1)"
    )
    speed.add_argument("--fast", action="store_true", help="replay as fast as possible")
    rp.set_defaults(func=_replay)

    en = cmds.add_parser(
        "enroll",
        help="exchange a one-time enrollment code for this board's credential",
        description="Enroll this board with the collector; store the credential (mode 0600) "
        "and write a complete agent.yaml into the state directory.",
    )
    en.add_argument(
        "--collector", required=True, metavar="URL", help="collector base URL, e.g. http://10.0.0.2:8470"
    )
    code = en.add_mutually_exclusive_group(required=True)
    code.add_argument("--code", help="enrollment code printed by 'collector board add'")
    code.add_argument(
        "--code-file",
        type=Path,
        metavar="FILE",
        help="read the code from FILE (the enroll unit passes its systemd credential), keeping it out of argv",
    )
    en.add_argument(
        "--until-enrolled",
        action="store_true",
        help="retry an unreachable collector (capped, jittered backoff) until enrolled or the code is "
        "refused, for up to --give-up-after hours; what the first-boot enroll unit runs",
    )
    en.add_argument(
        "--give-up-after",
        type=float,
        default=80.0,
        metavar="HOURS",
        help="with --until-enrolled: stop trying after this long (default %(default)s h, past a code's lifetime)",
    )
    en.add_argument(
        "--state-dir",
        type=Path,
        default=Path("/var/lib/listenpost/agent"),
        metavar="DIR",
        help="where the credential, config, cache and spool live (default %(default)s)",
    )
    en.add_argument(
        "--ca-file",
        type=Path,
        metavar="PEM",
        help="trust only this CA for the collector's certificate (a private or self-signed one)",
    )
    en.set_defaults(func=_enroll)

    rec = cmds.add_parser(
        "record",
        help="record a live source to the replay format",
        description="Write every advertisement the source hears to a recorded log "
        "(JSON Lines; gzip'd when FILE ends in .gz), for replay later.",
    )
    rec.add_argument("--out", required=True, type=Path, metavar="FILE", help="recording to write")
    rec.add_argument(
        "--config",
        type=Path,
        metavar="FILE",
        help="agent.yaml whose source section to use (default: bleak, default adapter)",
    )
    rec.add_argument("--source", choices=("bleak", "hci"), help="override the source kind")
    rec.add_argument("--adapter", metavar="hciN", help="adapter to scan with")
    rec.add_argument(
        "--seconds", type=float, metavar="S", help="stop after this many seconds (default: until Ctrl-C)"
    )
    rec.set_defaults(func=_record)

    cc = cmds.add_parser(
        "check-config",
        help="validate an agent.yaml and print what it means",
        description="Load and validate an agent.yaml; exit 2 with the key path on error.",
    )
    cc.add_argument("file", type=Path, metavar="FILE", help="agent.yaml")
    cc.set_defaults(func=_check_config)


def _run(args: argparse.Namespace) -> int:
    from listenpost.agent.service import run_command

    return run_command(args.config)


def _replay(args: argparse.Namespace) -> int:
    from listenpost.agent.runner import replay_command

    if args.speed is not None and args.speed <= 0:
        raise ConfigError(f"--speed: must be > 0, got {args.speed}")
    return replay_command(
        args.files,
        dry_run=args.dry_run,
        config=args.config,
        tags=args.tags,
        offset_db=args.offset_db,
        speed=0.0 if args.fast else (args.speed or 1.0),
    )


def _enroll(args: argparse.Namespace) -> int:
    from listenpost.agent.client.enroll import enroll_command, read_code_file

    if not args.give_up_after > 0:
        raise ConfigError(f"--give-up-after: must be > 0, got {args.give_up_after}")
    code = args.code if args.code is not None else read_code_file(args.code_file)
    return enroll_command(
        args.collector,
        code,
        args.state_dir,
        attempts=None if args.until_enrolled else 4,
        give_up_after_s=args.give_up_after * 3600.0,
        ca_file=args.ca_file,
    )


def _record(args: argparse.Namespace) -> int:
    from listenpost.agent.record import record_command

    return record_command(
        args.out, config=args.config, source=args.source, adapter=args.adapter, seconds=args.seconds
    )


def _check_config(args: argparse.Namespace) -> int:
    from listenpost.agent.config import load_agent_config

    cfg = load_agent_config(args.file)
    json.dump(config_as_yaml(cfg), sys.stdout, indent=2)
    print(f"\n{args.file}: ok", file=sys.stderr)
    return 0


def config_as_yaml(cfg: AgentConfig) -> dict[str, Any]:
    """The config under agent.yaml's own sections and keys, defaults filled in; it reads back the same."""
    from dataclasses import asdict

    from listenpost.core.settings import rule_to_json

    c, s = cfg.collector, cfg.source
    return {
        "board": cfg.board,
        "state_dir": cfg.state_dir,
        "collector": {k: v for k, v in asdict(c).items() if v is not None},
        "source": {k: list(v) if isinstance(v, tuple) else v for k, v in asdict(s).items() if v is not None},
        "tags": {"file": cfg.tags_file} if cfg.tags_file is not None else {},
        "decode": {"rules": [rule_to_json(r) for r in cfg.rules]},
        "calibration": {"offset_db": cfg.offset_db},
        "spool": asdict(cfg.spool),
        "uplink": asdict(cfg.uplink),
        "heartbeat": {"period_seconds": cfg.heartbeat_seconds},
        "log": {"format": cfg.log_format, "level": cfg.log_level},
    }
