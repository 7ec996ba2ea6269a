"""
``listenpost`` command: one entry point, one group per part.

Each group module exposes ``register(subparsers)``; a command sets ``func(args) -> int``.
Exit codes: 0 ok, 1 runtime failure, 2 bad usage or bad config.
"""

from __future__ import annotations

import argparse
import importlib
import importlib.util
import os
import sys
from collections.abc import Sequence

from listenpost import __version__
from listenpost.core.errors import ConfigError, ListenpostError

GROUPS = (
    ("agent", "listenpost.agent.cli", "run the edge agent on a board, or replay a recording through it"),
    ("collector", "listenpost.collector.cli", "run the collector and administer boards, tags and exports"),
    ("sim", "listenpost.sim.cli", "generate a venue recording from a scenario file"),
    ("demo", "listenpost.demo", "run the collector and 16 virtual boards replaying the demo venue"),
)
# A group module registers its parser with the standard library only; what a command needs beyond the
# agent's install is imported when it runs, after this check names the extra to install.
EXTRAS = {
    "collector": ("collector", ("numpy", "asyncpg", "prometheus_client")),
    "sim": ("sim", ("numpy",)),
    "demo": ("collector", ("numpy", "asyncpg", "prometheus_client")),
}


def missing_extra(group: str) -> str | None:
    """A sentence naming the extra to install when ``group`` cannot run here, else None."""
    extra, modules = EXTRAS.get(group, ("", ()))
    missing = [m for m in modules if importlib.util.find_spec(m) is None]
    if not missing:
        return None
    return (
        f"'listenpost {group}' needs the {extra} extra, which is not installed here "
        f"(missing: {', '.join(missing)}); install it with: pip install 'listenpost[{extra}]'"
    )


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="listenpost",
        description="Run a fleet of BLE receivers: edge agent, collector, simulator and demo.",
    )
    parser.add_argument("--version", action="version", version=f"listenpost {__version__}")
    sub = parser.add_subparsers(dest="group", metavar="{agent,collector,sim,demo}", required=True)
    for name, module, help_text in GROUPS:
        importlib.import_module(module).register(sub, name, help_text)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if problem := missing_extra(args.group):
        print(f"listenpost: {problem}", file=sys.stderr)
        return 2
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
    except BrokenPipeError:
        return _reader_gone()


def _reader_gone() -> int:
    """
    stdout's reader left (``listenpost collector events | head``): stop quietly with the status a shell
    gives a writer killed by SIGPIPE. stdout goes to /dev/null first, so the interpreter's final flush
    of what is still buffered cannot raise again (the recipe of the Python docs, "Note on SIGPIPE").
    """
    devnull = os.open(os.devnull, os.O_WRONLY)
    try:
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError):
        pass
    finally:
        os.close(devnull)
    return 128 + 13  # SIGPIPE
