"""
Export as a job: the streamed scan and the chunked binning against today's whole-table path, the bound
on rows per chunk, the event loop staying free, the CLI outlasting its per-request timeout, and an
export that matched nothing. Real SQLite files, the real PostgreSQL server, real aiohttp servers.
"""

from __future__ import annotations

import asyncio
import dataclasses
import io
import math
import threading
from pathlib import Path

import aiohttp
import numpy as np
import pytest
from numpy.testing import assert_array_equal

from listenpost.cli import main
from listenpost.collector.http import admin
from listenpost.collector.models import export as export_model
from listenpost.collector.models.export import bin_readings
from listenpost.core.clock import VirtualClock
from listenpost.core.logs import configure
from tests.collector.conftest import StoreFactory
from tests.collector.test_api import (
    admin_headers,
    batch_body,
    enrolled,
    make_client,
    readings,
)
from tests.collector.test_store import add_boards, make_batch

T0 = 1_800_000_000.0
TAGS = [f"lpx:{i:08x}" for i in range(12)]
HOLD_S = 20.0
"""Longest a held export waits for the test to release it: a bound against hanging, never reached."""


async def fill(store, n_batches: int = 40, n: int = 50, seed: int = 7) -> None:
    """Random readings of three boards (one retired) and twelve tags (four not registered)."""
    rng = np.random.default_rng(seed)
    await add_boards(store, "g0-a", "g1-a", "u2-b")
    await store.add_tags(TAGS[:8], T0 - 100)
    for seq in range(n_batches):
        board = ("g0-a", "g1-a", "u2-b")[seq % 3]
        b = make_batch(board, seq, n=n, tags=list(rng.permutation(TAGS)), t0=T0 - 30)
        rssi = rng.integers(-1000, -300, n).astype(np.int32)
        # Times scattered over the range and a little beyond it, not in arrival order.
        t = T0 + rng.uniform(-20, 1220, n)
        await store.ingest(dataclasses.replace(b, t_collector=t, rssi_dd=rssi))
    await store.retire_board("u2-b", T0)


async def todays_table(store, t_from, t_to, bin_s, boards=None, tags=None):
    """The table as the export computed it before: every row at once, then `bin_readings`."""
    rows = await store.readings(t_from, t_to, boards=boards, tags=tags)
    all_boards = boards or sorted(b.name for b in await store.list_boards())
    all_tags = tags or sorted(set(rows.tag.tolist()) | set(await store.list_tags()))
    return bin_readings(rows, t_from, t_to, bin_s, all_boards, all_tags)


async def run_job(client, tmp_path: Path, params: dict) -> dict:
    """Start an export job and long-poll it to its end; its final state."""
    r = await client.post("/v1/admin/exports", params=params, headers=admin_headers(tmp_path))
    assert r.status == 202, await r.text()
    job = await r.json()
    while job["state"] == "running":
        r = await client.get(
            f"/v1/admin/exports/{job['job']}", params={"wait": "5"}, headers=admin_headers(tmp_path)
        )
        assert r.status == 200, await r.text()
        job = await r.json()
    return job


@pytest.mark.parametrize(
    ("bin_s", "boards", "tags"),
    [(5.0, None, None), (2.5, ["g1-a", "u2-b"], None), (60.0, None, [TAGS[9], TAGS[1]])],
)
async def test_job_export_equals_todays_export(
    aiohttp_client, tmp_path, clock, store_factory: StoreFactory, monkeypatch, bin_s, boards, tags
):
    """Same arrays as the whole-table export, with small chunks so rows and tags arrive over many."""
    monkeypatch.setattr(admin, "EXPORT_CHUNK_ROWS", 97)
    store = await store_factory.open()
    await fill(store)
    client = await make_client(aiohttp_client, tmp_path, clock, store=store)
    t_from, t_to = T0, T0 + 1200.0
    want = await todays_table(store, t_from, t_to, bin_s, boards, tags)
    params = {"from": repr(t_from), "to": repr(t_to), "bin": repr(bin_s), "format": "npz"}
    query = [*params.items(), *[("board", b) for b in boards or []], *[("tag", t) for t in tags or []]]
    job = await run_job(client, tmp_path, query)
    assert job["state"] == "done" and job["readings"] == int(want.counts.sum()) > 0
    r = await client.get(f"/v1/admin/exports/{job['job']}/file", headers=admin_headers(tmp_path))
    assert r.status == 200 and r.headers["X-Readings"] == str(job["readings"])
    with np.load(io.BytesIO(await r.read()), allow_pickle=False) as z:
        assert z["tags"].tolist() == list(want.tags) and z["boards"].tolist() == list(want.boards)
        assert_array_equal(z["counts"], want.counts)
        assert_array_equal(z["rssi"], want.rssi)  # NaN where unheard on both sides
        assert_array_equal(z["bin_starts"], want.bin_starts)
    # The one-request route gives the same file.
    r = await client.get("/v1/admin/export", params=query, headers=admin_headers(tmp_path))
    assert r.status == 200
    with np.load(io.BytesIO(await r.read()), allow_pickle=False) as z:
        assert_array_equal(z["rssi"], want.rssi)


async def test_scan_hands_over_bounded_chunks(store_factory: StoreFactory):
    """Memory bound: no chunk the scan hands over has more than chunk_rows rows, and all rows come once."""
    store = await store_factory.open()
    await fill(store, n_batches=12, n=50)
    want = await store.readings(T0, T0 + 1200.0)
    sizes: list[int] = []
    seen: list[tuple[float, int]] = []

    def sink(chunk) -> None:
        assert threading.current_thread() is not threading.main_thread()  # never on the event loop
        sizes.append(len(chunk.t_collector))
        seen.extend(zip(chunk.t_collector.tolist(), chunk.rssi_dd.tolist(), strict=True))

    total = await store.scan_readings(T0, T0 + 1200.0, sink, chunk_rows=64)
    assert total == len(want.t_collector) == sum(sizes)
    assert max(sizes) <= 64 and len(sizes) == math.ceil(total / 64)
    assert sorted(seen) == sorted(zip(want.t_collector.tolist(), want.rssi_dd.tolist(), strict=True))


async def test_export_bins_chunk_by_chunk(aiohttp_client, tmp_path, clock, store_factory, monkeypatch):
    """Through the route: the binning sees chunks of at most EXPORT_CHUNK_ROWS rows, never the whole table."""
    monkeypatch.setattr(admin, "EXPORT_CHUNK_ROWS", 50)
    sizes: list[int] = []
    real_add = export_model.TableBuilder.add

    def add(self, chunk):
        sizes.append(len(chunk.t_collector))
        return real_add(self, chunk)

    monkeypatch.setattr(export_model.TableBuilder, "add", add)
    store = await store_factory.open()
    await fill(store, n_batches=9, n=50)
    client = await make_client(aiohttp_client, tmp_path, clock, store=store)
    job = await run_job(client, tmp_path, {"from": repr(T0 - 100), "to": repr(T0 + 1300), "bin": "10"})
    assert job["state"] == "done" and job["rows_scanned"] == 450 == sum(sizes)
    assert max(sizes) <= 50 and len(sizes) == 9


class Gate:
    """Holds the export's binning at its first chunk until released (a threading hook, no sleeps)."""

    def __init__(self) -> None:
        self.entered = threading.Event()
        self.release = threading.Event()
        self.events: list[str] = []
        """"binned" once the first held chunk goes on (list.append is atomic across threads)."""

    def hold(self) -> None:
        if self.entered.is_set():
            return
        self.entered.set()
        self.release.wait(HOLD_S)
        self.events.append("binned")

    def install(self, monkeypatch) -> None:
        real_bin = export_model.bin_readings

        def bin_all(*args, **kw):  # the whole-table binning, where an export has no TableBuilder
            self.hold()
            return real_bin(*args, **kw)

        monkeypatch.setattr(export_model, "bin_readings", bin_all)
        builder = getattr(export_model, "TableBuilder", None)
        if builder is not None:
            real_add = builder.add

            def add(table, chunk):
                self.hold()
                return real_add(table, chunk)

            monkeypatch.setattr(builder, "add", add)


async def test_uploads_and_status_are_answered_while_an_export_bins(
    aiohttp_client, tmp_path, clock: VirtualClock, monkeypatch
):
    """While an export of 20,000 readings is binning, an upload and the status page are answered first."""
    gate = Gate()
    gate.install(monkeypatch)
    client = await make_client(aiohttp_client, tmp_path, clock)
    auth = await enrolled(client, tmp_path, "g0-a")
    for seq in range(10):
        r = await client.post(
            "/v1/batches",
            json=batch_body("g0-a", seq, readings(2000, t0_s=50.0 + seq * 500), t1=50.0 + (seq + 1) * 500),
            headers=auth,
        )
        assert r.status == 200
    order = gate.events
    t_now = clock.time()

    async def export() -> None:
        r = await client.get(
            "/v1/admin/export",
            params={"from": repr(t_now - 10_000), "to": repr(t_now + 10_000), "bin": "1", "format": "npz"},
            headers=admin_headers(tmp_path),
        )
        assert r.status == 200 and r.headers["X-Readings"] == "20000"
        order.append("export")

    task = asyncio.create_task(export())
    assert await asyncio.to_thread(gate.entered.wait, HOLD_S)
    r = await client.post(
        "/v1/batches", json=batch_body("g0-a", 10, readings(5, t0_s=9000.0), t1=9010.0), headers=auth
    )
    assert r.status == 200
    order.append("upload")
    r = await client.get("/v1/status")
    assert r.status == 200
    order.append("status")
    gate.release.set()
    await task
    # Both were answered while the binning was held, i.e. before the export could finish.
    assert order == ["upload", "status", "binned", "export"]


# -- the command ---------------------------------------------------------------------------------------


@pytest.fixture
async def server(aiohttp_server, tmp_path: Path, clock: VirtualClock):
    from listenpost.collector.app import create_app
    from tests.collector.test_api import settings_for

    configure("json", stream=io.StringIO())  # the server's log lines stay out of the CLI's output
    app = create_app(settings_for(tmp_path / "state"), clock=clock, run_monitor=False)
    polls: list[str] = []

    async def count_polls(request, response) -> None:
        if request.path.startswith("/v1/admin/exports/") and not request.path.endswith("/file"):
            polls.append(request.path)
            app_polled.set()

    app_polled = asyncio.Event()
    app.on_response_prepare.append(count_polls)
    srv = await aiohttp_server(app)
    srv.polls, srv.polled = polls, app_polled
    return srv


async def upload(server, tmp_path: Path, n: int) -> float:
    """Enroll g2-a and upload n readings (0.25 s apart); the collector time they end before."""
    async with aiohttp.ClientSession(
        base_url=str(server.make_url("")), timeout=aiohttp.ClientTimeout(total=10)
    ) as s:
        headers = {"Authorization": "Bearer " + (tmp_path / "state" / "admin-token").read_text().strip()}
        async with s.post(
            "/v1/admin/boards", json={"name": "g2-a", "room": "G2 Sound Lab"}, headers=headers
        ) as r:
            code = (await r.json())["code"]
        async with s.post("/v1/enroll", json={"code": code, "fingerprint": {}}) as r:
            token = (await r.json())["token"]
        async with s.post(
            "/v1/batches",
            json=batch_body("g2-a", 0, readings(n), t1=100.0),
            headers={"Authorization": f"Bearer {token}"},
        ) as r:
            assert r.status == 200
            return float((await r.json())["t2"])


def cli_args(server, tmp_path: Path, *args: str) -> list[str]:
    url = str(server.make_url("")).rstrip("/")
    return ["collector", "export", *args, "--collector", url, "--state-dir", str(tmp_path / "state")]


async def test_cli_waits_for_an_export_longer_than_its_request_timeout(server, tmp_path, monkeypatch, capsys):
    """--timeout 1 bounds each request; the export is held until the CLI has polled it three times."""
    gate = Gate()
    gate.install(monkeypatch)
    t2 = await upload(server, tmp_path, 20)
    out = tmp_path / "held.npz"
    args = cli_args(
        server,
        tmp_path,
        "--from",
        repr(t2 - 60),
        "--to",
        repr(t2),
        "--bin",
        "10",
        "--format",
        "npz",
        "--out",
        str(out),
        "--timeout",
        "1",
    )
    cli = asyncio.create_task(asyncio.to_thread(main, args))
    assert await asyncio.to_thread(gate.entered.wait, HOLD_S)
    while len(server.polls) < 3 and not cli.done():  # each poll is answered within the 1 s timeout
        server.polled.clear()
        await asyncio.wait(
            {cli, asyncio.ensure_future(server.polled.wait())}, return_when=asyncio.FIRST_COMPLETED
        )
    assert not cli.done(), capsys.readouterr().err  # still waiting, past three request timeouts' worth
    gate.release.set()
    assert await cli == 0, capsys.readouterr().err
    assert "wrote" in capsys.readouterr().out
    with np.load(out, allow_pickle=False) as z:
        assert int(z["counts"].sum()) == 20


async def test_cli_export_that_matched_nothing_exits_3_and_writes_nothing(server, tmp_path, capsys):
    t2 = await upload(server, tmp_path, 20)
    out = tmp_path / "empty.csv"
    args = cli_args(
        server, tmp_path, "--from", repr(t2 + 100), "--to", repr(t2 + 200), "--bin", "5", "--out", str(out)
    )
    assert await asyncio.to_thread(main, args) == 3
    err = capsys.readouterr().err
    assert "no readings matched" in err and "nothing written" in err and "Traceback" not in err
    assert not out.exists() and not out.with_name(out.name + ".part").exists()
    # A board filter that matches no reading is the same case.
    args = cli_args(
        server,
        tmp_path,
        "--from",
        repr(t2 - 60),
        "--to",
        repr(t2),
        "--bin",
        "5",
        "--tag",
        "lpx:0000abcd",
        "--out",
        str(out),
    )
    assert await asyncio.to_thread(main, args) == 3
    assert "for tags lpx:0000abcd" in capsys.readouterr().err
