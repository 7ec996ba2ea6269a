"""
``listenpost`` command: one entry point, one group per part.

Each group module exposes ``register(subparsers)``; a command sets ``func(args) -> int``.
Exit codes: 0 ok, 1 runtime failure, 2 bad usage or bad config.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence

from agent.errors import ConfigError, ListenpostError

GROUPS = (
    ("agent", "agent.cli", "run the edge agent on a board, or replay a recording through it"),
    ("collector", "collector.cli", "run the collector and administer boards, tags and exports"),
    ("sim", "listenpost.sim.cli", "generate a venue recording from a scenario file"),
    ("demo", "listenpost.demo", "run the collector and 16 virtual boards replaying the demo venue"),
)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="listenpost",
        description="Run a fleet of BLE receivers: edge agent, collector, simulator and demo.",
    )
    sub = parser.add_subparsers(dest="group", metavar="{agent,collector,sim,demo}", required=True)
    for name, module, help_text in GROUPS:
        importlib.import_module(module).register(sub, name, help_text)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except ConfigError as e:
        print(f"listenpost: {e}", file=sys.stderr)
        return 2
    except ListenpostError as e:
        print(f"listenpost: {e}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        return 130
