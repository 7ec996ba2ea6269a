"""Where ``collector serve`` takes its settings: collector.yaml, and the database URL from outside argv."""

from __future__ import annotations

import asyncio
import os
import socket
import sqlite3
import subprocess
import sys
from pathlib import Path

import aiohttp
import pytest

from listenpost.collector.config import database_url_from, load_settings, parse_settings
from listenpost.core.errors import ConfigError


def test_database_url_comes_from_the_config_file():
    s = parse_settings({"database": {"url": "postgresql://lp@db/lp"}}, state_dir="/x")
    assert s.resolved_db_url() == "postgresql://lp@db/lp"
    assert parse_settings({}, state_dir="/x").resolved_db_url() == "sqlite:////x/collector.sqlite"
    with pytest.raises(ConfigError, match=r"^c\.yaml: database\.url: must be postgresql"):
        parse_settings({"database": {"url": "mysql://x"}}, "c.yaml")


def test_credential_beats_environment_beats_file_and_argv_beats_all(tmp_path: Path):
    cfg = tmp_path / "collector.yaml"
    cfg.write_text("database: {url: 'postgresql://file@db/lp'}\n")
    creds = tmp_path / "creds"
    creds.mkdir()
    env = {"LISTENPOST_DB_URL": "postgresql://env@db/lp"}
    assert load_settings(cfg, environ={}).db_url == "postgresql://file@db/lp"
    assert load_settings(cfg, environ=env).db_url == "postgresql://env@db/lp"
    (creds / "db_url").write_text("postgresql://cred:secret@db/lp\n")
    both = {**env, "CREDENTIALS_DIRECTORY": str(creds)}
    assert load_settings(cfg, environ=both).db_url == "postgresql://cred:secret@db/lp"
    assert load_settings(cfg, environ=both, db_url="sqlite:///argv").db_url == "sqlite:///argv"
    # A bad value names where it came from and does not echo what may be a password.
    (creds / "db_url").write_text("secret-password\n")
    with pytest.raises(ConfigError, match="^credential db_url") as e:
        database_url_from(both)
    assert "secret-password" not in str(e.value)
    with pytest.raises(ConfigError, match=r"^\$LISTENPOST_DB_URL: must be"):
        database_url_from({"LISTENPOST_DB_URL": "nope"})


def _free_port() -> int:
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    return port


async def test_serve_as_the_unit_runs_it_listens_where_the_file_says_on_the_credentials_database(
    tmp_path: Path,
):
    """The unit's command line names no host, port or database: all of it comes from the file and the credential."""
    port = _free_port()
    cfg = tmp_path / "collector.yaml"
    cfg.write_text(f"listen: {{host: 127.0.0.1, port: {port}}}\n")
    creds = tmp_path / "creds"
    creds.mkdir()
    db = tmp_path / "elsewhere" / "fleet.sqlite"
    db.parent.mkdir()
    (creds / "db_url").write_text(f"sqlite:///{db}\n")
    env = {**os.environ, "CREDENTIALS_DIRECTORY": str(creds)}
    env.pop("LISTENPOST_DB_URL", None)
    argv = [sys.executable, "-m", "listenpost", "collector", "serve", "--state-dir", str(tmp_path / "state")]
    log = tmp_path / "serve.log"
    with log.open("wb") as err:
        proc = await asyncio.create_subprocess_exec(
            *argv,
            "--config",
            str(cfg),
            "--log-format",
            "json",
            env=env,
            stdout=subprocess.DEVNULL,
            stderr=err,
        )
    try:
        status = None
        async with aiohttp.ClientSession(timeout=aiohttp.ClientTimeout(total=5)) as s:
            for _ in range(300):  # up to 30 s for the interpreter to start and bind
                try:
                    async with s.get(f"http://127.0.0.1:{port}/v1/enroll") as r:
                        status = r.status
                        break
                except aiohttp.ClientError:
                    assert proc.returncode is None, log.read_text()
                    await asyncio.sleep(0.1)
        assert status is not None, "the collector never listened on the port collector.yaml gives"
        assert db.exists() and not (tmp_path / "state" / "collector.sqlite").exists()
        with sqlite3.connect(db) as c:
            assert c.execute("SELECT count(*) FROM sqlite_master").fetchone()[0] > 0
    finally:
        if proc.returncode is None:
            proc.terminate()
        try:
            await asyncio.wait_for(proc.wait(), 30)
        finally:
            if proc.returncode is None:
                proc.kill()
                await proc.wait()
