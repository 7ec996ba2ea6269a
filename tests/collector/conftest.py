"""
Store fixtures: one suite, both backends.

``store_factory`` is parametrised over ``sqlite`` (a real file under ``tmp_path``) and ``postgres`` (the
machine's server at LISTENPOST_TEST_PG, each test in its own schema, dropped afterwards). Its ``open()``
opens another store on the same database, so tests can close and reopen, or run two collectors side
by side. Without a reachable server the PostgreSQL half skips with the reason, unless
LISTENPOST_REQUIRE_PG=1 (CI), where it fails.
"""

from __future__ import annotations

import contextlib
import os
import uuid
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

import pytest

from listenpost.collector.store import Store

PG_URL = os.environ.get("LISTENPOST_TEST_PG", "postgresql://postgres@127.0.0.1:5432/test")

_pg_problem: list[str] = []  # cached per session: "" reachable, else the reason


async def pg_unreachable() -> str:
    """Empty string if the test server answers, else why not."""
    if not _pg_problem:
        import asyncpg

        try:
            con = await asyncpg.connect(PG_URL, timeout=3)
            await con.close()
            _pg_problem.append("")
        except (OSError, asyncpg.PostgresError) as e:
            _pg_problem.append(f"PostgreSQL at {PG_URL} unreachable ({type(e).__name__}: {e})")
    return _pg_problem[0]


async def require_pg() -> None:
    """Skip (or, with LISTENPOST_REQUIRE_PG=1, fail) when the test server is not there."""
    problem = await pg_unreachable()
    if problem:
        if os.environ.get("LISTENPOST_REQUIRE_PG") == "1":
            pytest.fail(problem + " and LISTENPOST_REQUIRE_PG=1")
        pytest.skip(problem)


class StoreFactory:
    """Opens stores on one test database and closes whatever is still open at the end."""

    def __init__(self, backend: str, tmp_path: Path) -> None:
        self.backend = backend
        self.path = tmp_path / "collector.db"
        self.schema = f"lp_test_{uuid.uuid4().hex[:12]}"
        self.opened: list[Store] = []

    @property
    def url(self) -> str:
        return f"sqlite:///{self.path}" if self.backend == "sqlite" else PG_URL

    def options(self, **opts: Any) -> dict[str, Any]:
        if self.backend == "postgres":
            # Small pools: other suites share the server's 100 connections.
            return {"schema": self.schema, "max_size": 4, **opts}
        return opts

    async def open(self, **opts: Any) -> Store:
        if self.backend == "sqlite":
            from listenpost.collector.store.sqlite import SqliteStore

            store: Store = await SqliteStore.open(self.path, **self.options(**opts))
        else:
            from listenpost.collector.store.postgres import PostgresStore

            store = await PostgresStore.open(PG_URL, **self.options(**opts))
        self.opened.append(store)
        return store

    async def cleanup(self) -> None:
        for s in self.opened:
            await s.close()
        if self.backend == "postgres":
            import asyncpg

            con = await asyncpg.connect(PG_URL, timeout=5)
            try:
                await con.execute(f'DROP SCHEMA IF EXISTS "{self.schema}" CASCADE')
            finally:
                await con.close()


@pytest.fixture(params=["sqlite", "postgres"])
async def store_factory(request: pytest.FixtureRequest, tmp_path: Path) -> AsyncIterator[StoreFactory]:
    """A factory for stores on one fresh database of each backend."""
    if request.param == "postgres":
        await require_pg()
    factory = StoreFactory(request.param, tmp_path)
    try:
        yield factory
    finally:
        await factory.cleanup()


@pytest.fixture
async def store(store_factory: StoreFactory) -> Store:
    """An open, migrated, empty store (both backends)."""
    return await store_factory.open()


@pytest.fixture
async def sqlite_factory(tmp_path: Path) -> AsyncIterator[StoreFactory]:
    """Stores on one SQLite file, for the tests of SQLite-only behaviour."""
    factory = StoreFactory("sqlite", tmp_path)
    try:
        yield factory
    finally:
        await factory.cleanup()


@contextlib.asynccontextmanager
async def _fresh_pg(tmp_path: Path) -> AsyncIterator[StoreFactory]:
    await require_pg()
    factory = StoreFactory("postgres", tmp_path)
    try:
        yield factory
    finally:
        await factory.cleanup()


@pytest.fixture
async def pg_factory(tmp_path: Path) -> AsyncIterator[StoreFactory]:
    """Stores on one fresh PostgreSQL schema, for the tests of PostgreSQL-only behaviour."""
    async with _fresh_pg(tmp_path) as factory:
        yield factory


@pytest.fixture
async def second_pg(tmp_path: Path) -> AsyncIterator[StoreFactory]:
    """Another fresh PostgreSQL schema, beside ``pg_factory``'s."""
    async with _fresh_pg(tmp_path) as factory:
        yield factory
