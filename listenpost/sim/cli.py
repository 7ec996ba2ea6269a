"""``listenpost sim <scenario> --minutes N --out DIR [--seed S]``: argument parsing only."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from listenpost.core.errors import ConfigError


def register(sub: argparse._SubParsersAction, name: str, help_text: str) -> None:  # type: ignore[type-arg]
    p = sub.add_parser(
        name,
        help=help_text,
        description="Simulate a venue from a scenario file and write one gzip'd recording per board, a btsnoop "
        "capture of one board, truth.json (true rooms, board offsets, clocks, faults) and tags.txt.",
    )
    p.add_argument(
        "scenario",
        metavar="scenario",
        help="scenario YAML file, or the name of a shipped scenario (brackenford)",
    )
    p.add_argument(
        "--minutes", required=True, type=float, metavar="N", help="length of the recording, minutes"
    )
    p.add_argument(
        "--out", required=True, type=Path, metavar="DIR", help="output directory (created if missing)"
    )
    p.add_argument("--seed", type=int, metavar="S", help="random seed (default: the scenario's own)")
    p.add_argument(
        "--btsnoop-board",
        default="g0-a",
        metavar="BOARD",
        help="board whose adverts also go to a btsnoop capture (default %(default)s; 'none' for none)",
    )
    p.set_defaults(func=_run)


def _run(args: argparse.Namespace) -> int:
    from listenpost.core.logs import configure
    from listenpost.sim.generate import generate
    from listenpost.sim.scenario import load_scenario

    configure("auto")

    if not args.minutes > 0:
        raise ConfigError(f"--minutes: must be > 0, got {args.minutes}")
    if args.seed is not None and args.seed < 0:
        raise ConfigError(f"--seed: must be >= 0, got {args.seed}")
    scenario = load_scenario(args.scenario)
    board = None if args.btsnoop_board == "none" else args.btsnoop_board
    if board is not None and board not in [b.name for b in scenario.boards]:
        raise ConfigError(f"--btsnoop-board: {board!r} is not a board of {scenario.origin}")
    result = generate(scenario, args.minutes, args.out, seed=args.seed, btsnoop_board=board)
    summary = {
        "out": str(result.out_dir),
        "files": [p.name for p in result.files],
        "adverts": sum(result.lines.values()),
        "seconds": {k: round(v, 2) for k, v in result.seconds.items()},
    }
    print(json.dumps(summary), file=sys.stderr)
    return 0
