"""
Two `listenpost collector serve` processes on one fresh PostgreSQL database (docs/design.md §7):
a batch posted to both at the same moment is stored once, whichever process wins, and the other
answers `duplicate`. (Run-once monitor work across collectors is covered on virtual time in
test_scaleout.py; here the point is two separate processes with their own pools.)
"""

from __future__ import annotations

import asyncio
import gzip
import json
import socket
import sys
import uuid
from pathlib import Path

import aiohttp
import asyncpg
import pytest
import yaml

from listenpost.collector.http.auth import ADMIN_TOKEN_FILE
from tests.collector.conftest import PG_URL, require_pg
from tests.collector.test_api import TAGS, batch_body, readings


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@pytest.fixture
async def fresh_database():
    """A new database on the test server, dropped afterwards."""
    await require_pg()
    name = f"lp_scaleout_{uuid.uuid4().hex[:10]}"
    admin = await asyncpg.connect(PG_URL, timeout=5)
    try:
        await admin.execute(f'CREATE DATABASE "{name}"')
        yield PG_URL.rsplit("/", 1)[0] + "/" + name
    finally:
        await admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
        await admin.close()


async def _serve(
    tmp_path: Path, name: str, db: str, settings: dict | None = None
) -> tuple[asyncio.subprocess.Process, str]:
    port = _free_port()
    config = tmp_path / f"{name}.yaml"
    config.write_text(yaml.safe_dump({"listen": {"host": "127.0.0.1", "port": port}, **(settings or {})}))
    with (tmp_path / f"{name}.log").open("wb") as log:  # the child keeps its own copy of the descriptor
        proc = await asyncio.create_subprocess_exec(
            sys.executable,
            "-m",
            "listenpost",
            "collector",
            "serve",
            "--state-dir",
            str(tmp_path / name),
            "--db",
            db,
            "--config",
            str(config),
            "--log-format",
            "json",
            stdout=log,
            stderr=asyncio.subprocess.STDOUT,
        )
    return proc, f"http://127.0.0.1:{port}"


async def _wait_listening(session: aiohttp.ClientSession, proc, url: str, log: Path) -> None:
    loop = asyncio.get_running_loop()
    end = loop.time() + 30  # the child's start-up (imports, migration) in real time, bounded
    while True:
        assert proc.returncode is None, log.read_text()  # noqa: ASYNC240 - read only when failing
        try:
            async with session.get(url + "/v1/status") as r:
                if r.status == 200:
                    return
        except aiohttp.ClientConnectorError:
            pass
        if loop.time() > end:
            pytest.fail(f"collector serve did not listen within 30 s:\n{log.read_text()}")  # noqa: ASYNC240
        await asyncio.sleep(0.05)


async def test_two_collector_processes_store_a_batch_posted_to_both_once(
    tmp_path: Path, fresh_database: str
) -> None:
    """Both processes get the same batch at once: exactly one `stored`, one `duplicate`, n readings in the database."""
    procs = [await _serve(tmp_path, name, fresh_database) for name in ("a", "b")]
    try:
        async with aiohttp.ClientSession(timeout=aiohttp.ClientTimeout(total=10)) as session:
            for (proc, url), name in zip(procs, "ab", strict=True):
                await _wait_listening(session, proc, url, tmp_path / f"{name}.log")
            (_, url_a), (_, url_b) = procs
            admin_a = {"Authorization": "Bearer " + (tmp_path / "a" / ADMIN_TOKEN_FILE).read_text().strip()}
            admin_b = {"Authorization": "Bearer " + (tmp_path / "b" / ADMIN_TOKEN_FILE).read_text().strip()}
            async with session.post(url_a + "/v1/admin/tags", json={"ids": TAGS}, headers=admin_a) as r:
                assert r.status == 200, await r.text()
            async with session.post(
                url_a + "/v1/admin/boards",
                headers=admin_a,
                json={"name": "g3-a", "room": "G3 Weather Hall", "floor": "ground"},
            ) as r:
                assert r.status == 201, await r.text()
                code = (await r.json())["code"]
            # enrolled through the other process: the board and its code live in the shared database
            async with session.post(
                url_b + "/v1/enroll", json={"code": code, "fingerprint": {"machine_id": "g3-a"}}
            ) as r:
                assert r.status == 200, await r.text()
                board = {
                    "Authorization": "Bearer " + (await r.json())["token"],
                    "Content-Encoding": "gzip",
                    "Content-Type": "application/json",
                }

            async def post(url: str, body: bytes) -> str:
                async with session.post(url + "/v1/batches", data=body, headers=board) as r:
                    assert r.status == 200, await r.text()
                    return (await r.json())["status"]

            for seq in range(5):  # several rounds, so both orders of arrival get their chance
                body = gzip.compress(
                    json.dumps(batch_body("g3-a", seq, readings(300, t0_s=50 + 100 * seq))).encode()
                )
                answers = sorted(await asyncio.gather(post(url_a, body), post(url_b, body)))
                assert answers == ["duplicate", "stored"], answers

            for url, headers in ((url_a, admin_a), (url_b, admin_b)):
                async with session.get(url + "/v1/status", headers=headers) as r:
                    doc = await r.json()
                (row,) = [b for b in doc["boards"] if b["name"] == "g3-a"]
                assert row["readings_total"] == 5 * 300  # both processes read the same single copy
        con = await asyncpg.connect(fresh_database, timeout=5)
        try:
            assert await con.fetchval("SELECT count(*) FROM readings") == 5 * 300
            assert await con.fetchval("SELECT count(*) FROM batches") == 5
        finally:
            await con.close()
    finally:
        for proc, _ in procs:
            if proc.returncode is None:
                proc.terminate()
        for proc, _ in procs:
            try:
                await asyncio.wait_for(proc.wait(), 20)
            except TimeoutError:
                proc.kill()
                await proc.wait()
