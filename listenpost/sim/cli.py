"""Placeholder until this part lands."""

from __future__ import annotations

import argparse


def register(sub: argparse._SubParsersAction, name: str, help_text: str) -> None:  # type: ignore[type-arg]
    p = sub.add_parser(name, help=help_text + " (not built yet)")
    p.set_defaults(func=lambda args: 1)
