"""Export tables: binning by hand and against a slow reference, CSV and .npz round trips."""

from __future__ import annotations

import csv
import datetime as dt
import json
import math
from collections import defaultdict

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose, assert_array_equal

from listenpost.collector.models.export import CSV_COLUMNS, Aggregate, bin_readings, write_csv, write_npz
from listenpost.collector.store import ReadingRows

T0 = 1_800_000_000.0
TAG_A = "ibeacon:4d2a0c1e-7f3b-4c55-9e61-2b8f0a7d3c10:7:1"
TAG_B = "ibeacon:4d2a0c1e-7f3b-4c55-9e61-2b8f0a7d3c10:7:2"


def rows_of(entries) -> ReadingRows:
    """entries: (board, tag, t_collector, rssi_dd)."""
    b, g, t, r = zip(*entries, strict=True) if entries else ((), (), (), ())
    return ReadingRows(
        board=np.array(b, dtype=object),
        tag=np.array(g, dtype=object),
        t_collector=np.array(t, dtype=np.float64),
        rssi_dd=np.array(r, dtype=np.int32),
        offset_dd=np.zeros(len(t), dtype=np.int32),
    )


SMALL = [
    ("g0-a", TAG_A, T0 + 0.1, -600),
    ("g0-a", TAG_A, T0 + 0.9, -640),
    ("g0-b", TAG_A, T0 + 1.5, -705),
    ("g0-a", TAG_B, T0 + 1.99, -812),
    ("g0-a", TAG_B, T0 + 2.0, -820),  # exactly at a bin edge: belongs to the later bin
    ("g0-b", TAG_B, T0 + 2.5, -700),
    ("g0-b", TAG_B, T0 + 3.0, -700),  # t_to is exclusive: dropped
    ("g0-b", TAG_B, T0 - 0.01, -700),  # before t_from: dropped
]


def test_small_case_by_hand_max_and_mean():
    """Hand-computed cells for 2 tags × 3 one-second bins × 2 boards."""
    mx = bin_readings(rows_of(SMALL), T0, T0 + 3.0, 1.0, agg="max")
    assert mx.tags == (TAG_A, TAG_B) and mx.boards == ("g0-a", "g0-b")
    assert_array_equal(mx.bin_starts, [T0, T0 + 1, T0 + 2])
    nan = math.nan
    expected = [[[-60.0, nan], [nan, -70.5], [nan, nan]], [[nan, nan], [-81.2, nan], [-82.0, -70.0]]]
    assert mx.rssi.dtype == np.float32
    assert_array_equal(mx.rssi, np.array(expected, dtype=np.float32))
    assert_array_equal(mx.counts, [[[2, 0], [0, 1], [0, 0]], [[0, 0], [1, 0], [1, 1]]])
    mean = bin_readings(rows_of(SMALL), T0, T0 + 3.0, 1.0, agg=Aggregate.MEAN)
    assert_allclose(mean.rssi[0, 0, 0], -62.0)
    assert_array_equal(np.isnan(mean.rssi), np.isnan(mx.rssi))


def test_explicit_boards_and_tags_choose_order_and_filter():
    table = bin_readings(rows_of(SMALL), T0, T0 + 3.0, 1.5, boards=["g0-b", "u4-a"], tags=[TAG_B])
    assert table.boards == ("g0-b", "u4-a") and table.tags == (TAG_B,)
    assert table.rssi.shape == (1, 2, 2)
    assert_array_equal(table.counts[0, :, 0], [0, 1])  # g0-b heard TAG_B at +2.5 only
    assert np.all(np.isnan(table.rssi[0, :, 1]))  # u4-a heard nothing
    # Last bin is cut at t_to: 3 s in bins of 2 s gives 2 bins.
    assert bin_readings(rows_of(SMALL), T0, T0 + 3.0, 2.0).bin_starts.tolist() == [T0, T0 + 2]


def slow_reference(entries, t_from, t_to, bin_s, agg):
    """Obvious pure-Python binning: dict of lists per (tag, bin, board)."""
    cells = defaultdict(list)
    for board, tag, t, r in entries:
        if t_from <= t < t_to:
            cells[(tag, int((t - t_from) // bin_s), board)].append(r / 10.0)
    return {k: (max(v) if agg == "max" else sum(v) / len(v), len(v)) for k, v in cells.items()}


@settings(max_examples=40, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    agg=st.sampled_from(["max", "mean"]),
    bin_s=st.sampled_from([0.5, 1.0, 2.5, 10.0]),
)
def test_random_tables_match_slow_reference(seed, agg, bin_s):
    """Vectorised binning equals the pure-Python reference on random readings."""
    rng = np.random.default_rng(seed)
    n = int(rng.integers(0, 400))
    boards = [f"g{i}-a" for i in range(5)]
    tags = [f"lpx:{i:08x}" for i in range(7)]
    entries = [
        (
            boards[rng.integers(5)],
            tags[rng.integers(7)],
            T0 + float(rng.uniform(-5, 65)),
            int(rng.integers(-1000, -300)),
        )
        for _ in range(n)
    ]
    table = bin_readings(rows_of(entries), T0, T0 + 60.0, bin_s, boards=boards, tags=tags, agg=agg)
    ref = slow_reference(entries, T0, T0 + 60.0, bin_s, agg)
    assert int(table.counts.sum()) == sum(c for _, c in ref.values())
    for (tag, k, board), (value, count) in ref.items():
        i, j = table.tags.index(tag), table.boards.index(board)
        assert table.counts[i, k, j] == count
        assert_allclose(table.rssi[i, k, j], value, atol=1e-9)
    assert np.count_nonzero(~np.isnan(table.rssi)) == len(ref)


def test_csv_round_trip(tmp_path):
    """The long CSV reads back with the csv module to the same cells, ordered by bin, tag, board."""
    table = bin_readings(rows_of(SMALL), T0, T0 + 3.0, 1.0, agg="mean")
    path = tmp_path / "export.csv"
    assert write_csv(table, path) == 5  # heard cells: 2 for TAG_A, 3 for TAG_B
    with path.open(newline="", encoding="utf-8") as f:
        rows = list(csv.DictReader(f))
    assert tuple(rows[0].keys()) == CSV_COLUMNS
    keys = [(float(r["t_start"]), r["tag"], r["board"]) for r in rows]
    assert keys == sorted(keys)
    for r in rows:
        t = float(r["t_start"])
        k = table.bin_starts.tolist().index(t)
        i, j = table.tags.index(r["tag"]), table.boards.index(r["board"])
        assert float(r["rssi_dbm"]) == pytest.approx(table.rssi[i, k, j], abs=5e-4)
        assert int(r["n"]) == table.counts[i, k, j]
        assert dt.datetime.fromisoformat(r["t_start_iso"]).timestamp() == pytest.approx(t, abs=1e-3)
    assert rows[0]["t_start_iso"] == "2027-01-15T08:00:00.000Z"


def test_npz_round_trip_without_pickle(tmp_path):
    table = bin_readings(rows_of(SMALL), T0, T0 + 3.0, 1.0)
    path = tmp_path / "export.npz"
    write_npz(table, path)
    with np.load(path, allow_pickle=False) as z:
        assert_array_equal(z["rssi"], table.rssi)  # NaNs compare equal in assert_array_equal
        assert_array_equal(z["counts"], table.counts)
        assert z["tags"].tolist() == list(table.tags) and z["boards"].tolist() == list(table.boards)
        assert_array_equal(z["bin_starts"], table.bin_starts)
        meta = json.loads(str(z["metadata"]))
    assert meta["format"] == "listenpost-export" and meta["agg"] == "max" and meta["bin_s"] == 1.0
    assert [p.name for p in tmp_path.iterdir()] == ["export.npz"]  # no temporary left behind


def test_failed_write_keeps_the_previous_file(tmp_path):
    """A writer that fails midway leaves the earlier export untouched and no temporary file."""
    path = tmp_path / "export.csv"
    path.write_text("previous\n")

    class Broken:
        tags = ("x",)
        boards = ("y",)
        counts = np.ones((1, 1, 1), dtype=np.int32)
        bin_starts = np.array([T0])
        rssi = None  # indexing this fails during the write

        def room_of(self, i):
            return ""

        floor_of = room_of

    with pytest.raises(TypeError):
        write_csv(Broken(), path)  # type: ignore[arg-type]
    assert path.read_text() == "previous\n"
    assert [p.name for p in tmp_path.iterdir()] == ["export.csv"]


def test_empty_rows_give_an_empty_table():
    table = bin_readings(rows_of([]), T0, T0 + 10.0, 5.0)
    assert table.rssi.shape == (0, 2, 0) and table.tags == () and table.boards == ()


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        ({"bin_s": 0.0}, "bin_s"),
        ({"t_to": T0}, "t_to"),
        ({"agg": "median"}, "agg"),
        ({"boards": ["g0-a", "g0-a"]}, "boards"),
        ({"max_cells": 5}, "max_cells"),
        ({"t_from": math.nan}, "t_from"),
    ],
)
def test_bad_arguments_name_the_field(kwargs, field):
    args = {"t_from": T0, "t_to": T0 + 3.0, "bin_s": 1.0} | kwargs
    with pytest.raises(ValueError, match=field):
        bin_readings(rows_of(SMALL), **args)


def test_mismatched_columns_are_rejected():
    rows = rows_of(SMALL)
    bad = ReadingRows(
        board=rows.board[:-1],
        tag=rows.tag,
        t_collector=rows.t_collector,
        rssi_dd=rows.rssi_dd,
        offset_dd=rows.offset_dd,
    )
    with pytest.raises(ValueError, match="rows.board"):
        bin_readings(bad, T0, T0 + 3.0, 1.0)


def chunks_of(entries, sizes, tag_ids):
    """The entries as store chunks (ids plus name maps), cut at ``sizes``."""
    from listenpost.collector.store import ReadingChunk

    board_ids = {f"g{i}-a": 10 + i for i in range(5)} | {"g0-b": 20}
    board_names = {v: k for k, v in board_ids.items()}
    tag_names = {v: k for k, v in tag_ids.items()}
    out, at = [], 0
    for size in [*sizes, len(entries)]:
        part = entries[at : at + size]
        at += len(part)
        if part:
            b, g, t, r = zip(*part, strict=True)
            out.append(
                ReadingChunk(
                    np.array([board_ids[x] for x in b], dtype=np.int64),
                    np.array([tag_ids[x] for x in g], dtype=np.int64),
                    np.array(t, dtype=np.float64),
                    np.array(r, dtype=np.int32),
                    board_names,
                    tag_names,
                )
            )
    return out


@settings(max_examples=40, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    agg=st.sampled_from(["max", "mean"]),
    bin_s=st.sampled_from([0.5, 1.0, 2.5, 10.0]),
    fixed_tags=st.booleans(),
)
def test_chunked_builder_equals_whole_table_binning(seed, agg, bin_s, fixed_tags):
    """Any row order, any chunking: `TableBuilder` gives `bin_readings`'s table (max bit for bit)."""
    from listenpost.collector.models.export import TableBuilder

    rng = np.random.default_rng(seed)
    n = int(rng.integers(0, 400))
    boards = [f"g{i}-a" for i in range(5)]
    tags = [f"lpx:{i:08x}" for i in range(7)]
    tag_ids = {t: int(i) for t, i in zip(tags, rng.permutation(100)[:7] + 1, strict=True)}
    entries = [
        (
            boards[rng.integers(5)],
            tags[rng.integers(7)],
            T0 + float(rng.uniform(-5, 65)),
            int(rng.integers(-1000, -300)),
        )
        for _ in range(n)
    ]
    registered = [tags[i] for i in rng.permutation(7)[: int(rng.integers(0, 4))]]
    cols = boards[:4]  # g4-a is left out
    chosen = [tags[5], tags[2], tags[0]] if fixed_tags else None
    builder = TableBuilder(T0, T0 + 60.0, bin_s, cols, tags=chosen, base_tags=registered, agg=agg)
    sizes = sorted(rng.integers(0, max(n, 1), int(rng.integers(0, 6))).tolist())
    for chunk in chunks_of(entries, np.diff([0, *sizes]).tolist(), tag_ids):
        builder.add(chunk)
    got = builder.table()
    heard = sorted({g for b, g, t, _ in entries if T0 <= t < T0 + 60.0 and b in cols})
    want = bin_readings(
        rows_of(entries), T0, T0 + 60.0, bin_s, cols, chosen or sorted(set(heard) | set(registered)), agg=agg
    )
    assert got.tags == want.tags and got.boards == want.boards
    assert_array_equal(got.counts, want.counts)
    if agg == "max":
        assert_array_equal(got.rssi, want.rssi)
    else:
        assert_allclose(got.rssi, want.rssi, rtol=1e-12)
    assert builder.readings == int(want.counts.sum())


def test_builder_refuses_tags_that_push_the_table_past_max_cells():
    from listenpost.collector.models.export import TableBuilder

    builder = TableBuilder(T0, T0 + 3.0, 1.0, ["g0-a", "g0-b"], max_cells=6)  # one tag fits
    chunk = chunks_of([e for e in SMALL if e[1] == TAG_A], [], {TAG_A: 1, TAG_B: 2})[0]
    builder.add(chunk)
    with pytest.raises(ValueError, match="max_cells"):
        builder.add(chunks_of(SMALL, [], {TAG_A: 1, TAG_B: 2})[0])
