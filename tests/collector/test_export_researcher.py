"""
The export as an analyst loads it: the calibration it applies is chosen and named, raw RSSI is recovered
exactly from what the store keeps, rooms and floors come with every row, bins share epoch-aligned edges,
and CSV and Parquet hold the same rows. Real SQLite files, the real PostgreSQL server, real aiohttp servers.
"""

from __future__ import annotations

import asyncio
import dataclasses
import io
import json
import math

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from listenpost.cli import main
from listenpost.collector.store import Board, Calibration, Enrollment
from tests.collector.conftest import StoreFactory
from tests.collector.test_api import admin_headers, make_client
from tests.collector.test_export_stream import cli_args, run_job, server, upload  # noqa: F401
from tests.collector.test_store import make_batch

T0 = 1_800_000_003.0
"""Not a multiple of the bin widths used here, so aligned edges differ from ``--from``."""
TAGS = ["lpx:000000a1", "lpx:000000b2", "lpx:000000c3"]
BOARDS = {"g0-a": ("G0 Foyer", "ground"), "g1-a": ("G1 Gallery", "first"), "x-a": ("Yard", None)}

# g0-a: (seq, offset the board applied); batch seq k holds readings at T0 + 10k .. T0 + 10k + 9, 1 s apart.
G0_BATCHES = [(0, 0.0), (1, 0.0), (2, 4.0), (3, 1.5)]
# Its calibrations: each reaches the board a few seconds after it is made, so readings in between were
# sent with the previous offset.
G0_CALIBRATIONS = [(T0 + 15.0, 4.0), (T0 + 25.0, 1.5)]
G1_OFFSET = 2.5
"""g1-a applied an offset from its own configuration and was never calibrated by the collector."""


async def fill(store) -> None:
    for name, (room, floor) in BOARDS.items():
        await store.add_board(Board(name, room, floor, T0 - 1000), Enrollment(name, f"code-{name}", T0))
    await store.add_tags(TAGS, T0 - 100)
    rng = np.random.default_rng(3)
    for seq, offset in G0_BATCHES:
        rssi = rng.integers(-950, -400, 10).astype(np.int32)
        await store.ingest(make_batch("g0-a", seq, t0=T0, tags=TAGS, offset_db=offset, rssi=rssi))
    for seq in range(4):
        rssi = rng.integers(-950, -400, 10).astype(np.int32)
        await store.ingest(make_batch("g1-a", seq, t0=T0 + 0.5, tags=TAGS, offset_db=G1_OFFSET, rssi=rssi))
    for at, offset in G0_CALIBRATIONS:
        await store.set_offset(Calibration("g0-a", at, offset, 0.4, 60, TAGS[0], 1.0))


def expected_offset_dd(board: str, t: float, choice: str) -> int:
    """The offset (tenths of a dB) a reading of ``board`` at ``t`` gets under ``choice``, worked out by hand."""
    if board == "g1-a":
        return round(G1_OFFSET * 10) if choice == "applied" else 0
    if choice == "applied":
        seq = int((t - T0) // 10)
        return round(dict(G0_BATCHES)[seq] * 10)
    if choice == "latest":
        return round(G0_CALIBRATIONS[-1][1] * 10)
    valid = [off for at, off in G0_CALIBRATIONS if at <= t]
    return round(valid[-1] * 10) if valid else 0


async def test_scan_gives_each_reading_the_offset_its_board_applied(store_factory: StoreFactory):
    """raw = rssi_dd - offset_dd, exactly, for every reading, on both backends."""
    store = await store_factory.open()
    await fill(store)
    seen = []

    def sink(chunk) -> None:
        assert chunk.offset_dd is not None
        for b, t, r, o in zip(
            chunk.board_id.tolist(),
            chunk.t_collector.tolist(),
            chunk.rssi_dd.tolist(),
            chunk.offset_dd.tolist(),
            strict=True,
        ):
            seen.append((chunk.board_names[b], t, r, o))

    assert await store.scan_readings(T0 - 10, T0 + 100, sink, chunk_rows=7) == 80
    rows = await store.readings(T0 - 10, T0 + 100)
    stored = {
        (b, t): (r, o)
        for b, t, r, o in zip(rows.board, rows.t_collector, rows.rssi_dd, rows.offset_dd, strict=True)
    }
    for board, t, rssi, off in seen:
        assert off == expected_offset_dd(board, t, "applied")
        assert (rssi, off) == stored[(board, t)]


async def export_npz(client, tmp_path, choice: str, **extra) -> dict:
    params = {"from": repr(T0), "to": repr(T0 + 40.0), "bin": "1", "format": "npz", "calibration": choice}
    job = await run_job(client, tmp_path, {**params, **extra})
    assert job["state"] == "done", job
    assert job["calibration"] == choice and job["summary"]["calibration"] == choice
    r = await client.get(f"/v1/admin/exports/{job['job']}/file", headers=admin_headers(tmp_path))
    assert r.status == 200
    with np.load(io.BytesIO(await r.read()), allow_pickle=False) as z:
        return {k: z[k] for k in z.files}


async def test_calibration_choice_changes_values_exactly_by_the_offset_differences(
    aiohttp_client, tmp_path, clock, store_factory: StoreFactory
):
    store = await store_factory.open()
    await fill(store)
    client = await make_client(aiohttp_client, tmp_path, clock, store=store)
    out = {c: await export_npz(client, tmp_path, c) for c in ("applied", "history", "latest")}
    applied = out["applied"]
    heard = applied["counts"] > 0
    assert int(heard.sum()) == 80  # one reading per (tag, 1 s bin, board) cell here
    tenths = {
        c: np.round(np.nan_to_num(z["rssi"].astype(np.float64)) * 10).astype(np.int64) for c, z in out.items()
    }
    boards, bins = applied["boards"].tolist(), applied["bin_starts"]
    checked = 0
    for g, k, b in zip(*np.nonzero(heard), strict=True):
        board = boards[b]
        t = float(bins[k])  # readings fall on whole seconds (g1-a's half a second in)
        for choice in ("history", "latest"):
            want = expected_offset_dd(board, t, choice) - expected_offset_dd(board, t, "applied")
            assert tenths[choice][g, k, b] - tenths["applied"][g, k, b] == want, (board, t, choice)
        checked += 1
    assert checked == 80
    # The three exports differ somewhere, and each names the calibration it used.
    assert not np.array_equal(tenths["history"][heard], tenths["applied"][heard])
    assert not np.array_equal(tenths["latest"][heard], tenths["history"][heard])
    for choice, z in out.items():
        meta = json.loads(str(z["metadata"]))
        assert meta["calibration"] == choice and choice in meta["rssi_unit"]
        assert z["rssi"].dtype == np.float32


async def test_csv_and_parquet_load_in_pandas_with_the_same_rows(
    aiohttp_client, tmp_path, clock, store_factory: StoreFactory
):
    """Same rows and values in both files, room and floor columns, bin starts on multiples of the width."""
    store = await store_factory.open()
    await fill(store)
    client = await make_client(aiohttp_client, tmp_path, clock, store=store)
    bin_s = 7.0
    frames, meta = {}, None
    for fmt in ("csv", "parquet"):
        params = {"from": repr(T0), "to": repr(T0 + 40.0), "bin": repr(bin_s), "format": fmt}
        job = await run_job(client, tmp_path, {**params, "calibration": "history"})
        assert job["state"] == "done", job
        r = await client.get(f"/v1/admin/exports/{job['job']}/file", headers=admin_headers(tmp_path))
        assert r.status == 200
        body = await r.read()
        if fmt == "csv":
            frames[fmt] = pd.read_csv(io.BytesIO(body), keep_default_na=False)
        else:
            assert r.headers["Content-Type"] == "application/vnd.apache.parquet"
            frames[fmt] = pd.read_parquet(io.BytesIO(body))
            meta = json.loads(pq.read_schema(io.BytesIO(body)).metadata[b"listenpost"])
        summary = job["summary"]
    csv_df, pq_df = frames["csv"], frames["parquet"]
    columns = ["t_start_iso", "t_start", "tag", "board", "room", "floor", "rssi_dbm", "n"]
    assert list(csv_df.columns) == list(pq_df.columns) == columns
    assert len(csv_df) == len(pq_df) == summary["cells"] > 0
    assert pq_df["rssi_dbm"].dtype == np.float32
    for col in ("t_start_iso", "tag", "board", "room", "floor"):
        assert csv_df[col].astype(str).tolist() == pq_df[col].astype(str).tolist(), col
    assert csv_df["t_start"].tolist() == pq_df["t_start"].tolist()
    assert csv_df["n"].tolist() == pq_df["n"].tolist() and int(csv_df["n"].sum()) == 80 == summary["readings"]
    np.testing.assert_allclose(csv_df["rssi_dbm"], pq_df["rssi_dbm"].astype(np.float64), atol=5e-4)
    # Rooms and floors of the registry, "" for a board without a floor.
    where = {b: (r, f) for b, r, f in zip(pq_df["board"], pq_df["room"], pq_df["floor"], strict=True)}
    assert where == {"g0-a": ("G0 Foyer", "ground"), "g1-a": ("G1 Gallery", "first")}
    # Epoch-aligned bins: every start is a multiple of the width; the first holds T0, the last T0 + 40.
    starts = np.unique(pq_df["t_start"].to_numpy())
    assert np.all(starts % bin_s == 0)
    assert starts[0] <= T0 < starts[0] + bin_s and starts[0] != T0
    assert summary["bins"] == math.ceil((T0 + 40.0) / bin_s) - math.floor(T0 / bin_s)
    assert meta is not None and meta["calibration"] == "history" and meta["bin_s"] == bin_s
    assert summary["boards"] == 2 and summary["tags"] == 3


async def test_npz_has_rooms_and_floors_per_board(
    aiohttp_client, tmp_path, clock, store_factory: StoreFactory
):
    store = await store_factory.open()
    await fill(store)
    client = await make_client(aiohttp_client, tmp_path, clock, store=store)
    z = await export_npz(client, tmp_path, "applied", bin="7")
    assert z["boards"].tolist() == ["g0-a", "g1-a", "x-a"]
    assert z["rooms"].tolist() == ["G0 Foyer", "G1 Gallery", "Yard"]
    assert z["floors"].tolist() == ["ground", "first", ""]
    assert np.all(z["bin_starts"] % 7.0 == 0)


@pytest.mark.parametrize(
    ("field", "value"), [("calibration", "newest"), ("format", "xlsx"), ("calibration", "")]
)
async def test_bad_export_choice_is_a_400_naming_the_field(aiohttp_client, tmp_path, clock, field, value):
    client = await make_client(aiohttp_client, tmp_path, clock)
    params = {"from": repr(T0), "to": repr(T0 + 40.0), "bin": "1", field: value}
    r = await client.post("/v1/admin/exports", params=params, headers=admin_headers(tmp_path))
    assert r.status == 400
    body = (await r.json())["error"]
    assert body["field"] == field and body["message"].startswith(f"{field}: ")


async def test_cli_export_prints_a_summary_line_and_writes_parquet(server, tmp_path, capsys):  # noqa: F811
    t2 = await upload(server, tmp_path, 20)
    out = tmp_path / "study.parquet"
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
        "parquet",
        "--calibration",
        "latest",
        "--out",
        str(out),
    )
    assert await asyncio.to_thread(main, args) == 0
    err = capsys.readouterr().err
    line = next(x for x in err.splitlines() if x.startswith("export:"))
    assert "20 readings" in line and "1 boards" in line and "calibration latest" in line and "cells" in line
    df = pd.read_parquet(out)
    assert int(df["n"].sum()) == 20 and set(df["room"]) == {"G2 Sound Lab"}


def test_history_needs_the_applied_offsets():
    """A chunk without offsets cannot be recalibrated: a clear error, not a wrong table."""
    from listenpost.collector.models.export import TableBuilder
    from listenpost.collector.store import ReadingChunk

    builder = TableBuilder(T0, T0 + 10, 1.0, ["g0-a"], calibration="history")
    chunk = ReadingChunk(
        np.array([1]),
        np.array([1]),
        np.array([T0]),
        np.array([-600], dtype=np.int32),
        {1: "g0-a"},
        {1: TAGS[0]},
    )
    with pytest.raises(ValueError, match="calibration"):
        builder.add(chunk)
    builder.add(dataclasses.replace(chunk, offset_dd=np.array([25], dtype=np.int32)))
    assert builder.table().rssi[0, 0, 0] == np.float32(-62.5)  # raw, never calibrated by the collector
