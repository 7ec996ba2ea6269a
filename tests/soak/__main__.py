"""
``python -m tests.soak``: the fault-injection soak (``make soak``). See docs/soak.md.

Real ``listenpost collector serve`` and ``listenpost agent run`` processes on loopback, a private
PostgreSQL cluster, faults injected by PID; prints one table row per fault and, on a full run,
writes the table into docs/soak.md between its markers.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import platform
import random
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from datetime import UTC, datetime
from pathlib import Path

from tests.soak.faults import FULL, NEEDS_PG, QUICK, Ctx, Row, all_faults
from tests.soak.harness import PrivatePostgres, dry_run, listenpost, reap

REPO = Path(__file__).resolve().parents[2]
DOC = REPO / "docs" / "soak.md"
BEGIN, END = "<!-- soak:begin -->", "<!-- soak:end -->"
BOARDS = ("g3-a", "g0-a")
"""The venue boards the agents replay (no scripted fault in their first minutes)."""


def machine() -> str:
    cpu = platform.processor() or platform.machine()
    with open("/proc/cpuinfo", encoding="utf-8") as fh:
        for line in fh:
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    mem = "?"
    with open("/proc/meminfo", encoding="utf-8") as fh:
        for line in fh:
            if line.startswith("MemTotal"):
                mem = f"{int(line.split()[1]) / 1024 / 1024:.1f} GiB"
                break
    return (
        f"{platform.machine()}, {cpu}, {os.cpu_count()} CPUs, {mem} RAM, Python {platform.python_version()}"
    )


def head_commit() -> str:
    """HEAD at the end of the run, and how many tracked files then differed from it (the run measures the tree)."""

    def git(*args: str) -> str:
        proc = subprocess.run(
            ["git", *args], cwd=REPO, capture_output=True, text=True, check=False, timeout=30
        )
        return proc.stdout.strip()

    head = git("rev-parse", "--short", "HEAD") or "?"
    changed = [line for line in git("status", "--porcelain", "-uno").splitlines() if line.strip()]
    return f"`{head}`" + (f" ({len(changed)} tracked files changed in the working tree)" if changed else "")


RESULT = {True: "pass", False: "**FAIL**", None: "not run"}


def table(rows: list[Row]) -> str:
    head = (
        "| fault | lossy window (docs/reliability.md) | readings expected | stored | duplicates | HTTP 500s "
        "| time to recover | leaders at once (max) | stopped within 30 s | result |"
    )
    out = [head, "|" + "---|" * 10]
    for r in rows:
        out.append(
            f"| {r.fault} | {r.window} | {r.expected:,} | {r.stored:,} | {r.duplicates:,} | {r.http_500} "
            f"| {r.recover_s} | {r.leaders_max} | {r.stopped_in_time} | {RESULT[r.ok]} |"
        )
    notes = [f"- {r.fault}: " + " ".join("; ".join(r.notes).split()) for r in rows if r.notes]
    return "\n".join(out) + ("\n\nNotes:\n\n" + "\n".join(notes) if notes else "")


def write_doc(text: str) -> None:
    doc = DOC.read_text(encoding="utf-8")
    if BEGIN not in doc or END not in doc:
        raise SystemExit(f"{DOC}: the markers {BEGIN} and {END} are missing")
    head, rest = doc.split(BEGIN, 1)
    _, tail = rest.split(END, 1)
    DOC.write_text(head + BEGIN + "\n" + text + "\n" + END + tail, encoding="utf-8")


def prepare(root: Path, minutes: float, seed: int) -> tuple[Path, dict, dict]:
    venue = root / "venue"
    subprocess.run(
        listenpost(
            "sim", "brackenford", "--minutes", str(minutes), "--out", str(venue), "--btsnoop-board", "none"
        ),
        check=True,
        capture_output=True,
        timeout=300,
    )
    truth_doc = json.loads((venue / "truth.json").read_text())
    rules = truth_doc["decode_rules"]
    truth = {b: dry_run(venue / f"{b}.jsonl.gz", venue / "tags.txt", rules, root) for b in BOARDS}
    return venue, truth_doc, truth


PREFLIGHT = (
    "import listenpost.agent.service, listenpost.collector.app, listenpost.collector.store.sqlite, "
    "listenpost.collector.store.postgres"
)


async def preflight(root: Path, bound_s: float = 180.0) -> str:
    """Empty when the tree the children will run imports; else the error after ``bound_s`` of retries."""
    t0 = time.monotonic()
    while True:
        proc = await asyncio.to_thread(
            subprocess.run,
            [sys.executable, "-c", PREFLIGHT],
            cwd=str(root),
            capture_output=True,
            text=True,
            timeout=120,
            check=False,
        )
        if proc.returncode == 0:
            return ""
        if time.monotonic() - t0 > bound_s:
            return proc.stderr.strip().splitlines()[-1] if proc.stderr.strip() else f"exit {proc.returncode}"
        print("soak: the tree does not import yet, retrying in 10 s", flush=True)
        await asyncio.sleep(10)


async def main_async(args: argparse.Namespace) -> int:
    params = QUICK if args.quick else FULL
    seed = args.seed if args.seed is not None else random.SystemRandom().randrange(1 << 30)
    root = Path(tempfile.mkdtemp(prefix="lp-soak-"))
    print(f"soak: seed {seed}, work dir {root}, {'quick' if args.quick else 'full'} run", flush=True)
    problem = await preflight(root)
    if problem:
        print(f"soak: the collector and agent do not import: {problem}", flush=True)
        shutil.rmtree(root, ignore_errors=True)
        return 2
    started = time.monotonic()
    minutes = 3.0 if args.quick else 6.0
    venue, truth_doc, truth = prepare(root, minutes, seed)
    tags = [
        line.strip()
        for line in (venue / "tags.txt").read_text().splitlines()
        if line.strip() and not line.strip().startswith("#")
    ]
    ctx = Ctx(
        root=root,
        params=params,
        rng=random.Random(seed),
        venue=venue,
        rules=truth_doc["decode_rules"],
        tags=tags,
        truth=truth,
        recording_s=float(truth_doc["duration_s"]),
    )
    print(
        "soak: dry run expects " + ", ".join(f"{b} {len(v):,} readings" for b, v in truth.items()),
        flush=True,
    )
    faults = [(n, f) for n, f in all_faults(ctx) if not args.only or n in args.only]
    if any(n in NEEDS_PG for n, _ in faults):
        try:
            ctx.pg = PrivatePostgres(root)
            await asyncio.to_thread(ctx.pg.init)
            print(f"soak: private PostgreSQL on port {ctx.pg.port}", flush=True)
        except (RuntimeError, OSError, subprocess.SubprocessError) as e:
            detail = getattr(e, "stderr", b"") or b""
            ctx.pg_problem = f"{e} {detail.decode(errors='replace')[-300:]}".strip()
            print(f"soak: no private PostgreSQL: {ctx.pg_problem}", flush=True)
            ctx.pg = None
    rows: list[Row] = []
    try:
        for name, factory in faults:
            t = time.monotonic()
            if name in NEEDS_PG and ctx.pg is None:
                row = Row(
                    name, "-", ok=None, notes=[f"not run: no private PostgreSQL ({ctx.pg_problem[-200:]})"]
                )
            else:
                print(f"soak: {name} ...", flush=True)
                try:
                    row = await factory()
                except Exception as e:  # noqa: BLE001 - one broken row must not cost the others
                    row = Row(name, "-", ok=False, notes=[f"harness: {type(e).__name__}: {e}"])
            rows.append(row)
            print(
                f"soak: {name}: {RESULT[row.ok]} in {time.monotonic() - t:.0f} s "
                f"(expected {row.expected:,}, stored {row.stored:,}, duplicates {row.duplicates}, "
                f"500s {row.http_500}, recover {row.recover_s}, leaders {row.leaders_max}) {'; '.join(row.notes)}",
                flush=True,
            )
    finally:
        if ctx.pg is not None:
            await asyncio.to_thread(ctx.pg.stop)
    took = time.monotonic() - started
    when = datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC")
    commit = await asyncio.to_thread(head_commit)
    text = (
        f"Run {when} at commit {commit}, {'quick' if args.quick else 'full'} run, seed {seed}, "
        f"{took / 60:.1f} min.\n\nMachine: {machine()}.\n\n{table(rows)}"
    )
    print()
    print(text)
    if args.write_doc or (not args.quick and not args.only and not args.no_doc):
        write_doc(text)
        print(f"\nsoak: table written to {DOC.relative_to(REPO)}")
    if args.keep:
        print(f"soak: logs kept in {root}")
    else:
        shutil.rmtree(root, ignore_errors=True)
    return 0 if all(r.ok is True for r in rows) else 1


def main(argv: list[str] | None = None) -> int:
    names = [n for n, _ in all_faults(None)]  # type: ignore[arg-type]
    ap = argparse.ArgumentParser(
        prog="python -m tests.soak",
        description=(
            "Fault-injection soak with real collector and agent processes on loopback and a private "
            "PostgreSQL cluster. Prints one row per fault; a full run (about 25 min) also writes the "
            "table into docs/soak.md. Exit 1 if any fault failed."
        ),
    )
    ap.add_argument(
        "--quick",
        action="store_true",
        help="short version for iterating: 2 kills per loop, a 15 s outage, 50 boards for 20 s (about 6 min)",
    )
    ap.add_argument(
        "--only", nargs="+", choices=names, metavar="FAULT", help="run only these: " + ", ".join(names)
    )
    ap.add_argument("--seed", type=int, help="seed of the kill moments and the load's phases (printed)")
    ap.add_argument("--no-doc", action="store_true", help="do not write docs/soak.md after a full run")
    ap.add_argument(
        "--write-doc", action="store_true", help="write docs/soak.md even after --quick or --only"
    )
    ap.add_argument("--keep", action="store_true", help="keep the work folder (logs, databases) for reading")
    args = ap.parse_args(argv)

    def on_term(signum: int, frame: object) -> None:
        raise SystemExit(128 + signum)  # unwinds through the finally blocks: children and the cluster stop

    signal.signal(signal.SIGTERM, on_term)
    try:
        return asyncio.run(main_async(args))
    finally:
        reap()


if __name__ == "__main__":
    sys.exit(main())
