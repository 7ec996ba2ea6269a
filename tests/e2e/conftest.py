"""
Helpers of the end-to-end tests: quiet logs, the dry-run reference, the admin CLI in a thread, and
reading a collector's SQLite file directly.

The reference for "what a board should store" is the project's own ``agent replay --dry-run`` run as a
separate process on the same recording, tags and decode rule: the chain under test (agent service,
spool, uplink, HTTP, collector, store) must neither lose nor invent nor alter a single reading.
"""

from __future__ import annotations

import asyncio
import contextlib
import io
import json
import logging
import sqlite3
import subprocess
import sys
from collections import Counter
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

import pytest
import structlog
import yaml

REPO = Path(__file__).resolve().parents[2]
REPLAY_LOGS = REPO / "replay_logs"


def quiet_logs(path: Path) -> Any:
    """Send structlog output (warnings and up) to ``path``; returns the open file (caller closes)."""
    fh = open(path, "a", encoding="utf-8")  # noqa: SIM115 - closed by the caller
    structlog.configure(
        processors=[structlog.processors.add_log_level, structlog.processors.JSONRenderer()],
        wrapper_class=structlog.make_filtering_bound_logger(logging.WARNING),
        logger_factory=structlog.PrintLoggerFactory(fh),
        cache_logger_on_first_use=False,
    )
    return fh


@pytest.fixture
def e2e_logs(tmp_path: Path) -> Iterator[Path]:
    """Agents and collector log warnings to a file under tmp_path, not to the captured stdout."""
    path = tmp_path / "e2e.log"
    fh = quiet_logs(path)
    try:
        yield path
    finally:
        fh.close()


def dry_run_config(path: Path, board: str, rules: Sequence[dict[str, Any]]) -> Path:
    """An agent.yaml with just the board name and the venue's decode rules, for ``agent replay --dry-run``."""
    path.write_text(yaml.safe_dump({"board": board, "decode": {"rules": [dict(r) for r in rules]}}))
    return path


def dry_run_command(recording: Path, tags: Path, config: Path, offset_db: float = 0.0) -> list[str]:
    return [
        sys.executable,
        "-m",
        "listenpost",
        "agent",
        "replay",
        str(recording),
        "--dry-run",
        "--fast",
        "--tags",
        str(tags),
        "--config",
        str(config),
        "--offset-db",
        repr(offset_db),
    ]


def dry_run(recording: Path, tags: Path, config: Path, offset_db: float = 0.0) -> list[tuple[str, int, int]]:
    """``agent replay --dry-run`` as a subprocess: every reading as (tag, board ms, RSSI in 0.1 dB)."""
    proc = subprocess.run(
        dry_run_command(recording, tags, config, offset_db),
        capture_output=True,
        text=True,
        timeout=240,
        check=False,
    )
    assert proc.returncode == 0, proc.stderr[-2000:]
    return parse_dry_run(proc.stdout)


def parse_dry_run(text: str) -> list[tuple[str, int, int]]:
    out = []
    for line in text.splitlines():
        d = json.loads(line)
        out.append((d["tag"], round(d["t"] * 1000), round(d["rssi"] * 10)))
    return out


def dry_run_to_file(recording: Path, tags: Path, config: Path, out: Path) -> None:
    """The same with stdout to ``out`` (the hour's outputs are large); run it in a thread from async code."""
    with open(out, "wb") as fh:
        proc = subprocess.run(
            dry_run_command(recording, tags, config),
            stdout=fh,
            stderr=subprocess.PIPE,
            timeout=600,
            check=False,
        )
    assert proc.returncode == 0, proc.stderr.decode()[-2000:]


def cli(argv: Sequence[str]) -> tuple[int, str]:
    """``listenpost.cli.main(argv)`` with its stdout captured (run it in a thread: it runs its own loop)."""
    from listenpost.cli import main

    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        code = main(list(argv))
    return code, buf.getvalue()


async def cli_async(argv: Sequence[str]) -> tuple[int, str]:
    """`cli` from async code: a worker thread, so this loop keeps serving the collector meanwhile."""
    return await asyncio.to_thread(cli, argv)


def stored_readings(db: Path, board: str) -> list[tuple[str, int, int]]:
    """(tag, board ms, RSSI in 0.1 dB) of every reading stored for ``board``, read from the SQLite file."""
    with contextlib.closing(sqlite3.connect(f"file:{db}?mode=ro", uri=True)) as con:
        return con.execute(
            "SELECT t.tag, r.t_board_ms, r.rssi_dd FROM readings r JOIN tags t ON t.id = r.tag_id "
            "JOIN boards b ON b.id = r.board_id WHERE b.name = ?",
            (board,),
        ).fetchall()


def stored_counts(db: Path) -> Counter[str]:
    with contextlib.closing(sqlite3.connect(f"file:{db}?mode=ro", uri=True)) as con:
        return Counter(
            dict(
                con.execute(
                    "SELECT b.name, count(*) FROM readings r JOIN boards b ON b.id = r.board_id GROUP BY b.name"
                ).fetchall()
            )
        )


def all_text(db: Path) -> str:
    """Every text value of every column of every table in the SQLite file, joined by newlines."""
    parts: list[str] = []
    with contextlib.closing(sqlite3.connect(f"file:{db}?mode=ro", uri=True)) as con:
        tables = [r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type = 'table'")]
        for table in tables:
            cols = [r[1] for r in con.execute(f'PRAGMA table_info("{table}")')]
            for col in cols:
                parts += [
                    v
                    for (v,) in con.execute(f'SELECT "{col}" FROM "{table}" WHERE typeof("{col}") = \'text\'')
                ]
    return "\n".join(parts)


def state_changes(db: Path) -> list[tuple[float, str, str | None, str]]:
    """(collector time, board, old, new) of every stored state change, in order."""
    with contextlib.closing(sqlite3.connect(f"file:{db}?mode=ro", uri=True)) as con:
        rows = con.execute(
            "SELECT e.at, b.name, e.detail FROM events e JOIN boards b ON b.id = e.board_id "
            "WHERE e.kind = 'state_changed' ORDER BY e.id"
        ).fetchall()
    return [(at, board, json.loads(d).get("old"), json.loads(d)["new"]) for at, board, d in rows]
