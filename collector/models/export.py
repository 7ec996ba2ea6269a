"""
Study tables: tag × time-bin × board arrays of calibrated RSSI, and their CSV and ``.npz`` files.

``bin_readings`` takes the store's `ReadingRows` (``t_collector`` is already clock-corrected collector
time, ``rssi_dd`` already calibrated, tenths of a dB) and aggregates each (tag, bin, board) cell with
the maximum or the mean; a cell nobody heard is NaN with count 0. Bins are half-open,
``[t_from + k·bin_s, t_from + (k+1)·bin_s)``, and the last one is cut at ``t_to``.

`TableBuilder` computes the same table from the store's `ReadingChunk` stream (`Store.scan_readings`),
one chunk at a time and in any row order: each chunk is scattered into the output arrays by its
(tag, bin, board) index, so memory is the output arrays (12 bytes per cell) plus one chunk, whatever the
number of readings.

The writers replace the target file atomically (temporary file in the same folder, then rename), so
an export never leaves a half-written file where a previous one was.

File formats:

- CSV, long format, one row per heard cell, ordered by bin, tag, board:
  ``t_start_iso, t_start, tag, board, rssi_dbm, n`` (ISO 8601 UTC with ``Z``; Unix seconds; dBm).
- ``.npz`` (no pickles; ``numpy.load(path)`` reads it): ``rssi[tag, bin, board]`` float64 (NaN where
  unheard), ``counts`` int32 of the same shape, ``tags``, ``boards`` (unicode arrays),
  ``bin_starts`` (float64 Unix seconds), ``metadata`` (a JSON string: format, version, t_from, t_to,
  bin_s, agg, units).
"""

from __future__ import annotations

import contextlib
import csv
import datetime as dt
import enum
import json
import math
import os
import tempfile
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import IO, Any

import numpy as np

from listenpost.collector.store import ReadingChunk, ReadingRows

EXPORT_FORMAT = "listenpost-export"
EXPORT_VERSION = 1
CSV_COLUMNS = ("t_start_iso", "t_start", "tag", "board", "rssi_dbm", "n")


class Aggregate(enum.StrEnum):
    """How readings in one (tag, bin, board) cell become one value."""

    MAX = "max"
    """Strongest reading: robust to the deep fades of body shadowing."""
    MEAN = "mean"
    """Arithmetic mean of the dBm values."""


@dataclass(frozen=True, slots=True)
class ExportTable:
    """A dense tag × bin × board table of calibrated RSSI."""

    rssi: np.ndarray
    """float64 [tag, bin, board], dBm; NaN where no reading fell."""
    counts: np.ndarray
    """int32 [tag, bin, board], readings per cell."""
    tags: tuple[str, ...]
    boards: tuple[str, ...]
    bin_starts: np.ndarray
    """float64 [bin], collector Unix seconds."""
    t_from: float
    t_to: float
    bin_s: float
    agg: Aggregate

    def metadata(self) -> dict[str, Any]:
        """Descriptive fields written alongside the arrays."""
        return {
            "format": EXPORT_FORMAT,
            "version": EXPORT_VERSION,
            "t_from": self.t_from,
            "t_to": self.t_to,
            "bin_s": self.bin_s,
            "agg": self.agg.value,
            "rssi_unit": "dBm, calibrated",
            "time": "collector Unix seconds, clock-corrected; bin_starts are bin starts",
            "shape": "rssi[tag, bin, board]",
        }


def bin_readings(
    rows: ReadingRows,
    t_from: float,
    t_to: float,
    bin_s: float,
    boards: Sequence[str] | None = None,
    tags: Sequence[str] | None = None,
    agg: Aggregate | str = Aggregate.MAX,
    max_cells: int = 50_000_000,
) -> ExportTable:
    """
    Aggregate readings into a tag × time-bin × board table.

    Args:
        rows: columnar readings (board, tag, t_collector, rssi_dd, offset_dd; equal lengths).
        t_from: start of the first bin, collector Unix seconds.
        t_to: end (exclusive), collector Unix seconds; > t_from.
        bin_s: bin width, seconds; > 0.
        boards: boards to include, in this column order; default every board present, sorted.
        tags: tags to include, in this row order; default every tag present, sorted.
        agg: ``"max"`` or ``"mean"``.
        max_cells: refuse tables larger than this (tags × bins × boards), so an export cannot
            exhaust the collector's memory; ask for a shorter range or wider bins instead.

    Raises:
        ValueError: bad range, bin width, aggregate, column lengths, duplicate names or a table
            above ``max_cells`` (the message names the argument).
    """
    agg = _check_args(agg, t_from, t_to, bin_s)
    n = len(rows.t_collector)
    for name in ("board", "tag", "rssi_dd"):
        if len(getattr(rows, name)) != n:
            raise ValueError(f"rows.{name}: length {len(getattr(rows, name))} differs from t_collector's {n}")

    row_board = np.asarray(rows.board, dtype=object)
    row_tag = np.asarray(rows.tag, dtype=object)
    t = np.asarray(rows.t_collector, dtype=np.float64)
    rssi = np.asarray(rows.rssi_dd, dtype=np.float64) / 10.0

    board_list = _names("boards", boards, row_board)
    tag_list = _names("tags", tags, row_tag)
    n_bins = max(1, math.ceil((t_to - t_from) / bin_s))
    cells = len(tag_list) * n_bins * len(board_list)
    if cells > max_cells:
        raise ValueError(
            f"max_cells: table of {len(tag_list)} tags x {n_bins} bins x {len(board_list)} boards "
            f"= {cells} cells exceeds {max_cells}; narrow the range or widen bin_s"
        )

    ti, tag_ok = _index(tag_list, row_tag)
    bi, board_ok = _index(board_list, row_board)
    # Bin from the offset to t_from: subtracting first keeps float64 exact at Unix magnitudes.
    rel = t - t_from
    keep = tag_ok & board_ok & (t >= t_from) & (t < t_to) & np.isfinite(rssi)
    k = np.floor(rel[keep] / bin_s).astype(np.int64)
    k = np.minimum(k, n_bins - 1)  # a reading a hair below t_to can round into bin n_bins
    flat = (ti[keep] * n_bins + k) * len(board_list) + bi[keep]
    shape = (len(tag_list), n_bins, len(board_list))
    size = int(np.prod(shape))
    counts = np.bincount(flat, minlength=size).astype(np.int32)
    values = rssi[keep]
    if agg is Aggregate.MAX:
        out = np.full(size, -np.inf)
        if flat.size:
            # Sort once and reduce per run of equal cells: several times faster than np.maximum.at.
            order = np.argsort(flat, kind="stable")
            f_sorted = flat[order]
            starts = np.flatnonzero(np.r_[True, f_sorted[1:] != f_sorted[:-1]])
            out[f_sorted[starts]] = np.maximum.reduceat(values[order], starts)
    else:
        with np.errstate(invalid="ignore", divide="ignore"):
            out = np.bincount(flat, weights=values, minlength=size) / counts
    out[counts == 0] = np.nan
    bin_starts = t_from + np.arange(n_bins, dtype=np.float64) * bin_s
    return ExportTable(
        rssi=out.reshape(shape),
        counts=counts.reshape(shape),
        tags=tuple(tag_list),
        boards=tuple(board_list),
        bin_starts=bin_starts,
        t_from=float(t_from),
        t_to=float(t_to),
        bin_s=float(bin_s),
        agg=agg,
    )


def _check_args(agg: Aggregate | str, t_from: float, t_to: float, bin_s: float) -> Aggregate:
    try:
        agg = Aggregate(agg)
    except ValueError:
        raise ValueError(f"agg: must be one of {[a.value for a in Aggregate]}, got {agg!r}") from None
    for name, value in (("t_from", t_from), ("t_to", t_to), ("bin_s", bin_s)):
        if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
            raise ValueError(f"{name}: must be a finite number, got {value!r}")
    if bin_s <= 0:
        raise ValueError(f"bin_s: must be > 0, got {bin_s!r}")
    if t_to <= t_from:
        raise ValueError(f"t_to: must be after t_from ({t_from!r}), got {t_to!r}")
    return agg


def check_table(
    t_from: float,
    t_to: float,
    bin_s: float,
    boards: Sequence[str],
    tags: Sequence[str],
    agg: Aggregate | str = Aggregate.MAX,
    max_cells: int = 50_000_000,
) -> None:
    """The checks of `bin_readings` on a table's arguments, without building it; ``ValueError`` names the argument."""
    _check_args(agg, t_from, t_to, bin_s)
    _names("boards", boards, np.empty(0, dtype=object))
    _names("tags", tags, np.empty(0, dtype=object))
    _check_cells(len(tags), max(1, math.ceil((t_to - t_from) / bin_s)), len(boards), max_cells)


def _check_cells(n_tags: int, n_bins: int, n_boards: int, max_cells: int) -> None:
    cells = n_tags * n_bins * n_boards
    if cells > max_cells:
        raise ValueError(
            f"max_cells: table of {n_tags} tags x {n_bins} bins x {n_boards} boards "
            f"= {cells} cells exceeds {max_cells}; narrow the range or widen bin_s"
        )


class TableBuilder:
    """
    The table of `bin_readings`, built from chunks of readings in any order with bounded memory.

    Memory: the output arrays, float64 + int32 per (tag, bin, board) cell, plus the chunk being added.
    With ``tags=None`` the rows grow as new tags turn up (capacity doubles, so at most twice the final
    rows are allocated) and `table` reorders them by name, which copies the arrays once.

    Not thread-safe: feed it from one thread at a time (the store calls its sink sequentially).

    Args:
        t_from, t_to, bin_s, agg, max_cells: as for `bin_readings`.
        boards: the board columns, in this order (readings of other boards are left out).
        tags: the tag rows, in this order (readings of other tags are left out); ``None``: every tag of
            ``base_tags`` plus every tag heard in the range, sorted by name.
        base_tags: with ``tags=None``, tags that get a row even if nobody heard them (the registered ones).

    Raises:
        ValueError: as `bin_readings` (the message names the argument), also from `add` when tags
            turning up push the table past ``max_cells``.
    """

    def __init__(
        self,
        t_from: float,
        t_to: float,
        bin_s: float,
        boards: Sequence[str],
        tags: Sequence[str] | None = None,
        base_tags: Sequence[str] = (),
        agg: Aggregate | str = Aggregate.MAX,
        max_cells: int = 50_000_000,
    ) -> None:
        self.agg = _check_args(agg, t_from, t_to, bin_s)
        self.t_from, self.t_to, self.bin_s = float(t_from), float(t_to), float(bin_s)
        self.boards = _names("boards", boards, np.empty(0, dtype=object))
        self.fixed_tags = tags is not None
        self.tags = _names(
            "tags", tags if tags is not None else sorted(set(base_tags)), np.empty(0, dtype=object)
        )
        self.n_bins = max(1, math.ceil((t_to - t_from) / bin_s))
        self.max_cells = max_cells
        self.readings = 0
        """Readings binned so far (inside the range, of a chosen board and tag)."""
        self.rows_seen = 0
        """Rows the store delivered so far."""
        self._check_cells(len(self.tags))
        self._row_cells = self.n_bins * len(self.boards)
        self._cap = len(self.tags)
        self._acc = np.full(self._cap * self._row_cells, -np.inf if self.agg is Aggregate.MAX else 0.0)
        self._counts = np.zeros(self._cap * self._row_cells, dtype=np.int32)
        self._maps: tuple[int, int, np.ndarray, np.ndarray, np.ndarray, np.ndarray] | None = None

    def _check_cells(self, n_tags: int) -> None:
        _check_cells(n_tags, self.n_bins, len(self.boards), self.max_cells)

    def _lookups(self, chunk: ReadingChunk) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Sorted store ids and the row/column each maps to (-1: not in the table), per name map."""
        key = (id(chunk.board_names), id(chunk.tag_names))
        if self._maps is None or self._maps[:2] != key:
            col = {name: i for i, name in enumerate(self.boards)}
            row = {name: i for i, name in enumerate(self.tags)}
            b_ids = np.fromiter(sorted(chunk.board_names), dtype=np.int64, count=len(chunk.board_names))
            t_ids = np.fromiter(sorted(chunk.tag_names), dtype=np.int64, count=len(chunk.tag_names))
            b_pos = np.array([col.get(chunk.board_names[i], -1) for i in b_ids.tolist()], dtype=np.int64)
            t_pos = np.array([row.get(chunk.tag_names[i], -1) for i in t_ids.tolist()], dtype=np.int64)
            self._maps = (*key, b_ids, b_pos, t_ids, t_pos)
        return self._maps[2], self._maps[3], self._maps[4], self._maps[5]

    def add(self, chunk: ReadingChunk) -> None:
        """Bin one chunk of readings into the table."""
        n = len(chunk.t_collector)
        self.rows_seen += n
        if not n or not self.boards:
            return
        b_ids, b_pos, t_ids, t_pos = self._lookups(chunk)
        bi = _lookup(b_ids, b_pos, np.asarray(chunk.board_id, dtype=np.int64))
        ti = _lookup(t_ids, t_pos, np.asarray(chunk.tag_id, dtype=np.int64))
        t = np.asarray(chunk.t_collector, dtype=np.float64)
        keep = (bi >= 0) & (t >= self.t_from) & (t < self.t_to)
        if not self.fixed_tags:
            fresh = keep & (ti < 0)
            if fresh.any():
                self._grow(chunk, np.unique(np.asarray(chunk.tag_id, dtype=np.int64)[fresh]), t_ids, t_pos)
                ti = _lookup(t_ids, t_pos, np.asarray(chunk.tag_id, dtype=np.int64))
        keep &= ti >= 0
        values = np.asarray(chunk.rssi_dd)[keep].astype(np.float64)  # tenths of a dB; /10 at the end
        # Bin from the offset to t_from: subtracting first keeps float64 exact at Unix magnitudes.
        k = np.floor((t[keep] - self.t_from) / self.bin_s).astype(np.int64)
        np.minimum(k, self.n_bins - 1, out=k)  # a reading a hair below t_to can round into bin n_bins
        flat = (ti[keep] * self.n_bins + k) * len(self.boards) + bi[keep]
        # ufunc.at with operands of the array's own dtype is numpy's fast path (no per-element cast).
        np.add.at(self._counts, flat, np.ones(flat.size, dtype=np.int32))
        if self.agg is Aggregate.MAX:
            np.maximum.at(self._acc, flat, values)
        else:
            np.add.at(self._acc, flat, values)  # sums of integers: exact in float64 below 2**53
        self.readings += int(flat.size)

    def _grow(self, chunk: ReadingChunk, new_ids: np.ndarray, t_ids: np.ndarray, t_pos: np.ndarray) -> None:
        """Give each tag id in ``new_ids`` a row (appended; `table` sorts the rows by name)."""
        first = len(self.tags)
        self._check_cells(first + len(new_ids))
        self.tags.extend(chunk.tag_names[i] for i in new_ids.tolist())
        t_pos[np.searchsorted(t_ids, new_ids)] = np.arange(first, len(self.tags))
        if len(self.tags) > self._cap:
            self._cap = max(len(self.tags), 2 * self._cap)
            acc = np.full(self._cap * self._row_cells, self._fill())
            counts = np.zeros(self._cap * self._row_cells, dtype=np.int32)
            acc[: self._acc.size] = self._acc
            counts[: self._counts.size] = self._counts
            self._acc, self._counts = acc, counts

    def _fill(self) -> float:
        return -np.inf if self.agg is Aggregate.MAX else 0.0

    def table(self) -> ExportTable:
        """The finished table (call once, after the last `add`); the builder's arrays become its arrays."""
        n = len(self.tags) * self._row_cells
        out, counts = self._acc[:n], self._counts[:n]
        if self.agg is Aggregate.MAX:
            out /= 10.0
        else:
            with np.errstate(invalid="ignore", divide="ignore"):
                out /= counts
                out /= 10.0
        out[counts == 0] = np.nan
        shape = (len(self.tags), self.n_bins, len(self.boards))
        rssi, cnt, tags = out.reshape(shape), counts.reshape(shape), tuple(self.tags)
        if not self.fixed_tags and list(tags) != sorted(tags):
            order = sorted(range(len(tags)), key=tags.__getitem__)
            rssi, cnt, tags = rssi[order], cnt[order], tuple(tags[i] for i in order)
        self._acc = self._counts = np.empty(0)
        return ExportTable(
            rssi=rssi,
            counts=cnt,
            tags=tags,
            boards=tuple(self.boards),
            bin_starts=self.t_from + np.arange(self.n_bins, dtype=np.float64) * self.bin_s,
            t_from=self.t_from,
            t_to=self.t_to,
            bin_s=self.bin_s,
            agg=self.agg,
        )


def _lookup(ids: np.ndarray, pos: np.ndarray, values: np.ndarray) -> np.ndarray:
    """``pos`` of each value's place in the sorted ``ids``; -1 for a value not there."""
    if not ids.size:
        return np.full(values.shape, -1, dtype=np.int64)
    i = np.minimum(np.searchsorted(ids, values), ids.size - 1)
    return np.where(ids[i] == values, pos[i], -1)


def _names(arg: str, given: Sequence[str] | None, present: np.ndarray) -> list[str]:
    if given is None:
        return sorted({str(x) for x in present})
    names = [str(x) for x in given]
    if len(set(names)) != len(names):
        seen: set[str] = set()
        dup = next(x for x in names if x in seen or seen.add(x))  # type: ignore[func-returns-value]
        raise ValueError(f"{arg}: {dup!r} is listed twice")
    return names


def _index(names: list[str], values: Sequence[str] | np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Position of each value in ``names`` (any order) and whether it is there at all."""
    # A dict lookup per row beats sorting millions of strings (searchsorted on a str array).
    pos = {name: i for i, name in enumerate(names)}
    idx = np.fromiter((pos.get(v, -1) for v in values), dtype=np.int64, count=len(values))
    found = idx >= 0
    return np.where(found, idx, 0), found


def _iso(t: float) -> str:
    stamp = dt.datetime.fromtimestamp(t, tz=dt.UTC).isoformat(timespec="milliseconds")
    return stamp.replace("+00:00", "Z")


def _atomic_write(path: Path, write: Any, binary: bool) -> None:
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        f: IO[Any] = os.fdopen(fd, "wb") if binary else os.fdopen(fd, "w", newline="", encoding="utf-8")
        with f:
            write(f)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def write_csv(table: ExportTable, path: str | os.PathLike[str]) -> int:
    """
    Write the table in long format (heard cells only, by bin, tag, board); returns the rows written.

    Columns: ``t_start_iso, t_start, tag, board, rssi_dbm, n``. RSSI is written to 0.001 dB.
    """
    # nonzero walks in C order, so on the (bin, tag, board) view rows come out by bin, then tag, board.
    bins, tags_i, boards_i = np.nonzero(np.transpose(table.counts, (1, 0, 2)) > 0)

    def write(f: Any) -> None:
        w = csv.writer(f)
        w.writerow(CSV_COLUMNS)
        for b, g, o in zip(bins.tolist(), tags_i.tolist(), boards_i.tolist(), strict=True):
            start = float(table.bin_starts[b])
            w.writerow(
                [
                    _iso(start),
                    repr(start),
                    table.tags[g],
                    table.boards[o],
                    f"{table.rssi[g, b, o]:.3f}",
                    int(table.counts[g, b, o]),
                ]
            )

    _atomic_write(Path(path), write, binary=False)
    return int(bins.size)


def write_npz(table: ExportTable, path: str | os.PathLike[str]) -> None:
    """Write the table as a compressed ``.npz`` (see the module docstring for its arrays)."""

    def write(f: Any) -> None:
        np.savez_compressed(
            f,
            rssi=table.rssi,
            counts=table.counts,
            tags=np.asarray(table.tags, dtype=str),
            boards=np.asarray(table.boards, dtype=str),
            bin_starts=table.bin_starts,
            metadata=np.asarray(json.dumps(table.metadata())),
        )

    _atomic_write(Path(path), write, binary=True)


__all__ = [
    "Aggregate",
    "CSV_COLUMNS",
    "EXPORT_FORMAT",
    "EXPORT_VERSION",
    "ExportTable",
    "TableBuilder",
    "bin_readings",
    "check_table",
    "write_csv",
    "write_npz",
]
