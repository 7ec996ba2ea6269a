"""
The soak's moving parts: real ``listenpost`` processes on loopback, started and stopped by PID, a
private PostgreSQL cluster, enrollment through the admin API, and the oracle that compares what the
collector stored with what the boards were given (``agent replay --dry-run`` of the same recording).

Every wait here is bounded; a bound that runs out is recorded, never waited past.
"""

from __future__ import annotations

import asyncio
import contextlib
import gzip
import json
import os
import pwd
import resource
import shutil
import signal
import socket
import sqlite3
import subprocess
import sys
import tempfile
import threading
import time
from collections import Counter
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any

import aiohttp
import yaml

STOP_TIMEOUT_S = 30.0
"""A clean stop must end within this (TimeoutStopSec of systemd/listenpost-*.service)."""
LISTEN_TIMEOUT_S = 60.0
"""Longest wait for a started collector to answer /v1/status (imports and migrations on a busy machine)."""
HTTP_TIMEOUT = aiohttp.ClientTimeout(total=10)

Reading = tuple[str, int, int]
"""(tag, board ms, RSSI in 0.1 dB): one reading as the dry run prints it and the store holds it."""


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _iso_to_unix(ts: str) -> float:
    return datetime.fromisoformat(ts.replace("Z", "+00:00")).timestamp()


# ---------------------------------------------------------------- processes


STARTED: list[Proc] = []
"""Every child this run started, so an interrupted soak leaves none behind (`reap`)."""


def reap() -> None:
    """SIGKILL every child of this run still alive, by its PID."""
    for p in STARTED:
        if p.alive():
            with contextlib.suppress(ProcessLookupError):
                os.kill(p.pid, signal.SIGKILL)
            with contextlib.suppress(subprocess.TimeoutExpired):
                p.popen.wait(timeout=10)


class Proc:
    """
    One child process by PID. Its stdout and stderr go through a pipe to a log file (a pipe is not
    subject to the child's RLIMIT_FSIZE); JSON lines are kept parsed for the scenario to read.
    """

    def __init__(self, argv: list[str], log: Path, *, fsize_limit: int | None = None) -> None:
        self.argv = argv
        self.log_path = log
        self.lines: list[dict[str, Any]] = []
        self._lock = threading.Lock()

        def limit() -> None:  # runs in the child between fork and exec
            signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # a write past the cap fails with EFBIG instead
            if fsize_limit is not None:
                resource.setrlimit(resource.RLIMIT_FSIZE, (fsize_limit, resource.RLIM_INFINITY))

        self.started_at = time.time()
        self.popen = subprocess.Popen(
            argv,
            stdout=subprocess.PIPE,
            stderr=subprocess.STDOUT,
            stdin=subprocess.DEVNULL,
            preexec_fn=limit,
            cwd=str(log.parent),  # not the source tree: PYTHONPATH decides which listenpost the child runs
            env={**os.environ, "PYTHONUNBUFFERED": "1"},
        )
        self.pid = self.popen.pid
        STARTED.append(self)
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()

    def _read(self) -> None:
        assert self.popen.stdout is not None
        with self.log_path.open("ab") as fh:
            for raw in self.popen.stdout:
                fh.write(raw)
                fh.flush()
                try:
                    d = json.loads(raw)
                except ValueError:
                    continue
                if isinstance(d, dict):
                    d.setdefault("_seen", time.time())
                    with self._lock:
                        self.lines.append(d)

    def events(self, name: str | None = None) -> list[dict[str, Any]]:
        with self._lock:
            return [d for d in self.lines if name is None or d.get("event") == name]

    def alive(self) -> bool:
        return self.popen.poll() is None

    def set_fsize_limit(self, limit: int | None) -> None:
        """Change the running child's file-size cap (prlimit(2) on its PID); None lifts it."""
        value = resource.RLIM_INFINITY if limit is None else limit
        resource.prlimit(self.pid, resource.RLIMIT_FSIZE, (value, resource.RLIM_INFINITY))

    def kill9(self) -> None:
        if self.alive():
            os.kill(self.pid, signal.SIGKILL)
        self.popen.wait(timeout=30)
        self._reader.join(timeout=5)

    def stop(self, timeout: float = STOP_TIMEOUT_S) -> bool:
        """SIGTERM, then wait at most ``timeout``; True if it ended in time (else it is killed)."""
        if not self.alive():
            self._reader.join(timeout=5)
            return True
        os.kill(self.pid, signal.SIGTERM)
        try:
            self.popen.wait(timeout=timeout)
            ok = True
        except subprocess.TimeoutExpired:
            os.kill(self.pid, signal.SIGKILL)
            self.popen.wait(timeout=30)
            ok = False
        self._reader.join(timeout=5)
        return ok


def listenpost(*args: str) -> list[str]:
    return [sys.executable, "-m", "listenpost", *args]


# ---------------------------------------------------------------- private PostgreSQL


class PrivatePostgres:
    """A throw-away cluster on a free port (trust auth), owned by the ``postgres`` user when run as root."""

    def __init__(self, root: Path) -> None:
        bins = sorted(Path("/usr/lib/postgresql").glob("*/bin/initdb"))
        if not bins:
            raise RuntimeError("no /usr/lib/postgresql/*/bin/initdb: install the PostgreSQL server package")
        self.bin = bins[-1].parent
        self.dir = Path(
            tempfile.mkdtemp(prefix="lp-soak-pg-")
        )  # outside the 0700 work folder: the server user must enter it
        self.data = self.dir / "data"
        self.port = free_port()
        self.url = f"postgresql://postgres@127.0.0.1:{self.port}"
        self.as_user: list[str] = []
        if os.geteuid() == 0:
            pw = pwd.getpwnam("postgres")
            os.chmod(self.dir, 0o755)
            os.chown(self.dir, pw.pw_uid, pw.pw_gid)
            self.as_user = ["runuser", "-u", "postgres", "--"]

    def _run(self, *args: str, timeout: float = 120) -> None:
        subprocess.run(
            [*self.as_user, *args], check=True, capture_output=True, timeout=timeout, cwd=str(self.dir)
        )

    def _ctl(self, *args: str) -> None:
        self._run(str(self.bin / "pg_ctl"), "-D", str(self.data), "-w", "-t", "60", *args)

    def init(self) -> None:
        self._run(
            str(self.bin / "initdb"), "-D", str(self.data), "-A", "trust", "-U", "postgres", "--no-sync"
        )
        self.start()

    def start(self) -> None:
        opts = (
            f"-p {self.port} -c listen_addresses=127.0.0.1 -k {self.dir} -c max_connections=200 "
            "-c shared_buffers=64MB -c fsync=on"
        )
        self._ctl("-o", opts, "-l", str(self.dir / "server.log"), "start")

    def stop_server(self) -> None:
        """Fast shutdown (connections are cut, the data stays), for the restart fault."""
        self._ctl("-m", "fast", "stop")

    def stop(self) -> None:
        with contextlib.suppress(subprocess.SubprocessError, OSError):
            self._ctl("-m", "fast", "stop")
        shutil.rmtree(self.dir, ignore_errors=True)

    async def create_database(self, name: str) -> str:
        import asyncpg

        con = await asyncpg.connect(self.url + "/postgres", timeout=10)
        try:
            await con.execute(f'CREATE DATABASE "{name}"')
        finally:
            await con.close()
        return f"{self.url}/{name}"


# ---------------------------------------------------------------- collector and agents


class Collector:
    """``listenpost collector serve`` on a fixed port, restartable on the same state and database."""

    def __init__(self, work: Path, name: str, db: str | None, rules: list[dict[str, Any]]) -> None:
        self.name = name
        self.state_dir = work / name
        self.state_dir.mkdir(parents=True, exist_ok=True)
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.db = db
        self.config = work / f"{name}.yaml"
        self.config.write_text(
            yaml.safe_dump(
                {
                    "listen": {"host": "127.0.0.1", "port": self.port},
                    "decode": {"rules": rules},
                    # rounds every 2 s: a second leader shows within seconds, not within a minute
                    "monitor": {"interval_seconds": 2.0},
                }
            )
        )
        self.procs: list[Proc] = []
        self.stops: list[bool] = []
        self.told_to_end: set[int] = set()
        """PIDs this harness stopped or killed; any other ending is a crash."""

    @property
    def proc(self) -> Proc | None:
        return self.procs[-1] if self.procs else None

    def start(self, *, fsize_limit: int | None = None) -> Proc:
        argv = listenpost(
            "collector",
            "serve",
            "--state-dir",
            str(self.state_dir),
            "--config",
            str(self.config),
            "--log-format",
            "json",
        )
        if self.db:
            argv += ["--db", self.db]
        p = Proc(argv, self.state_dir.parent / f"{self.name}.log", fsize_limit=fsize_limit)
        self.procs.append(p)
        return p

    async def wait_listening(self, bound_s: float = LISTEN_TIMEOUT_S) -> float:
        """Seconds until /v1/status answers 200; raises if the process died or the bound ran out."""
        t0 = time.monotonic()
        async with aiohttp.ClientSession(timeout=aiohttp.ClientTimeout(total=2)) as s:
            while time.monotonic() - t0 < bound_s:
                p = self.proc
                if p is None or not p.alive():
                    raise RuntimeError(
                        f"collector {self.name} exited; see {self.state_dir.parent / self.name}.log"
                    )
                with contextlib.suppress(aiohttp.ClientError, TimeoutError):
                    async with s.get(self.url + "/v1/status") as r:
                        if r.status == 200:
                            return time.monotonic() - t0
                await asyncio.sleep(0.1)
        raise RuntimeError(f"collector {self.name} did not answer within {bound_s:.0f} s")

    def stop(self) -> None:
        if self.proc is not None and self.proc.alive():
            self.told_to_end.add(self.proc.pid)
            self.stops.append(self.proc.stop())

    def kill9(self) -> None:
        if self.proc is not None:
            self.told_to_end.add(self.proc.pid)
            self.proc.kill9()

    def admin_headers(self) -> dict[str, str]:
        token = (self.state_dir / "admin-token").read_text().strip()
        return {"Authorization": "Bearer " + token}

    def statuses(self) -> Counter[int]:
        """HTTP answers by status over every process this collector ran (its request_handled lines)."""
        return Counter(
            int(d["status"]) for p in self.procs for d in p.events("request_handled") if "status" in d
        )


LEAD_START = {"monitor_leading"}
LEAD_END = {"monitor_round_failed", "monitor_standing_down"}


def leading_now(collectors: list[Collector]) -> int:
    """Processes that, by their own log, are running the monitor as the lock holder right now."""
    n = 0
    for c in collectors:
        p = c.proc
        if p is None or not p.alive():
            continue
        state = False
        for d in p.events():
            ev = d.get("event")
            if ev in LEAD_START:
                state = True
            elif ev in LEAD_END or (isinstance(ev, str) and "lock_lost" in ev):
                state = False
        n += state
    return n


@dataclass
class Board:
    """One enrolled board: its agent.yaml and state folder, replaying a simulator recording."""

    name: str
    recording: Path
    state_dir: Path
    config: Path
    procs: list[Proc] = field(default_factory=list)
    stops: list[bool] = field(default_factory=list)

    @property
    def proc(self) -> Proc | None:
        return self.procs[-1] if self.procs else None

    def start(self, *, fsize_limit: int | None = None) -> Proc:
        p = Proc(
            listenpost("agent", "run", "--config", str(self.config)),
            self.state_dir.parent / f"{self.name}.log",
            fsize_limit=fsize_limit,
        )
        self.procs.append(p)
        return p

    def stop(self) -> None:
        if self.proc is not None and self.proc.alive():
            self.stops.append(self.proc.stop())

    def kill9(self) -> None:
        if self.proc is not None:
            self.proc.kill9()


async def register(
    collector: Collector, tags: list[str], boards: list[str], room: str = "soak"
) -> dict[str, str]:
    """Register tags and boards and enroll each board; returns board name -> token."""
    tokens: dict[str, str] = {}
    h = collector.admin_headers()
    async with aiohttp.ClientSession(timeout=aiohttp.ClientTimeout(total=60)) as s:
        async with s.post(collector.url + "/v1/admin/tags", json={"ids": tags}, headers=h) as r:
            if r.status != 200:
                raise RuntimeError(f"tags refused: {r.status} {await r.text()}")
        sem = asyncio.Semaphore(16)

        async def one(name: str) -> None:
            async with sem:
                async with s.post(
                    collector.url + "/v1/admin/boards", json={"name": name, "room": room}, headers=h
                ) as r:
                    if r.status != 201:
                        raise RuntimeError(f"board {name} refused: {r.status} {await r.text()}")
                    code = (await r.json())["code"]
                async with s.post(
                    collector.url + "/v1/enroll", json={"code": code, "fingerprint": {"machine_id": name}}
                ) as r:
                    if r.status != 200:
                        raise RuntimeError(f"enroll {name}: {r.status} {await r.text()}")
                    tokens[name] = (await r.json())["token"]

        await asyncio.gather(*(one(b) for b in boards))
    return tokens


def make_board(
    work: Path,
    name: str,
    recording: Path,
    token: str,
    url: str,
    tags_file: Path,
    rules: list[dict[str, Any]],
    speed: float,
) -> Board:
    """agent.yaml and credential for one board; tags and rules are local too, so no advert waits for the config."""
    state = work / f"agent-{name}"
    state.mkdir(parents=True, exist_ok=True)
    cred = state / "credential"
    cred.write_text(token + "\n")
    cred.chmod(0o600)
    shutil.copy(tags_file, state / "tags.txt")
    config = work / f"agent-{name}.yaml"
    config.write_text(
        yaml.safe_dump(
            {
                "board": name,
                "state_dir": str(state),
                "collector": {"url": url},
                "source": {"kind": "replay", "files": [str(recording)], "speed": speed},
                "tags": {"file": "tags.txt"},
                "decode": {"rules": rules},
                "log": {"format": "json", "level": "info"},
            }
        )
    )
    return Board(name, recording, state, config)


# ---------------------------------------------------------------- truth and what was stored


def dry_run(recording: Path, tags: Path, rules: list[dict[str, Any]], work: Path) -> list[Reading]:
    """``agent replay --dry-run`` of the recording as a separate process: what the board should send."""
    cfg = work / f"dry-{recording.name}.yaml"
    cfg.write_text(yaml.safe_dump({"board": "dry-run", "decode": {"rules": rules}}))
    proc = subprocess.run(
        listenpost(
            "agent",
            "replay",
            str(recording),
            "--dry-run",
            "--fast",
            "--tags",
            str(tags),
            "--config",
            str(cfg),
        ),
        capture_output=True,
        text=True,
        timeout=300,
        check=False,
        cwd=str(work),
    )
    if proc.returncode != 0:
        raise RuntimeError(f"dry run of {recording} failed: {proc.stderr[-2000:]}")
    out = []
    for line in proc.stdout.splitlines():
        d = json.loads(line)
        out.append((d["tag"], round(d["t"] * 1000), round(d["rssi"] * 10)))
    return out


_STORED_SQL = (
    "SELECT ba.boot, t.tag, r.t_board_ms, r.rssi_dd FROM readings r JOIN batches ba ON ba.id = r.batch_id "
    "JOIN tags t ON t.id = r.tag_id JOIN boards b ON b.id = r.board_id WHERE b.name = {p}"
)


async def stored(db: str, board: str) -> list[tuple[str, str, int, int]]:
    """(boot, tag, board ms, RSSI in 0.1 dB) of every reading stored for ``board``."""
    if db.startswith("sqlite:///"):
        path = db.removeprefix("sqlite:///")

        def q() -> list[tuple[str, str, int, int]]:
            with contextlib.closing(sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=30)) as con:
                return con.execute(_STORED_SQL.format(p="?"), (board,)).fetchall()

        return await asyncio.to_thread(q)
    import asyncpg

    con = await asyncpg.connect(db, timeout=10)
    try:
        return [tuple(r) for r in await con.fetch(_STORED_SQL.format(p="$1"), board)]  # type: ignore[misc]
    finally:
        await con.close()


async def boots_in_order(db: str, board: str) -> list[tuple[str, float]]:
    """The board's boot ids with their first heartbeat (collector Unix time), oldest first."""
    sql = (
        "SELECT h.boot, min(h.at) FROM heartbeats h JOIN boards b ON b.id = h.board_id "
        "WHERE b.name = {p} GROUP BY h.boot ORDER BY 2"
    )
    if db.startswith("sqlite:///"):
        path = db.removeprefix("sqlite:///")

        def q() -> list[tuple[str, float]]:
            with contextlib.closing(sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=30)) as con:
                return [(r[0], float(r[1])) for r in con.execute(sql.format(p="?"), (board,))]

        return await asyncio.to_thread(q)
    import asyncpg

    con = await asyncpg.connect(db, timeout=10)
    try:
        return [(r[0], float(r[1])) for r in await con.fetch(sql.format(p="$1"), board)]
    finally:
        await con.close()


async def count_readings(db: str) -> int:
    if db.startswith("sqlite:///"):
        path = db.removeprefix("sqlite:///")

        def q() -> int:
            with contextlib.closing(sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=30)) as con:
                return int(con.execute("SELECT count(*) FROM readings").fetchone()[0])

        with contextlib.suppress(sqlite3.Error):
            return await asyncio.to_thread(q)
        return -1
    import asyncpg

    try:
        con = await asyncpg.connect(db, timeout=5)
    except (OSError, asyncpg.PostgresError, TimeoutError):
        return -1
    try:
        return int(await con.fetchval("SELECT count(*) FROM readings", timeout=10))
    except (OSError, asyncpg.PostgresError, TimeoutError):
        return -1
    finally:
        with contextlib.suppress(Exception):
            await con.close()


@dataclass
class Tally:
    """What one board's stored readings say against the dry run."""

    expected: int = 0
    stored: int = 0
    duplicates: int = 0
    invented: int = 0
    holes: int = 0
    """Readings before a boot's last stored one that are missing: sealed yet not stored."""
    lost_in_window: int = 0
    """Readings missing after a killed boot's last stored one, within the stated lossy window."""
    lost_outside_window: int = 0

    def add(self, o: Tally) -> None:
        for k in vars(self):
            setattr(self, k, getattr(self, k) + getattr(o, k))


def tally_boot(truth: list[Reading], got: list[Reading], *, cut_ms: int | None, window_ms: int) -> Tally:
    """
    One boot of one board. ``cut_ms`` None: the boot played the whole recording, so all of it is
    expected. Otherwise the boot was killed when its replay had reached board time ``cut_ms``
    (an estimate): readings up to the cut are expected, and those in the last ``window_ms`` before it
    may have been lost unsealed (docs/reliability.md §1: at most ``flush_seconds`` in RAM).
    """
    want = Counter(truth if cut_ms is None else [r for r in truth if r[1] <= cut_ms])
    have = Counter(got)
    t = Tally(expected=sum(want.values()), stored=sum(have.values()))
    full = Counter(truth)
    for r, n in have.items():
        t.duplicates += max(0, n - full[r]) if r in full else 0
        t.invented += n if r not in full else 0
    last = max((r[1] for r in got), default=-1)
    for r, n in want.items():
        missing = max(0, n - have[r])
        if not missing:
            continue
        if r[1] <= last:
            t.holes += missing
        elif cut_ms is not None and r[1] > cut_ms - window_ms:
            t.lost_in_window += missing
        else:
            t.lost_outside_window += missing
    if cut_ms is not None:
        # a killed boot that got further than the estimate: what it stored beyond the cut counts as expected
        extra = sum(n for r, n in have.items() if r[1] > cut_ms and r in full)
        t.expected += extra
    # what the design lets go (docs/reliability.md §1) is not promised: the notes carry its count
    t.expected -= t.lost_in_window
    return t


def gz_body(body: dict[str, Any]) -> bytes:
    from listenpost.core import wire

    return gzip.compress(wire.canonical_json(body), compresslevel=6)
