"""
Study tables: tag × time-bin × board arrays of RSSI, and their CSV, ``.npz`` and Parquet files.

The store keeps what each board sent (``rssi_dd``, its own offset already added, tenths of a dB) and the
offset it added (its batch's ``offset_dd``), so the raw radio value is ``rssi_dd - offset_dd`` and an
export chooses the calibration (`CalibrationChoice`): as the board applied it, the collector's
calibration history valid at each reading's time, or the latest calibration applied to everything.

Bins are aligned to the Unix epoch: bin ``k`` is ``[k·bin_s, (k+1)·bin_s)``, so two exports with one bin
width share bin edges. The table covers the bins that meet ``[t_from, t_to)``; the first and last may be
partial (only readings inside the range count). A cell nobody heard is NaN with count 0.

``bin_readings`` takes the store's `ReadingRows` (``t_collector`` is already clock-corrected collector
time) and aggregates each (tag, bin, board) cell of the applied values with the maximum or the mean.
`TableBuilder` computes the same table from the store's `ReadingChunk` stream (`Store.scan_readings`),
one chunk at a time and in any row order: each chunk is scattered into the output arrays by its
(tag, bin, board) index, so memory is the output arrays (12 bytes per cell while binning, 8 once done)
plus one chunk, whatever the number of readings.

The writers replace the target file atomically (temporary file in the same folder, then rename), so
an export never leaves a half-written file where a previous one was.

File formats (docs/export.md):

- CSV, long format, one row per heard cell, ordered by bin, tag, board: `CSV_COLUMNS`
  (ISO 8601 UTC with ``Z``; Unix seconds; dBm; the board's room and floor from the board registry).
- Parquet: the same rows and columns (``rssi_dbm`` float32, ``n`` int32), written one slab of bins at a
  time; the metadata JSON is in the file's key-value metadata under ``listenpost``.
- ``.npz`` (no pickles; ``numpy.load(path)`` reads it): ``rssi[tag, bin, board]`` float32 (NaN where
  unheard), ``counts`` int32 of the same shape, ``tags``, ``boards``, ``rooms``, ``floors`` (unicode
  arrays; rooms and floors per board, ``""`` for no floor), ``bin_starts`` (float64 Unix seconds),
  ``metadata`` (a JSON string, `ExportTable.metadata`).
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
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import IO, Any

import numpy as np

from listenpost.collector.store import ReadingChunk, ReadingRows

EXPORT_FORMAT = "listenpost-export"
EXPORT_VERSION = 2
CSV_COLUMNS = ("t_start_iso", "t_start", "tag", "board", "room", "floor", "rssi_dbm", "n")


class CalibrationChoice(enum.StrEnum):
    """Which offset an export adds to each reading's raw RSSI."""

    APPLIED = "applied"
    """The offset the board added when it took the reading (what it sent)."""
    HISTORY = "history"
    """The collector's calibration valid at the reading's time (the newest one at or before it); none
    before a board's first calibration (raw)."""
    LATEST = "latest"
    """Each board's latest calibration, for every reading (raw for a board never calibrated)."""


def offset_dd(offset_db: float) -> int:
    """An offset in tenths of a dB, rounded as ingest rounds a batch's (store/common.py ``check_batch``)."""
    return round(offset_db * 10)


@dataclass(frozen=True, slots=True)
class BoardInfo:
    """Where a board is, for the room and floor columns."""

    room: str
    floor: str | None = None


def _n_bins(t_from: float, t_to: float, bin_s: float) -> tuple[int, int]:
    """(index of the first epoch-aligned bin, number of bins) covering ``[t_from, t_to)``."""
    k0 = math.floor(t_from / bin_s)
    return k0, max(1, math.ceil(t_to / bin_s) - k0)


class Aggregate(enum.StrEnum):
    """How readings in one (tag, bin, board) cell become one value."""

    MAX = "max"
    """Strongest reading: robust to the deep fades of body shadowing."""
    MEAN = "mean"
    """Arithmetic mean of the dBm values."""


@dataclass(frozen=True, slots=True)
class ExportTable:
    """A dense tag × bin × board table of RSSI."""

    rssi: np.ndarray
    """float32 [tag, bin, board], dBm; NaN where no reading fell."""
    counts: np.ndarray
    """int32 [tag, bin, board], readings per cell."""
    tags: tuple[str, ...]
    boards: tuple[str, ...]
    bin_starts: np.ndarray
    """float64 [bin], collector Unix seconds, multiples of ``bin_s``."""
    t_from: float
    t_to: float
    bin_s: float
    agg: Aggregate
    calibration: CalibrationChoice = CalibrationChoice.APPLIED
    rooms: tuple[str, ...] = ()
    """Per board (``""`` where unknown); empty: no room information."""
    floors: tuple[str, ...] = ()
    """Per board (``""`` for no floor); empty: no floor information."""

    def room_of(self, i: int) -> str:
        return self.rooms[i] if self.rooms else ""

    def floor_of(self, i: int) -> str:
        return self.floors[i] if self.floors else ""

    def metadata(self) -> dict[str, Any]:
        """Descriptive fields written alongside the arrays."""
        return {
            "format": EXPORT_FORMAT,
            "version": EXPORT_VERSION,
            "t_from": self.t_from,
            "t_to": self.t_to,
            "bin_s": self.bin_s,
            "bins": "aligned to the Unix epoch: bin starts are multiples of bin_s; the first and last "
            "bins may be partial (only readings in [t_from, t_to) count)",
            "agg": self.agg.value,
            "calibration": self.calibration.value,
            "rssi_unit": f"dBm, raw RSSI plus the {self.calibration.value} calibration offset",
            "time": "collector Unix seconds, clock-corrected; bin_starts are bin starts",
            "shape": "rssi[tag, bin, board]",
        }

    def summary(self) -> dict[str, Any]:
        """Counts a person checks an export by: heard cells, readings, boards, tags, the time span."""
        heard = self.counts > 0
        return {
            "cells": int(np.count_nonzero(heard)),
            "readings": int(self.counts.sum(dtype=np.int64)),
            "boards": int(np.count_nonzero(heard.any(axis=(0, 1)))) if heard.size else 0,
            "tags": int(np.count_nonzero(heard.any(axis=(1, 2)))) if heard.size else 0,
            "t_from": self.t_from,
            "t_to": self.t_to,
            "bins": len(self.bin_starts),
            "calibration": self.calibration.value,
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
        t_from: start of the range, collector Unix seconds (bins are aligned to the epoch).
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
    k0, n_bins = _n_bins(t_from, t_to, bin_s)
    cells = len(tag_list) * n_bins * len(board_list)
    if cells > max_cells:
        raise ValueError(
            f"max_cells: table of {len(tag_list)} tags x {n_bins} bins x {len(board_list)} boards "
            f"= {cells} cells exceeds {max_cells}; narrow the range or widen bin_s"
        )

    ti, tag_ok = _index(tag_list, row_tag)
    bi, board_ok = _index(board_list, row_board)
    keep = tag_ok & board_ok & (t >= t_from) & (t < t_to) & np.isfinite(rssi)
    k = _bin_index(t[keep], bin_s, k0, n_bins)
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
    return ExportTable(
        rssi=out.reshape(shape).astype(np.float32),
        counts=counts.reshape(shape),
        tags=tuple(tag_list),
        boards=tuple(board_list),
        bin_starts=_bin_starts(k0, n_bins, bin_s),
        t_from=float(t_from),
        t_to=float(t_to),
        bin_s=float(bin_s),
        agg=agg,
    )


def _bin_index(t: np.ndarray, bin_s: float, k0: int, n_bins: int) -> np.ndarray:
    """Index of each time's epoch-aligned bin in a table whose first bin is ``k0``."""
    k = np.floor(t / bin_s).astype(np.int64) - k0
    # Rounding at a bin edge must not put a reading of the range outside the table.
    return np.clip(k, 0, n_bins - 1, out=k)


def _bin_starts(k0: int, n_bins: int, bin_s: float) -> np.ndarray:
    return (k0 + np.arange(n_bins, dtype=np.float64)) * bin_s


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
    _check_cells(len(tags), _n_bins(t_from, t_to, bin_s)[1], len(boards), max_cells)


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
        calibration: which offset each reading gets (`CalibrationChoice`); all but ``applied`` need the
            chunks' ``offset_dd``.
        history: per board, its calibrations as (at, offset_db), oldest first (`Store.calibrations`);
            a board missing here has none.
        board_info: per board, its room and floor (the room and floor columns; ``""`` where missing).

    Raises:
        ValueError: as `bin_readings` (the message names the argument), also from `add` when tags
            turning up push the table past ``max_cells`` or a chunk lacks the offsets its calibration
            needs.
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
        calibration: CalibrationChoice | str = CalibrationChoice.APPLIED,
        history: Mapping[str, Sequence[tuple[float, float]]] | None = None,
        board_info: Mapping[str, BoardInfo] | None = None,
    ) -> None:
        self.agg = _check_args(agg, t_from, t_to, bin_s)
        try:
            self.calibration = CalibrationChoice(calibration)
        except ValueError:
            choices = [c.value for c in CalibrationChoice]
            raise ValueError(f"calibration: must be one of {choices}, got {calibration!r}") from None
        self.t_from, self.t_to, self.bin_s = float(t_from), float(t_to), float(bin_s)
        self.boards = _names("boards", boards, np.empty(0, dtype=object))
        self.fixed_tags = tags is not None
        self.tags = _names(
            "tags", tags if tags is not None else sorted(set(base_tags)), np.empty(0, dtype=object)
        )
        self.k0, self.n_bins = _n_bins(t_from, t_to, bin_s)
        self.max_cells = max_cells
        history = history or {}
        # Per board column: calibration times and offsets (tenths of a dB), oldest first.
        self._cal = [
            (
                np.array([at for at, _ in history.get(b, ())], dtype=np.float64),
                np.array([offset_dd(off) for _, off in history.get(b, ())], dtype=np.int32),
            )
            for b in self.boards
        ]
        for b, (at, _) in zip(self.boards, self._cal, strict=True):
            if np.any(np.diff(at) < 0):
                raise ValueError(f"history: calibrations of {b!r} are not oldest first")
        info = board_info or {}
        self.rooms = tuple(info[b].room if b in info else "" for b in self.boards)
        self.floors = tuple((info[b].floor or "") if b in info else "" for b in self.boards)
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
        values = self._calibrated(chunk, keep, bi[keep], t[keep]).astype(np.float64)  # tenths; /10 at the end
        k = _bin_index(t[keep], self.bin_s, self.k0, self.n_bins)
        flat = (ti[keep] * self.n_bins + k) * len(self.boards) + bi[keep]
        # ufunc.at with operands of the array's own dtype is numpy's fast path (no per-element cast).
        np.add.at(self._counts, flat, np.ones(flat.size, dtype=np.int32))
        if self.agg is Aggregate.MAX:
            np.maximum.at(self._acc, flat, values)
        else:
            np.add.at(self._acc, flat, values)  # sums of integers: exact in float64 below 2**53
        self.readings += int(flat.size)

    def _calibrated(
        self, chunk: ReadingChunk, keep: np.ndarray, col: np.ndarray, t: np.ndarray
    ) -> np.ndarray:
        """The kept readings with the chosen offset, int32 tenths of a dB (integer sums stay exact)."""
        rssi = np.asarray(chunk.rssi_dd, dtype=np.int32)[keep]
        if self.calibration is CalibrationChoice.APPLIED:
            return rssi
        if chunk.offset_dd is None:
            raise ValueError(
                f"calibration: {self.calibration.value!r} needs the applied offsets of the readings"
            )
        raw = rssi - np.asarray(chunk.offset_dd, dtype=np.int32)[keep]
        for c in np.unique(col).tolist():
            at, off = self._cal[c]
            if not off.size:
                continue  # never calibrated: raw
            here = col == c
            if self.calibration is CalibrationChoice.LATEST:
                raw[here] += off[-1]
            else:
                i = np.searchsorted(at, t[here], side="right") - 1
                raw[here] += np.where(i >= 0, off[np.maximum(i, 0)], 0)
        return raw

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
            rssi=rssi.astype(np.float32),
            counts=cnt,
            tags=tags,
            boards=tuple(self.boards),
            bin_starts=_bin_starts(self.k0, self.n_bins, self.bin_s),
            t_from=self.t_from,
            t_to=self.t_to,
            bin_s=self.bin_s,
            agg=self.agg,
            calibration=self.calibration,
            rooms=self.rooms,
            floors=self.floors,
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


SLAB_CELLS = 4_000_000
"""Cells (tags × boards × bins) the writers look at per step: the rows of one slab of bins at a time."""


def _slabs(table: ExportTable) -> Iterator[tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """The heard cells as (bin, tag, board) index arrays, ordered by bin, tag, board, one slab of bins at a time."""
    n_tags, n_bins, n_boards = table.counts.shape
    step = max(1, SLAB_CELLS // max(1, n_tags * n_boards))
    for b0 in range(0, n_bins, step):
        # nonzero walks in C order, so on the (bin, tag, board) view rows come out by bin, then tag, board.
        bins, tags_i, boards_i = np.nonzero(np.transpose(table.counts[:, b0 : b0 + step, :], (1, 0, 2)) > 0)
        if bins.size:
            yield bins + b0, tags_i, boards_i


def write_csv(table: ExportTable, path: str | os.PathLike[str]) -> int:
    """
    Write the table in long format (heard cells only, by bin, tag, board); returns the rows written.

    Columns: `CSV_COLUMNS`. RSSI is written to 0.001 dB; ``floor`` is empty for a board without one.
    """
    rows = [0]

    def write(f: Any) -> None:
        w = csv.writer(f)
        w.writerow(CSV_COLUMNS)
        rooms = [table.room_of(i) for i in range(len(table.boards))]
        floors = [table.floor_of(i) for i in range(len(table.boards))]
        for bins, tags_i, boards_i in _slabs(table):
            rows[0] += int(bins.size)
            for b, g, o in zip(bins.tolist(), tags_i.tolist(), boards_i.tolist(), strict=True):
                start = float(table.bin_starts[b])
                w.writerow(
                    [
                        _iso(start),
                        repr(start),
                        table.tags[g],
                        table.boards[o],
                        rooms[o],
                        floors[o],
                        f"{table.rssi[g, b, o]:.3f}",
                        int(table.counts[g, b, o]),
                    ]
                )

    _atomic_write(Path(path), write, binary=False)
    return rows[0]


def write_parquet(table: ExportTable, path: str | os.PathLike[str]) -> int:
    """
    Write the rows of `write_csv` as Parquet (one row group per slab of bins); returns the rows written.

    Text columns are dictionary-encoded; ``floor`` is ``""`` for a board without one, as in the CSV.
    The metadata JSON is in the file's key-value metadata under ``listenpost``.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    schema = pa.schema(
        [
            ("t_start_iso", pa.string()),
            ("t_start", pa.float64()),
            ("tag", pa.dictionary(pa.int32(), pa.string())),
            ("board", pa.dictionary(pa.int32(), pa.string())),
            ("room", pa.dictionary(pa.int32(), pa.string())),
            ("floor", pa.dictionary(pa.int32(), pa.string())),
            ("rssi_dbm", pa.float32()),
            ("n", pa.int32()),
        ],
        metadata={"listenpost": json.dumps(table.metadata())},
    )
    tags = pa.array(table.tags, type=pa.string())
    boards = pa.array(table.boards, type=pa.string())
    rooms = pa.array([table.room_of(i) for i in range(len(table.boards))], type=pa.string())
    floors = pa.array([table.floor_of(i) for i in range(len(table.boards))], type=pa.string())
    rows = [0]

    def write(f: Any) -> None:
        with pq.ParquetWriter(f, schema) as w:
            for bins, tags_i, boards_i in _slabs(table):
                rows[0] += int(bins.size)
                starts = table.bin_starts[bins]
                iso = {b: _iso(float(table.bin_starts[b])) for b in np.unique(bins).tolist()}
                board_idx = pa.array(boards_i.astype(np.int32))
                batch = pa.record_batch(
                    [
                        pa.array([iso[b] for b in bins.tolist()], type=pa.string()),
                        pa.array(starts),
                        pa.DictionaryArray.from_arrays(pa.array(tags_i.astype(np.int32)), tags),
                        pa.DictionaryArray.from_arrays(board_idx, boards),
                        pa.DictionaryArray.from_arrays(board_idx, rooms),
                        pa.DictionaryArray.from_arrays(board_idx, floors),
                        pa.array(table.rssi[tags_i, bins, boards_i].astype(np.float32)),
                        pa.array(table.counts[tags_i, bins, boards_i].astype(np.int32)),
                    ],
                    schema=schema,
                )
                w.write_batch(batch)

    _atomic_write(Path(path), write, binary=True)
    return rows[0]


def write_npz(table: ExportTable, path: str | os.PathLike[str]) -> None:
    """Write the table as a compressed ``.npz`` (see the module docstring for its arrays)."""

    def write(f: Any) -> None:
        np.savez_compressed(
            f,
            rssi=table.rssi.astype(np.float32, copy=False),
            counts=table.counts,
            tags=np.asarray(table.tags, dtype=str),
            boards=np.asarray(table.boards, dtype=str),
            rooms=np.asarray([table.room_of(i) for i in range(len(table.boards))], dtype=str),
            floors=np.asarray([table.floor_of(i) for i in range(len(table.boards))], dtype=str),
            bin_starts=table.bin_starts,
            metadata=np.asarray(json.dumps(table.metadata())),
        )

    _atomic_write(Path(path), write, binary=True)


WRITERS = {"csv": write_csv, "npz": write_npz, "parquet": write_parquet}
"""The file formats an export can be written in, by name."""


__all__ = [
    "Aggregate",
    "BoardInfo",
    "CalibrationChoice",
    "WRITERS",
    "CSV_COLUMNS",
    "EXPORT_FORMAT",
    "EXPORT_VERSION",
    "ExportTable",
    "TableBuilder",
    "bin_readings",
    "check_table",
    "write_csv",
    "write_npz",
    "write_parquet",
]
