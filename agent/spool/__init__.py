"""
The agent's durable spool: sealed batches in one SQLite file (WAL), oldest first.

Readings wait in memory at most ``flush_seconds``; then they are *sealed*: encoded with
`listenpost.core.wire.encode_content`, gzip'd, given the next ``seq`` of the spool's epoch and committed
with ``synchronous=FULL`` (one fsync per batch). One row per batch, never one per reading, to
spare SD cards. Everything else (ack deletes, dead letters) commits with ``synchronous=NORMAL``
and becomes durable with the next seal's fsync.

Keys and loss accounting (see docs/reliability.md §1):

- A batch is keyed by (board, epoch, seq). The epoch is a random 64-bit id (16 hex) made with the
  spool file; ``seq`` is assigned inside the seal transaction and never re-cut.
- Bounded in bytes: when a seal would pass ``max_bytes`` the oldest sealed batches go, and *gap
  records* (their own row and seq, reason ``spool_full``) name the dropped seq ranges and reading
  counts. A gap's ``gap`` object carries the ``epoch`` its range belongs to. A gap record that is
  itself dropped is folded into the new one, so gaps never pile up during a long outage.
- A batch the collector refuses (400/413) is moved to a bounded dead-letter table and a gap record
  (reason ``dead_letter``) says so.
- A corrupt file (bounded ``PRAGMA quick_check`` at open, or a corruption error later) is renamed
  to ``<path>.corrupt`` (at most one kept); readable batches are copied into a fresh spool under
  their old keys, the rest is reported by a gap record (reason ``spool_corrupt``) and a counter.
- Disk full or I/O errors: the connection is closed, readings stay in a hard-capped RAM buffer,
  ``degraded`` is set and the seal is retried on a capped, doubling timer.

SQLite calls run on one dedicated worker thread, so commits happen in call order and the event
loop never waits on the card. A cancelled caller does not abandon a half-applied operation: the
work runs to its end in a shielded task and its results are applied.

Gap record semantics: ``readings`` is exact; ``first_seq..last_seq`` may also span seqs that are
still spooled (a spool_full record names the envelope of one overflow's drops) or that were in flight
when dropped. The collector counts as lost only covered seqs it never receives.
"""

from __future__ import annotations

from listenpost.agent.spool.queue import Spool
from listenpost.agent.spool.values import (
    DEAD_LETTER_KEEP,
    GZIP_LEVEL,
    ROW_OVERHEAD_BYTES,
    GapReason,
    SealedBatch,
    SpoolStats,
    new_epoch,
)

__all__ = [
    "DEAD_LETTER_KEEP",
    "GZIP_LEVEL",
    "ROW_OVERHEAD_BYTES",
    "GapReason",
    "SealedBatch",
    "Spool",
    "SpoolStats",
    "new_epoch",
]
