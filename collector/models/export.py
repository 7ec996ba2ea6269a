"""
Study tables: tag × time-bin × board arrays of calibrated RSSI, and their CSV and ``.npz`` files.

``bin_readings`` takes the store's `ReadingRows` (``t_collector`` is already clock-corrected collector
time, ``rssi_dd`` already calibrated, tenths of a dB) and aggregates each (tag, bin, board) cell with
the maximum or the mean; a cell nobody heard is NaN with count 0. Bins are half-open,
``[t_from + k·bin_s, t_from + (k+1)·bin_s)``, and the last one is cut at ``t_to``.

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

from listenpost.collector.store import ReadingRows

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


def _names(arg: str, given: Sequence[str] | None, present: np.ndarray) -> list[str]:
    if given is None:
        return sorted({str(x) for x in present})
    names = [str(x) for x in given]
    if len(set(names)) != len(names):
        dup = next(x for x in names if names.count(x) > 1)
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
    "bin_readings",
    "write_csv",
    "write_npz",
]
